//! The second listener: `/metrics`, `/healthz` (the process is up) and
//! `/readyz` (start-up finished: stores open, caches and fits rebuilt; its
//! body names this server and the datasets it owns).

use std::net::SocketAddr;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;

use axum::extract::State;
use axum::http::{header, HeaderMap, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::routing::get;
use axum::Router;

use super::Metrics;
use crate::auth::Gate;
use crate::shutdown::Shutdown;

#[derive(Clone)]
pub struct HttpState {
    pub metrics: Arc<Metrics>,
    pub ready: Arc<AtomicBool>,
    /// This server's name and the datasets whose lease it holds.
    pub ownership: Arc<Ownership>,
    /// When set, `/metrics` needs a bearer token with `admin` or `read:*`
    /// (the page shows every dataset). Probes stay open.
    pub gate: Option<Arc<Gate>>,
}

async fn metrics(State(s): State<HttpState>, headers: HeaderMap) -> Response {
    if let Some(gate) = &s.gate {
        let header = headers
            .get(header::AUTHORIZATION)
            .and_then(|v| v.to_str().ok());
        let refused = match gate.identify(header) {
            Err(status) => Some((StatusCode::UNAUTHORIZED, status.message().to_string())),
            Ok(caller) if !caller.reads_everything() => Some((
                StatusCode::FORBIDDEN,
                "authorization: /metrics shows every dataset and needs admin or read:*".into(),
            )),
            Ok(_) => None,
        };
        if let Some((code, message)) = refused {
            return (
                code,
                [(header::WWW_AUTHENTICATE, "Bearer")],
                format!("{message}\n"),
            )
                .into_response();
        }
    }
    (
        [(
            header::CONTENT_TYPE,
            "application/openmetrics-text; version=1.0.0; charset=utf-8",
        )],
        s.metrics.render(),
    )
        .into_response()
}

async fn healthz() -> impl IntoResponse {
    (StatusCode::OK, "ok\n")
}

/// Which datasets this server owns, as `/readyz` shows them; the monitor
/// keeps it current.
#[derive(Debug, Default)]
pub struct Ownership {
    holder: std::sync::RwLock<String>,
    owned: std::sync::RwLock<std::collections::BTreeSet<String>>,
}

impl Ownership {
    pub fn set_holder(&self, holder: &str) {
        *self.holder.write().unwrap_or_else(|e| e.into_inner()) = holder.into();
    }

    pub fn set(&self, dataset: &str, owned: bool) {
        let mut set = self.owned.write().unwrap_or_else(|e| e.into_inner());
        if owned {
            set.insert(dataset.into());
        } else {
            set.remove(dataset);
        }
    }

    fn describe(&self) -> String {
        let holder = self
            .holder
            .read()
            .unwrap_or_else(|e| e.into_inner())
            .clone();
        let owned = self.owned.read().unwrap_or_else(|e| e.into_inner());
        let names: Vec<&str> = owned.iter().map(String::as_str).collect();
        format!("replica: {holder}\nowns: {}\n", names.join(", "))
    }
}

async fn readyz(State(s): State<HttpState>) -> impl IntoResponse {
    if s.ready.load(Ordering::Acquire) {
        (StatusCode::OK, format!("ready\n{}", s.ownership.describe()))
    } else {
        (StatusCode::SERVICE_UNAVAILABLE, "starting\n".to_string())
    }
}

pub fn router(state: HttpState) -> Router {
    Router::new()
        .route("/metrics", get(metrics))
        .route("/healthz", get(healthz))
        .route("/readyz", get(readyz))
        .with_state(state)
}

/// Serves until `shutdown` fires.
pub async fn serve(
    listener: tokio::net::TcpListener,
    state: HttpState,
    mut shutdown: Shutdown,
) -> std::io::Result<()> {
    axum::serve(listener, router(state))
        .with_graceful_shutdown(async move { shutdown.recv().await })
        .await
}

pub fn describe(addr: SocketAddr) -> String {
    format!("http://{addr}/metrics")
}
