//! Starting and stopping the service: the store, the monitor, the gRPC
//! server (with standard health and reflection) and the metrics listener.

use std::net::SocketAddr;
use std::sync::atomic::AtomicBool;
use std::sync::{Arc, OnceLock};

use tokio::net::TcpListener;
use tokio::task::JoinHandle;
use tonic::service::interceptor::InterceptedService;
use tonic::transport::server::TcpIncoming;
use tonic::transport::{Certificate, Identity, Server, ServerTlsConfig};
use tracing::{info, warn};

use crate::api::events::EventService;
use crate::api::intake::IntakeService;
use crate::api::pb;
use crate::api::registry::{Datasets, Models};
use crate::api::scoring::ScoringService;
use crate::auth::{Gate, GateLayer};
use crate::config::{Config, TlsConfig};
use crate::metrics::http::{self, HttpState, Ownership};
use crate::metrics::Metrics;
use crate::monitor::{Monitor, Replica};
use crate::shutdown::ShutdownSignal;
use crate::store::{self, Store, StoreError};

/// A running server; dropping it does not stop it: call `stop`.
pub struct Running {
    pub grpc_addr: SocketAddr,
    pub metrics_addr: SocketAddr,
    pub monitor: Arc<Monitor>,
    signal: ShutdownSignal,
    grpc: JoinHandle<Result<(), tonic::transport::Error>>,
    http: JoinHandle<std::io::Result<()>>,
    store: Store,
    refresher: Option<JoinHandle<()>>,
}

impl Running {
    /// Stops accepting work, lets in-flight RPCs finish, closes the store.
    pub async fn stop(self) -> Result<(), String> {
        self.signal.fire();
        let grpc = self.grpc.await.map_err(|e| e.to_string())?;
        let http = self.http.await.map_err(|e| e.to_string())?;
        if let Some(r) = self.refresher {
            r.await.map_err(|e| e.to_string())?;
        }
        self.monitor.leases_released().await;
        self.store.close().await;
        grpc.map_err(|e| e.to_string())?;
        http.map_err(|e| e.to_string())?;
        info!("stopped");
        Ok(())
    }

    pub fn signal(&self) -> ShutdownSignal {
        self.signal.clone()
    }
}

fn read_pem(what: &str, path: &std::path::Path) -> Result<Vec<u8>, String> {
    std::fs::read(path).map_err(|e| format!("tls {what} {}: {e}", path.display()))
}

fn tls_settings(tls: &TlsConfig) -> Result<ServerTlsConfig, String> {
    let identity = Identity::from_pem(read_pem("cert", &tls.cert)?, read_pem("key", &tls.key)?);
    let mut settings = ServerTlsConfig::new().identity(identity);
    if let Some(ca) = &tls.client_ca {
        settings = settings.client_ca_root(Certificate::from_pem(read_pem("client_ca", ca)?));
    }
    Ok(settings)
}

fn gated<S>(gate: &Arc<Gate>, svc: S) -> InterceptedService<S, GateLayer> {
    InterceptedService::new(svc, GateLayer(Arc::clone(gate)))
}

/// The gate for this configuration: tokens from the store, or open.
async fn gate(config: &Config, store: &Store) -> Result<Arc<Gate>, String> {
    if !config.tokens_required() {
        if !config.listen.ip().is_loopback() {
            warn!(listen = %config.listen, "tokens are turned off on a non-loopback address: any client that can reach it may read and write every dataset");
        }
        return Ok(Gate::open());
    }
    let gate = Gate::enforcing(store)
        .await
        .map_err(|e| format!("loading access tokens: {e}"))?;
    Ok(gate)
}

/// Why a server did not start.
#[derive(Debug, thiserror::Error)]
pub enum StartError {
    /// Another server holds the data directory.
    #[error("{0}")]
    DataDirInUse(String),
    #[error("{0}")]
    Other(String),
}

impl From<String> for StartError {
    fn from(e: String) -> Self {
        StartError::Other(e)
    }
}

