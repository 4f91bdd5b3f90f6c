//! The status page's HTTP handlers: the gate (the rule of `/metrics`, by
//! header or cookie), the reads (`gather.rs`, bounded in time), the
//! drawing (`html.rs`), and the sign-in form that keeps a token in an
//! HttpOnly, SameSite=Strict cookie.

use std::time::Duration;

use axum::extract::{Path, State};
use axum::http::{header, HeaderMap, HeaderValue, StatusCode};
use axum::response::{IntoResponse, Response};
use tracing::warn;

use super::{gather, html, url_segment, Frame, REFRESH_SECONDS};
use crate::metrics::http::{admit, cookie_token, Admitted, HttpState, TOKEN_COOKIE};
use crate::monitor::{now_ms, MonitorError};

/// Nothing but the page itself: inline style, no script, no fetches, forms
/// to this server only, never framed.
const POLICY: &str = "default-src 'none'; style-src 'unsafe-inline'; img-src data:; \
                      form-action 'self'; frame-ancestors 'none'; base-uri 'none'";
/// How long the cookie keeps a token (a revoked token stops working at
/// once all the same: every request checks it).
const COOKIE_SECONDS: u32 = 30 * 24 * 3600;
/// The longest a page waits for its reads.
const READ_TIMEOUT: Duration = Duration::from_secs(10);

fn page(code: StatusCode, body: String) -> Response {
    (
        code,
        [
            (header::CONTENT_TYPE, "text/html; charset=utf-8"),
            (header::CACHE_CONTROL, "no-store"),
            (header::CONTENT_SECURITY_POLICY, POLICY),
            (header::X_CONTENT_TYPE_OPTIONS, "nosniff"),
            (header::X_FRAME_OPTIONS, "DENY"),
            (header::REFERRER_POLICY, "no-referrer"),
        ],
        body,
    )
        .into_response()
}

fn frame(signed_in: bool) -> Frame {
    Frame {
        drawn_at_ms: now_ms(),
        signed_in,
        refresh_seconds: REFRESH_SECONDS,
    }
}

/// The cookie header that keeps `token`, or that removes it (`None`).
fn cookie(token: Option<&str>, headers: &HeaderMap) -> Option<HeaderValue> {
    // Behind a proxy that ends TLS, the cookie may also demand TLS.
    let secure = headers
        .get("x-forwarded-proto")
        .and_then(|v| v.to_str().ok())
        .is_some_and(|p| p.eq_ignore_ascii_case("https"));
    let (value, age) = match token {
        Some(t) => (t, COOKIE_SECONDS),
        None => ("", 0),
    };
    HeaderValue::from_str(&format!(
        "{TOKEN_COOKIE}={value}; Path=/; HttpOnly; SameSite=Strict; Max-Age={age}{}",
        if secure { "; Secure" } else { "" }
    ))
    .ok()
}

/// The sign-in page with a status code and, when `problem` came from a
/// cookie that no longer works, the cookie removed.
fn refused(code: StatusCode, problem: &str, next: &str, headers: &HeaderMap) -> Response {
    let mut r = page(code, html::sign_in_page(problem, next, &frame(false)));
    r.headers_mut()
        .insert(header::WWW_AUTHENTICATE, HeaderValue::from_static("Bearer"));
    let stale = !headers.contains_key(header::AUTHORIZATION) && cookie_token(headers).is_some();
    if stale {
        if let Some(c) = cookie(None, headers) {
            r.headers_mut().insert(header::SET_COOKIE, c);
        }
    }
    r
}

/// The gate: the page's frame, or the sign-in page to answer with.
fn gate(s: &HttpState, headers: &HeaderMap, next: &str) -> Result<Frame, Box<Response>> {
    match admit(s.gate.as_deref(), headers, "the status page") {
        Ok(how) => Ok(frame(how == Admitted::Cookie)),
        Err(r) => {
            let offered =
                headers.contains_key(header::AUTHORIZATION) || cookie_token(headers).is_some();
            let problem = if offered { r.message.as_str() } else { "" };
            Err(Box::new(refused(r.code, problem, next, headers)))
        }
    }
}

fn message(code: StatusCode, title: &str, text: &str, f: &Frame) -> Response {
    page(code, html::message_page(title, text, f))
}

fn starting(f: &Frame) -> Response {
    message(
        StatusCode::SERVICE_UNAVAILABLE,
        "Starting",
        "The server is still restoring its datasets; this page reloads itself.",
        f,
    )
}

fn failed(e: &MonitorError, f: &Frame) -> Response {
    let code = match e {
        MonitorError::NotFound(_) => StatusCode::NOT_FOUND,
        _ => {
            warn!(error = %e, "the status page could not read its data");
            StatusCode::INTERNAL_SERVER_ERROR
        }
    };
    let title = if code == StatusCode::NOT_FOUND {
        "Not found"
    } else {
        "Could not read the data"
    };
    message(code, title, &e.to_string(), f)
}

fn slow(f: &Frame) -> Response {
    message(
        StatusCode::SERVICE_UNAVAILABLE,
        "The store is slow",
        "Reading this page's data took longer than 10 seconds; the page tries again when it reloads.",
        f,
    )
}

