//! Serving the API: plain HTTP or HTTPS (rustls), with the limits that keep a slow or
//! flooding client from pinning it: hyper's header read timeout, tower's request
//! timeout and cap on requests in flight, tower-http's request body timeout.

use std::net::SocketAddr;
use std::time::Duration;

use anyhow::Context;
use axum::Router;
use axum::error_handling::HandleErrorLayer;
use axum_server::tls_rustls::RustlsConfig;
use tokio_util::sync::CancellationToken;
use tower::ServiceBuilder;
use tower::limit::GlobalConcurrencyLimitLayer;

use super::ApiError;
use crate::config;

/// A request's headers must arrive within this; then the connection is closed.
pub const HEADER_TIMEOUT: Duration = Duration::from_secs(10);
/// A request body must arrive within this.
pub const BODY_TIMEOUT: Duration = Duration::from_secs(10);
/// A request must be answered (its headers sent) within this; a long CSV download
/// streams on after it.
pub const REQUEST_TIMEOUT: Duration = Duration::from_secs(30);
/// Requests in flight at once; more are answered 503 at once rather than queued.
pub const MAX_IN_FLIGHT: usize = 256;

/// The API's certificate and key, read and checked before anything starts.
#[derive(Clone)]
pub struct Tls(RustlsConfig);

impl Tls {
    pub async fn load(files: &config::Tls) -> anyhow::Result<Tls> {
        let config = RustlsConfig::from_pem_file(&files.cert, &files.key).await.with_context(|| {
            format!(
                "cannot serve HTTPS with tls_cert {} and tls_key {}",
                files.cert.display(),
                files.key.display()
            )
        })?;
        Ok(Tls(config))
    }
}

/// The router with the request limits around every route.
pub fn limited(router: Router) -> Router {
    router.layer(
        ServiceBuilder::new()
            .layer(HandleErrorLayer::new(|e: tower::BoxError| async move { refused(&e) }))
            .load_shed()
            // Global: the router applies layers route by route, and the cap is for them all.
            .layer(GlobalConcurrencyLimitLayer::new(MAX_IN_FLIGHT))
            .timeout(REQUEST_TIMEOUT)
            .layer(tower_http::timeout::RequestBodyTimeoutLayer::new(BODY_TIMEOUT)),
    )
}

fn refused(e: &tower::BoxError) -> ApiError {
    if e.is::<tower::load_shed::error::Overloaded>() {
        ApiError::Busy(format!("more than {MAX_IN_FLIGHT} requests in flight; try again"))
    } else if e.is::<tower::timeout::error::Elapsed>() {
        ApiError::Timeout(format!("no answer within {REQUEST_TIMEOUT:?}"))
    } else {
        ApiError::Internal(e.to_string())
    }
}

/// Serves `router` on `listener` until `stop`, then lets requests in flight finish for
/// up to `drain`.
pub async fn serve(
    listener: tokio::net::TcpListener,
    router: Router,
    tls: Option<Tls>,
    stop: CancellationToken,
    drain: Duration,
) -> std::io::Result<()> {
    let handle = axum_server::Handle::<SocketAddr>::new();
    let stopping = handle.clone();
    tokio::spawn(async move {
        stop.cancelled().await;
        stopping.graceful_shutdown(Some(drain));
    });
    let listener = listener.into_std()?;
    let service = router.into_make_service();
    match tls {
        Some(Tls(config)) => {
            let mut server = axum_server::from_tcp_rustls(listener, config)?.handle(handle);
            limit_connections(server.http_builder());
            server.serve(service).await
        }
        None => {
            let mut server = axum_server::from_tcp(listener)?.handle(handle);
            limit_connections(server.http_builder());
            server.serve(service).await
        }
    }
}

fn limit_connections(builder: &mut hyper_util::server::conn::auto::Builder<hyper_util::rt::TokioExecutor>) {
    builder.http1().timer(hyper_util::rt::TokioTimer::new()).header_read_timeout(HEADER_TIMEOUT);
}