/// Opens the store, rebuilds state and starts both listeners.
pub async fn start(config: &Config) -> Result<Running, StartError> {
    let store = store::open(&config.store_config())
        .await
        .map_err(|e| match e {
            StoreError::InUse(why) => StartError::DataDirInUse(why),
            e => format!("{}: {e}", config.store.display()).into(),
        })?;
    let gate = gate(config, &store).await?;
    let metrics = Metrics::new();
    let ready = Arc::new(AtomicBool::new(false));
    let ownership = Arc::new(Ownership::default());
    // The status page reads through the monitor once it is restored.
    let page_monitor = Arc::new(OnceLock::new());
    let signal = ShutdownSignal::new();

    let grpc_listener = TcpListener::bind(config.listen)
        .await
        .map_err(|e| format!("listen {}: {e}", config.listen))?;
    let http_listener = TcpListener::bind(config.metrics_listen)
        .await
        .map_err(|e| format!("metrics listen {}: {e}", config.metrics_listen))?;
    let grpc_addr = grpc_listener.local_addr().map_err(|e| e.to_string())?;
    let metrics_addr = http_listener.local_addr().map_err(|e| e.to_string())?;

    // Probes answer while the monitor rebuilds; /readyz turns ready after.
    let http = tokio::spawn(http::serve(
        http_listener,
        HttpState {
            metrics: Arc::clone(&metrics),
            ready: Arc::clone(&ready),
            ownership: Arc::clone(&ownership),
            gate: config.metrics_require_token.then(|| Arc::clone(&gate)),
            monitor: Arc::clone(&page_monitor),
        },
        signal.subscribe(),
    ));

    let replica = Replica::new(
        config.replica_name.as_deref(),
        std::time::Duration::from_secs(config.lease_seconds),
        ownership,
    );
    let monitor = Monitor::open(
        store.clone(),
        Arc::clone(&metrics),
        ready,
        signal.clone(),
        replica,
        config.limits.max_fit_units,
        config.limits.max_blend_models,
    )
    .await
    .map_err(|e| format!("restoring state: {e}"))?;
    let _ = page_monitor.set(Arc::clone(&monitor));
    monitor.start_schedulers();

    let (health, health_service) = tonic_health::server::health_reporter();
    health
        .set_service_status("", tonic_health::ServingStatus::Serving)
        .await;
    health
        .set_serving::<pb::dataset_registry_server::DatasetRegistryServer<Datasets>>()
        .await;
    health
        .set_serving::<pb::intake_server::IntakeServer<IntakeService>>()
        .await;
    health
        .set_serving::<pb::scoring_server::ScoringServer<ScoringService>>()
        .await;
    // Reflection in both versions of the protocol: v1, and v1alpha, which
    // many gRPC tools still speak.
    let reflection_builder = || {
        tonic_reflection::server::Builder::configure()
            .register_encoded_file_descriptor_set(pb::FILE_DESCRIPTOR_SET)
            .register_encoded_file_descriptor_set(tonic_health::pb::FILE_DESCRIPTOR_SET)
    };
    let reflection = reflection_builder().build_v1().map_err(|e| e.to_string())?;
    let reflection_v1alpha = reflection_builder()
        .build_v1alpha()
        .map_err(|e| e.to_string())?;

    // Limits: message sizes on every service, streams per connection, and
    // the intake and registry checks (src/limits.rs). Every plumbline service
    // passes the gate; health and reflection do not, so probes and tooling
    // work without a token.
    let (m, l) = (&monitor, &config.limits);
    let (max_in, max_out) = (l.max_request_bytes, l.max_response_bytes);
    let mut builder = Server::builder().max_concurrent_streams(l.max_concurrent_streams);
    if let Some(tls) = &config.tls {
        builder = builder
            .tls_config(tls_settings(tls)?)
            .map_err(|e| format!("tls: {e}"))?;
    }
    let router = builder
        .add_service(health_service)
        .add_service(reflection)
        .add_service(reflection_v1alpha)
        .add_service(gated(
            &gate,
            pb::dataset_registry_server::DatasetRegistryServer::new(Datasets {
                monitor: Arc::clone(m),
                limits: l.clone(),
            })
            .max_decoding_message_size(max_in)
            .max_encoding_message_size(max_out),
        ))
        .add_service(gated(
            &gate,
            pb::model_registry_server::ModelRegistryServer::new(Models {
                monitor: Arc::clone(m),
                limits: l.clone(),
            })
            .max_decoding_message_size(max_in)
            .max_encoding_message_size(max_out),
        ))
        .add_service(gated(
            &gate,
            pb::intake_server::IntakeServer::new(IntakeService {
                monitor: Arc::clone(m),
                limits: l.clone(),
            })
            .max_decoding_message_size(max_in)
            .max_encoding_message_size(max_out),
        ))
        .add_service(gated(
            &gate,
            pb::scoring_server::ScoringServer::new(ScoringService {
                monitor: Arc::clone(m),
            })
            .max_decoding_message_size(max_in)
            .max_encoding_message_size(max_out),
        ))
        .add_service(gated(
            &gate,
            pb::event_feed_server::EventFeedServer::new(EventService {
                monitor: Arc::clone(m),
            })
            .max_decoding_message_size(max_in)
            .max_encoding_message_size(max_out),
        ));
    let refresher = gate.spawn_refresher(store.clone(), signal.subscribe());
    let mut grpc_shutdown = signal.subscribe();
    let grpc = tokio::spawn(
        // TCP_NODELAY: a small reply (a scoreboard, a receipt) goes out at
        // once instead of waiting up to 40 ms for the client's delayed ACK.
        router.serve_with_incoming_shutdown(
            TcpIncoming::from(grpc_listener).with_nodelay(Some(true)),
            async move { grpc_shutdown.recv().await },
        ),
    );
    info!(tls = config.tls.is_some(), tokens = gate.enabled(), grpc = %grpc_addr, metrics = %http::describe(metrics_addr), store = %config.store.display(), replica = monitor.holder(), "serving");
    Ok(Running {
        grpc_addr,
        metrics_addr,
        monitor,
        signal,
        grpc,
        http,
        store,
        refresher,
    })
}
