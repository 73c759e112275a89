//! The HTTP API: loop status and changes, history, metrics, health and the status page.
//! One error type maps every failure, the framework's own rejections included, to a
//! status code and `{"error": {"code", "message"}}`.

mod access;
mod handlers;
mod openapi;
mod page;
mod server;

use std::sync::Arc;

use axum::extract::{FromRequest, FromRequestParts, MatchedPath, Request, State};
use axum::http::StatusCode;
use axum::http::request::Parts;
use axum::middleware::{self, Next};
use axum::response::{IntoResponse, Response};
use axum::routing::{get, post, put};
use axum::{Json, Router};
use serde::de::DeserializeOwned;

use crate::history::History;
use crate::metrics::{Metrics, UNMATCHED_ROUTE};
use crate::supervisor::LoopHandle;
pub use access::{AccessList, Caller, new_token, token_sha256};
pub use server::{Tls, cleartext_warning, serve};

/// Everything the handlers need; cheap to clone.
#[derive(Clone)]
pub struct ApiState {
    pub loops: Arc<Vec<LoopHandle>>,
    pub history: Option<History>,
    pub metrics: Arc<Metrics>,
    pub access: Arc<AccessList>,
    /// What an operator should know about how the service is set up (tokens in clear
    /// text, say); shown by `/readyz` and the status page.
    pub warnings: Arc<Vec<String>>,
}

impl ApiState {
    fn find(&self, name: &str) -> Result<&LoopHandle, ApiError> {
        self.loops
            .iter()
            .find(|l| l.config.name == name)
            .ok_or_else(|| ApiError::NotFound(format!("there is no loop `{name}`")))
    }

    /// A loop and the index of one of its inputs.
    fn find_input(&self, name: &str, input: &str) -> Result<(&LoopHandle, usize), ApiError> {
        let handle = self.find(name)?;
        let index = handle
            .config
            .inputs
            .iter()
            .position(|i| i.name == input)
            .ok_or_else(|| ApiError::NotFound(format!("loop `{name}` has no input `{input}`")))?;
        Ok((handle, index))
    }

    /// The history store, for the routes that read it.
    fn history(&self) -> Result<&History, ApiError> {
        self.history.as_ref().ok_or_else(|| ApiError::Unavailable("no history is kept".into()))
    }
}

/// Every error the API answers with.
#[derive(Debug, thiserror::Error)]
pub enum ApiError {
    #[error("{0}")]
    BadRequest(String),
    #[error("{0}")]
    Unauthorized(String),
    #[error("{0}")]
    Forbidden(String),
    #[error("{0}")]
    NotFound(String),
    #[error("{0}")]
    MethodNotAllowed(String),
    #[error("{0}")]
    Conflict(String),
    #[error("{0}")]
    TooLarge(String),
    #[error("{0}")]
    Unprocessable(String),
    #[error("{0}")]
    Timeout(String),
    #[error("{0}")]
    Unavailable(String),
    /// More requests in flight than the API takes at once.
    #[error("{0}")]
    Busy(String),
    /// The cause is logged; the answer says nothing internal.
    #[error("internal error")]
    Internal(String),
}

impl ApiError {
    fn status_and_code(&self) -> (StatusCode, &'static str) {
        match self {
            ApiError::BadRequest(_) => (StatusCode::BAD_REQUEST, "bad_request"),
            ApiError::Unauthorized(_) => (StatusCode::UNAUTHORIZED, "unauthorized"),
            ApiError::Forbidden(_) => (StatusCode::FORBIDDEN, "forbidden"),
            ApiError::NotFound(_) => (StatusCode::NOT_FOUND, "not_found"),
            ApiError::MethodNotAllowed(_) => (StatusCode::METHOD_NOT_ALLOWED, "method_not_allowed"),
            ApiError::Conflict(_) => (StatusCode::CONFLICT, "conflict"),
            ApiError::TooLarge(_) => (StatusCode::PAYLOAD_TOO_LARGE, "too_large"),
            ApiError::Unprocessable(_) => (StatusCode::UNPROCESSABLE_ENTITY, "unprocessable"),
            ApiError::Timeout(_) => (StatusCode::REQUEST_TIMEOUT, "timeout"),
            ApiError::Unavailable(_) => (StatusCode::SERVICE_UNAVAILABLE, "not_ready"),
            ApiError::Busy(_) => (StatusCode::SERVICE_UNAVAILABLE, "busy"),
            ApiError::Internal(_) => (StatusCode::INTERNAL_SERVER_ERROR, "internal"),
        }
    }
}