/// Why the API's tokens may be read on the wire, if they may: it listens beyond
/// loopback without TLS while operator or viewer tokens are configured.
pub fn cleartext_warning(listen: SocketAddr, tls: bool, tokens: usize) -> Option<String> {
    (!tls && tokens > 0 && !listen.ip().is_loopback()).then(|| {
        format!(
            "the API listens on {listen} without TLS while {tokens} access token(s) are configured: \
             tokens and changes travel in clear text; set [service] tls_cert and tls_key, or listen \
             on loopback behind a TLS proxy"
        )
    })
}

#[cfg(test)]
mod tests {
    use std::sync::Arc;
    use std::sync::atomic::{AtomicUsize, Ordering};

    use axum::http::StatusCode;
    use tokio::sync::Notify;
    use tower::ServiceExt;

    use super::*;

    #[test]
    fn tokens_in_clear_text_are_warned_about_only_beyond_loopback_without_tls() {
        let wide: SocketAddr = "0.0.0.0:8080".parse().unwrap();
        let lan: SocketAddr = "192.0.2.7:8080".parse().unwrap();
        let local: SocketAddr = "127.0.0.1:8080".parse().unwrap();
        let local6: SocketAddr = "[::1]:8080".parse().unwrap();
        assert!(cleartext_warning(wide, false, 1).unwrap().contains("0.0.0.0:8080 without TLS"));
        assert!(cleartext_warning(lan, false, 2).is_some());
        assert_eq!(cleartext_warning(lan, true, 2), None);
        assert_eq!(cleartext_warning(lan, false, 0), None);
        assert_eq!(cleartext_warning(local, false, 3), None);
        assert_eq!(cleartext_warning(local6, false, 3), None);
    }

    /// A router whose one route waits until `release` is notified, counting requests in it.
    fn waiting_router(inside: Arc<AtomicUsize>, release: Arc<Notify>) -> Router {
        limited(Router::new().route(
            "/wait",
            axum::routing::get(move || async move {
                inside.fetch_add(1, Ordering::SeqCst);
                release.notified().await;
                "done"
            }),
        ))
    }

    async fn call(router: &Router, path: &str) -> (StatusCode, serde_json::Value) {
        let request = axum::http::Request::get(path).body(axum::body::Body::empty()).unwrap();
        let response = router.clone().oneshot(request).await.unwrap();
        let status = response.status();
        let bytes = axum::body::to_bytes(response.into_body(), 1 << 16).await.unwrap();
        (status, serde_json::from_slice(&bytes).unwrap_or(serde_json::Value::Null))
    }

    #[tokio::test]
    async fn requests_beyond_the_cap_are_answered_busy_at_once_and_served_again_after() {
        let inside = Arc::new(AtomicUsize::new(0));
        let release = Arc::new(Notify::new());
        let router = waiting_router(inside.clone(), release.clone());
        let waiting: Vec<_> = (0..MAX_IN_FLIGHT)
            .map(|_| {
                let router = router.clone();
                tokio::spawn(async move { call(&router, "/wait").await.0 })
            })
            .collect();
        while inside.load(Ordering::SeqCst) < MAX_IN_FLIGHT {
            tokio::task::yield_now().await;
        }
        let (status, body) = call(&router, "/wait").await;
        assert_eq!(status, StatusCode::SERVICE_UNAVAILABLE);
        assert_eq!(body["error"]["code"], "busy");
        release.notify_waiters();
        for request in waiting {
            assert_eq!(request.await.unwrap(), StatusCode::OK);
        }
        let served = tokio::spawn({
            let router = router.clone();
            async move { call(&router, "/wait").await.0 }
        });
        while inside.load(Ordering::SeqCst) < MAX_IN_FLIGHT + 1 {
            tokio::task::yield_now().await;
        }
        release.notify_waiters();
        assert_eq!(served.await.unwrap(), StatusCode::OK);
    }

    #[tokio::test(start_paused = true)]
    async fn a_request_not_answered_in_time_is_a_408_in_the_apis_format() {
        let router = waiting_router(Arc::default(), Arc::new(Notify::new()));
        let (status, body) = call(&router, "/wait").await;
        assert_eq!(status, StatusCode::REQUEST_TIMEOUT);
        assert_eq!(body["error"]["code"], "timeout");
    }
}