/// `GET /`: the datasets.
pub async fn index(State(s): State<HttpState>, headers: HeaderMap) -> Response {
    let f = match gate(&s, &headers, "/") {
        Ok(f) => f,
        Err(r) => return *r,
    };
    let Some(monitor) = s.monitor.get() else {
        return starting(&f);
    };
    match tokio::time::timeout(
        READ_TIMEOUT,
        gather::summaries(monitor, &s.metrics, f.drawn_at_ms),
    )
    .await
    {
        Ok(Ok(list)) => page(StatusCode::OK, html::index_page(&list, &f)),
        Ok(Err(e)) => failed(&e, &f),
        Err(_) => slow(&f),
    }
}

/// `GET /datasets/<name>`: one dataset.
pub async fn dataset(
    State(s): State<HttpState>,
    Path(name): Path<String>,
    headers: HeaderMap,
) -> Response {
    let f = match gate(&s, &headers, &format!("/datasets/{}", url_segment(&name))) {
        Ok(f) => f,
        Err(r) => return *r,
    };
    let Some(monitor) = s.monitor.get() else {
        return starting(&f);
    };
    match tokio::time::timeout(
        READ_TIMEOUT,
        gather::dataset(monitor, &s.metrics, &name, f.drawn_at_ms),
    )
    .await
    {
        Ok(Ok(view)) => page(StatusCode::OK, html::dataset_page(&view, &f)),
        Ok(Err(e)) => failed(&e, &f),
        Err(_) => slow(&f),
    }
}

/// Where to go after signing in: a path on this server, else `/`.
fn local_path(next: &str) -> String {
    let ok = next.starts_with('/')
        && !next.starts_with("//")
        && next.bytes().all(|b| b.is_ascii_graphic() && b != b'\\');
    if ok {
        next.to_string()
    } else {
        "/".to_string()
    }
}

fn see_other(to: &str, cookie: Option<HeaderValue>) -> Response {
    let mut r = StatusCode::SEE_OTHER.into_response();
    if let Ok(location) = HeaderValue::from_str(to) {
        r.headers_mut().insert(header::LOCATION, location);
    }
    r.headers_mut()
        .insert(header::CACHE_CONTROL, HeaderValue::from_static("no-store"));
    if let Some(c) = cookie {
        r.headers_mut().insert(header::SET_COOKIE, c);
    }
    r
}

/// `POST /sign-in` (the form's `token` and `next`): a token that passes
/// the rule goes into the cookie and the browser on to `next`; any other
/// gets the form again with the reason. Refused when the browser says the
/// form was posted from another site.
pub async fn sign_in(State(s): State<HttpState>, headers: HeaderMap, body: String) -> Response {
    let cross_site = headers
        .get("sec-fetch-site")
        .and_then(|v| v.to_str().ok())
        .is_some_and(|v| v.eq_ignore_ascii_case("cross-site"));
    if cross_site {
        return message(
            StatusCode::FORBIDDEN,
            "Refused",
            "A sign-in posted from another site is refused.",
            &frame(false),
        );
    }
    let (mut token, mut next) = (String::new(), String::from("/"));
    for (key, value) in form_urlencoded::parse(body.as_bytes()) {
        match key.as_ref() {
            "token" => token = value.trim().to_string(),
            "next" => next = value.into_owned(),
            _ => {}
        }
    }
    let next = local_path(&next);
    let Some(gate) = s.gate.as_deref() else {
        return see_other(&next, None);
    };
    match gate.identify_token(&token) {
        Err(status) => refused(StatusCode::UNAUTHORIZED, status.message(), &next, &HeaderMap::new()),
        Ok(caller) if !caller.reads_everything() => refused(
            StatusCode::FORBIDDEN,
            "authorization: this token does not read every dataset; the status page needs admin or read:*",
            &next,
            &HeaderMap::new(),
        ),
        // A live token has the shape plb_<hex>_<hex>: safe in a cookie.
        Ok(_) => match cookie(Some(&token), &headers) {
            Some(c) => see_other(&next, Some(c)),
            None => message(
                StatusCode::BAD_REQUEST,
                "Refused",
                "The token cannot be kept in a cookie.",
                &frame(false),
            ),
        },
    }
}

/// `POST /sign-out`: removes the cookie.
pub async fn sign_out(headers: HeaderMap) -> Response {
    see_other("/", cookie(None, &headers))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn only_local_paths_are_followed() {
        assert_eq!(local_path("/datasets/shop"), "/datasets/shop");
        for bad in [
            "//evil.example/",
            "https://evil.example/",
            "/\\evil",
            "/a b",
            "",
        ] {
            assert_eq!(local_path(bad), "/", "{bad}");
        }
    }

    #[test]
    fn the_cookie_is_httponly_strict_and_can_be_removed() {
        let headers = HeaderMap::new();
        let set = cookie(Some("plb_0123456789ab_cd"), &headers).expect("value");
        let set = set.to_str().expect("ascii");
        assert!(set.starts_with("plumbline_token=plb_0123456789ab_cd; Path=/;"));
        assert!(set.contains("HttpOnly") && set.contains("SameSite=Strict"));
        assert!(!set.contains("Secure"));
        let gone = cookie(None, &headers).expect("value");
        assert!(gone.to_str().expect("ascii").contains("Max-Age=0"));
        let mut proxied = HeaderMap::new();
        proxied.insert("x-forwarded-proto", HeaderValue::from_static("https"));
        let secure = cookie(Some("t"), &proxied).expect("value");
        assert!(secure.to_str().expect("ascii").ends_with("; Secure"));
    }
}
