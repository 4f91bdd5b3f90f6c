//! The second listener: `/metrics`, `/healthz` (the process is up),
//! `/readyz` (start-up finished: stores open, caches and fits rebuilt; its
//! body names this server and the datasets it owns), and the status page
//! (`/`, `/datasets/<name>`, with `/sign-in` and `/sign-out`; see
//! [`crate::page`]).

use std::net::SocketAddr;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, OnceLock};

use axum::extract::State;
use axum::http::{header, HeaderMap, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::routing::{get, post};
use axum::Router;

use super::Metrics;
use crate::auth::Gate;
use crate::monitor::Monitor;
use crate::page::handlers as page;
use crate::shutdown::Shutdown;

#[derive(Clone)]
pub struct HttpState {
    pub metrics: Arc<Metrics>,
    pub ready: Arc<AtomicBool>,
    /// This server's name and the datasets whose lease it holds.
    pub ownership: Arc<Ownership>,
    /// When set, `/metrics` and the status page need a token with `admin`
    /// or `read:*` (both show every dataset; see [`admit`]). Probes stay
    /// open.
    pub gate: Option<Arc<Gate>>,
    /// The monitor, once start-up has restored it; the status page reads
    /// boards, history and events through it (and says "starting" before).
    pub monitor: Arc<OnceLock<Arc<Monitor>>>,
}

/// The cookie the status page's sign-in form keeps a token in (HttpOnly,
/// SameSite=Strict), for browsers, which cannot easily send a header.
pub const TOKEN_COOKIE: &str = "plumbline_token";

/// How a request passed [`admit`].
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Admitted {
    /// No gate is configured.
    Open,
    /// By an `authorization: Bearer` header.
    Header,
    /// By the [`TOKEN_COOKIE`] cookie.
    Cookie,
}

/// Why [`admit`] refused a request: 401 (no token, or not a live one) or
/// 403 (a token that does not read every dataset), with the reason.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Refusal {
    pub code: StatusCode,
    pub message: String,
}

/// The token in the request's [`TOKEN_COOKIE`] cookie, if any.
pub fn cookie_token(headers: &HeaderMap) -> Option<String> {
    headers
        .get_all(header::COOKIE)
        .iter()
        .filter_map(|v| v.to_str().ok())
        .flat_map(|v| v.split(';'))
        .filter_map(|pair| pair.trim().split_once('='))
        .find(|(name, _)| *name == TOKEN_COOKIE)
        .map(|(_, value)| value.trim().trim_matches('"').to_string())
        .filter(|token| !token.is_empty())
}

/// The one token rule of the HTTP listener's gated paths (`/metrics` and
/// the status page), which show every dataset: with no gate configured
/// everything passes; otherwise the caller needs a live token with `admin`
/// or `read:*`, from an `authorization: Bearer` header or, failing that,
/// the [`TOKEN_COOKIE`] cookie. `what` names the path in the refusal.
pub fn admit(gate: Option<&Gate>, headers: &HeaderMap, what: &str) -> Result<Admitted, Refusal> {
    let Some(gate) = gate else {
        return Ok(Admitted::Open);
    };
    let header = headers
        .get(header::AUTHORIZATION)
        .and_then(|v| v.to_str().ok());
    let (identified, how) = match (header, cookie_token(headers)) {
        (None, Some(token)) => (gate.identify_token(&token), Admitted::Cookie),
        (header, _) => (gate.identify(header), Admitted::Header),
    };
    match identified {
        Err(status) => Err(Refusal {
            code: StatusCode::UNAUTHORIZED,
            message: status.message().to_string(),
        }),
        Ok(caller) if !caller.reads_everything() => Err(Refusal {
            code: StatusCode::FORBIDDEN,
            message: format!("authorization: {what} shows every dataset and needs admin or read:*"),
        }),
        Ok(_) => Ok(how),
    }
}

async fn metrics(State(s): State<HttpState>, headers: HeaderMap) -> Response {
    if let Err(r) = admit(s.gate.as_deref(), &headers, "/metrics") {
        return (
            r.code,
            [(header::WWW_AUTHENTICATE, "Bearer")],
            format!("{}\n", r.message),
        )
            .into_response();
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
        .route("/", get(page::index))
        .route("/datasets/{name}", get(page::dataset))
        .route("/sign-in", post(page::sign_in))
        .route("/sign-out", post(page::sign_out))
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

#[cfg(test)]
mod tests {
    use super::*;
    use axum::http::HeaderValue;

    #[test]
    fn the_token_cookie_is_found_among_others() {
        let mut h = HeaderMap::new();
        assert_eq!(cookie_token(&h), None);
        h.append(
            header::COOKIE,
            HeaderValue::from_static("theme=dark; other=1"),
        );
        assert_eq!(cookie_token(&h), None);
        h.append(
            header::COOKIE,
            HeaderValue::from_static("a=b; plumbline_token=\"plb_x_y\" ; c=d"),
        );
        assert_eq!(cookie_token(&h).as_deref(), Some("plb_x_y"));
        let mut empty = HeaderMap::new();
        empty.insert(header::COOKIE, HeaderValue::from_static("plumbline_token="));
        assert_eq!(cookie_token(&empty), None);
    }

    #[test]
    fn without_a_gate_everything_passes() {
        assert_eq!(
            admit(None, &HeaderMap::new(), "/metrics"),
            Ok(Admitted::Open)
        );
        let open = Gate::open();
        assert!(admit(Some(&open), &HeaderMap::new(), "/metrics").is_ok());
    }
}