impl IntoResponse for ApiError {
    fn into_response(self) -> Response {
        if let ApiError::Internal(cause) = &self {
            tracing::error!(error = %cause, "API request failed");
        }
        let (status, code) = self.status_and_code();
        let body = serde_json::json!({"error": {"code": code, "message": self.to_string()}});
        let mut response = (status, Json(body)).into_response();
        if status == StatusCode::UNAUTHORIZED {
            response.headers_mut().insert("www-authenticate", axum::http::HeaderValue::from_static("Bearer"));
        }
        response
    }
}

impl From<access::Denied> for ApiError {
    fn from(d: access::Denied) -> Self {
        match d {
            access::Denied::Unauthenticated(m) => ApiError::Unauthorized(m),
            access::Denied::Forbidden(m) => ApiError::Forbidden(m),
        }
    }
}

fn authorization(parts: &Parts) -> Option<&str> {
    parts.headers.get(axum::http::header::AUTHORIZATION).and_then(|v| v.to_str().ok())
}

/// A caller allowed to read (`None` when reads are open).
pub struct Reader(pub Option<Caller>);

impl FromRequestParts<ApiState> for Reader {
    type Rejection = ApiError;
    async fn from_request_parts(parts: &mut Parts, state: &ApiState) -> Result<Self, ApiError> {
        Ok(Reader(state.access.read(authorization(parts))?))
    }
}

/// A caller allowed to change loops: an operator.
pub struct Operator(pub Caller);

impl FromRequestParts<ApiState> for Operator {
    type Rejection = ApiError;
    async fn from_request_parts(parts: &mut Parts, state: &ApiState) -> Result<Self, ApiError> {
        Ok(Operator(state.access.write(authorization(parts))?))
    }
}

/// A JSON body; bad JSON, wrong types and unknown fields are a 400 in the API's format.
pub struct JsonBody<T>(pub T);

impl<T: DeserializeOwned, S: Send + Sync> FromRequest<S> for JsonBody<T> {
    type Rejection = ApiError;
    async fn from_request(req: Request, state: &S) -> Result<Self, ApiError> {
        let bytes = axum::body::Bytes::from_request(req, state).await.map_err(|e| match e.status() {
            StatusCode::PAYLOAD_TOO_LARGE => {
                ApiError::TooLarge(format!("the request body is too large: {e}"))
            }
            _ => ApiError::BadRequest(format!("cannot read the request body: {e}")),
        })?;
        serde_json::from_slice(&bytes)
            .map(JsonBody)
            .map_err(|e| ApiError::BadRequest(format!("the body is not valid: {e}")))
    }
}

/// Query parameters, with bad ones a 400 in the API's format.
pub struct QueryParams<T>(pub T);

impl<T: DeserializeOwned, S: Send + Sync> FromRequestParts<S> for QueryParams<T> {
    type Rejection = ApiError;
    async fn from_request_parts(parts: &mut Parts, _: &S) -> Result<Self, ApiError> {
        axum::extract::Query::<T>::try_from_uri(&parts.uri)
            .map(|q| QueryParams(q.0))
            .map_err(|e| ApiError::BadRequest(format!("the query string is not valid: {}", e.body_text())))
    }
}

/// Path parameters, with bad ones a 400 in the API's format.
pub struct PathParams<T>(pub T);

impl<T: DeserializeOwned + Send, S: Send + Sync> FromRequestParts<S> for PathParams<T> {
    type Rejection = ApiError;
    async fn from_request_parts(parts: &mut Parts, state: &S) -> Result<Self, ApiError> {
        axum::extract::Path::<T>::from_request_parts(parts, state)
            .await
            .map(|p| PathParams(p.0))
            .map_err(|e| ApiError::BadRequest(format!("the path is not valid: {}", e.body_text())))
    }
}

/// Route templates of the API, in the order of the interface contract. The OpenAPI
/// document and the router are both checked against this list.
pub const ROUTES: &[(&str, &str)] = &[
    ("GET", "/healthz"),
    ("GET", "/readyz"),
    ("GET", "/metrics"),
    ("GET", "/api/v1/openapi.json"),
    ("GET", "/api/v1/loops"),
    ("GET", "/api/v1/loops/{loop}"),
    ("PUT", "/api/v1/loops/{loop}/mode"),
    ("PUT", "/api/v1/loops/{loop}/inputs/{input}/bounds"),
    ("POST", "/api/v1/loops/{loop}/inputs/{input}/bump-test"),
    ("GET", "/api/v1/bump-tests/{id}"),
    ("GET", "/api/v1/loops/{loop}/samples"),
    ("GET", "/api/v1/loops/{loop}/trend"),
    ("GET", "/api/v1/events"),
    ("GET", "/"),
];

