//! Starting and stopping the service: the store, the monitor, the gRPC
//! server (with standard health and reflection) and the metrics listener.

use std::net::SocketAddr;
use std::sync::atomic::AtomicBool;
use std::sync::Arc;

use tokio::net::TcpListener;
use tokio::task::JoinHandle;
use tokio_stream::wrappers::TcpListenerStream;
use tonic::transport::Server;
use tracing::info;

use crate::api::events::EventService;
use crate::api::intake::IntakeService;
use crate::api::pb;
use crate::api::registry::{Datasets, Models};
use crate::api::scoring::ScoringService;
use crate::config::Config;
use crate::metrics::http::{self, HttpState};
use crate::metrics::Metrics;
use crate::monitor::Monitor;
use crate::shutdown::ShutdownSignal;
use crate::store::Store;

/// A running server; dropping it does not stop it: call `stop`.
pub struct Running {
    pub grpc_addr: SocketAddr,
    pub metrics_addr: SocketAddr,
    pub monitor: Arc<Monitor>,
    signal: ShutdownSignal,
    grpc: JoinHandle<Result<(), tonic::transport::Error>>,
    http: JoinHandle<std::io::Result<()>>,
    store: Store,
}

impl Running {
    /// Stops accepting work, lets in-flight RPCs finish, closes the store.
    pub async fn stop(self) -> Result<(), String> {
        self.signal.fire();
        let grpc = self.grpc.await.map_err(|e| e.to_string())?;
        let http = self.http.await.map_err(|e| e.to_string())?;
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

/// Opens the store, rebuilds state and starts both listeners.
pub async fn start(config: &Config) -> Result<Running, String> {
    std::fs::create_dir_all(&config.data_dir)
        .map_err(|e| format!("{}: {e}", config.data_dir.display()))?;
    let store = Store::open(&config.database_path(), config.durability)
        .await
        .map_err(|e| format!("{}: {e}", config.database_path().display()))?;
    let metrics = Metrics::new();
    let ready = Arc::new(AtomicBool::new(false));
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
        },
        signal.subscribe(),
    ));

    let monitor = Monitor::open(store.clone(), Arc::clone(&metrics), ready, signal.clone())
        .await
        .map_err(|e| format!("restoring state: {e}"))?;
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
    let reflection = tonic_reflection::server::Builder::configure()
        .register_encoded_file_descriptor_set(pb::FILE_DESCRIPTOR_SET)
        .register_encoded_file_descriptor_set(tonic_health::pb::FILE_DESCRIPTOR_SET)
        .build_v1()
        .map_err(|e| e.to_string())?;

    // Limits: message sizes on every service, streams per connection, and
    // the intake and registry checks (src/limits.rs).
    let (m, l) = (&monitor, &config.limits);
    let (max_in, max_out) = (l.max_request_bytes, l.max_response_bytes);
    let router = Server::builder()
        .max_concurrent_streams(l.max_concurrent_streams)
        .add_service(health_service)
        .add_service(reflection)
        .add_service(
            pb::dataset_registry_server::DatasetRegistryServer::new(Datasets {
                monitor: Arc::clone(m),
                limits: l.clone(),
            })
            .max_decoding_message_size(max_in)
            .max_encoding_message_size(max_out),
        )
        .add_service(
            pb::model_registry_server::ModelRegistryServer::new(Models {
                monitor: Arc::clone(m),
                limits: l.clone(),
            })
            .max_decoding_message_size(max_in)
            .max_encoding_message_size(max_out),
        )
        .add_service(
            pb::intake_server::IntakeServer::new(IntakeService {
                monitor: Arc::clone(m),
                limits: l.clone(),
            })
            .max_decoding_message_size(max_in)
            .max_encoding_message_size(max_out),
        )
        .add_service(
            pb::scoring_server::ScoringServer::new(ScoringService {
                monitor: Arc::clone(m),
            })
            .max_decoding_message_size(max_in)
            .max_encoding_message_size(max_out),
        )
        .add_service(
            pb::event_feed_server::EventFeedServer::new(EventService {
                monitor: Arc::clone(m),
            })
            .max_decoding_message_size(max_in)
            .max_encoding_message_size(max_out),
        );
    let mut grpc_shutdown = signal.subscribe();
    let grpc = tokio::spawn(
        router.serve_with_incoming_shutdown(TcpListenerStream::new(grpc_listener), async move {
            grpc_shutdown.recv().await
        }),
    );
    info!(grpc = %grpc_addr, metrics = %http::describe(metrics_addr), data = %config.database_path().display(), "serving");
    Ok(Running {
        grpc_addr,
        metrics_addr,
        monitor,
        signal,
        grpc,
        http,
        store,
    })
}