pub fn router(state: ApiState) -> Router {
    // Prometheus instrumentation practice: the request counter exists from the first scrape.
    for (_, route) in ROUTES {
        state.metrics.http_requests.with_label_values(&[route, "200"]);
    }
    state.metrics.http_requests.with_label_values(&[UNMATCHED_ROUTE, "404"]);
    let router = Router::new()
        .route("/healthz", get(handlers::healthz))
        .route("/readyz", get(handlers::readyz))
        .route("/metrics", get(handlers::metrics))
        .route("/api/v1/openapi.json", get(handlers::openapi))
        .route("/api/v1/loops", get(handlers::loops))
        .route("/api/v1/loops/{loop}", get(handlers::one_loop))
        .route("/api/v1/loops/{loop}/mode", put(handlers::set_mode))
        .route("/api/v1/loops/{loop}/inputs/{input}/bounds", put(handlers::set_bounds))
        .route("/api/v1/loops/{loop}/inputs/{input}/bump-test", post(handlers::bump_test))
        .route("/api/v1/bump-tests/{id}", get(handlers::bump_test_status))
        .route("/api/v1/loops/{loop}/samples", get(handlers::samples))
        .route("/api/v1/loops/{loop}/trend", get(handlers::trend))
        .route("/api/v1/events", get(handlers::events))
        .route("/", get(page::status_page))
        // Before the counting layer, so that a 405 is counted with its route like any answer.
        .method_not_allowed_fallback(not_allowed)
        .route_layer(middleware::from_fn_with_state(state.clone(), count_request))
        .fallback(unmatched)
        .with_state(state);
    server::limited(router)
}

/// Counts requests by route template (never the raw path) and status.
async fn count_request(State(state): State<ApiState>, request: Request, next: Next) -> Response {
    let route = request.extensions().get::<MatchedPath>().map(|m| m.as_str().to_owned());
    let response = next.run(request).await;
    let route = route.as_deref().unwrap_or(UNMATCHED_ROUTE);
    state.metrics.http_requests.with_label_values(&[route, response.status().as_str()]).inc();
    response
}

async fn not_allowed(method: axum::http::Method, uri: axum::http::Uri) -> ApiError {
    ApiError::MethodNotAllowed(format!("{} does not take {method}", uri.path()))
}

async fn unmatched(State(state): State<ApiState>, uri: axum::http::Uri) -> ApiError {
    state.metrics.http_requests.with_label_values(&[UNMATCHED_ROUTE, "404"]).inc();
    ApiError::NotFound(format!("there is no route {}", uri.path()))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[tokio::test]
    async fn every_listed_route_is_served_by_the_router_and_counted_from_the_start() {
        let text =
            std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/../config/demo.toml")).unwrap();
        let config = crate::config::parse(&text, "demo").unwrap();
        let metrics = Arc::new(Metrics::new(&config));
        let state = ApiState {
            loops: Arc::new(Vec::new()),
            history: None,
            metrics: metrics.clone(),
            access: Arc::new(AccessList::new(&[], true)),
            warnings: Arc::default(),
        };
        let app = router(state);
        let first_scrape = metrics.render();
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
        let address = listener.local_addr().unwrap();
        tokio::spawn(async move { axum::serve(listener, app).await });
        let client = reqwest::Client::new();
        for (method, route) in ROUTES {
            let counted = format!("ridgeline_http_requests_total{{route=\"{route}\",status=\"200\"}} 0");
            assert!(first_scrape.contains(&counted), "missing `{counted}` in:\n{first_scrape}");
            let path = route.replace("{loop}", "nowhere").replace("{input}", "x");
            let answer = client
                .request(method.parse().unwrap(), format!("http://{address}{path}"))
                .send()
                .await
                .unwrap();
            let status = answer.status();
            let body = answer.text().await.unwrap();
            // Any answer but the router's own: no route, or not that method.
            assert!(
                status != StatusCode::METHOD_NOT_ALLOWED && !body.contains("there is no route"),
                "{method} {route}: {status} {body}"
            );
        }
        // A method a route does not take is counted once, under the route's template.
        let answer = client.post(format!("http://{address}/api/v1/loops")).send().await.unwrap();
        assert_eq!(answer.status(), StatusCode::METHOD_NOT_ALLOWED);
        let counted = r#"ridgeline_http_requests_total{route="/api/v1/loops",status="405"} 1"#;
        assert!(metrics.render().contains(counted), "missing `{counted}`");
    }

    #[test]
    fn the_openapi_document_lists_every_route_of_the_router() {
        let doc = openapi::document();
        for (method, path) in ROUTES {
            let op = &doc["paths"][*path][method.to_lowercase()];
            assert!(op.is_object(), "{method} {path} is missing from the OpenAPI document");
        }
        assert_eq!(
            doc["paths"].as_object().unwrap().len(),
            ROUTES.iter().map(|r| r.1).collect::<std::collections::HashSet<_>>().len()
        );
    }
}
