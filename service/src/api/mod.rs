//! The HTTP API: loop status for people and scripts. One error type maps every failure
//! to a status code and a JSON body.

use std::sync::Arc;

use axum::extract::{Path, State};
use axum::http::StatusCode;
use axum::response::{IntoResponse, Response};
use axum::routing::get;
use axum::{Json, Router};
use tokio::sync::watch;

use crate::supervisor::status::LoopStatus;

/// The latest status of every loop, in config order.
pub type Statuses = Arc<Vec<watch::Receiver<LoopStatus>>>;

/// Every error the API answers with: `{"error": {"code", "message"}}`.
#[derive(Debug, thiserror::Error)]
pub enum ApiError {
    #[error("there is no loop `{0}`")]
    UnknownLoop(String),
    #[error("there is no route {0}")]
    UnknownRoute(String),
}

impl ApiError {
    fn status(&self) -> (StatusCode, &'static str) {
        match self {
            ApiError::UnknownLoop(_) => (StatusCode::NOT_FOUND, "unknown_loop"),
            ApiError::UnknownRoute(_) => (StatusCode::NOT_FOUND, "unknown_route"),
        }
    }
}

impl IntoResponse for ApiError {
    fn into_response(self) -> Response {
        let (status, code) = self.status();
        let body = serde_json::json!({"error": {"code": code, "message": self.to_string()}});
        (status, Json(body)).into_response()
    }
}

pub fn router(statuses: Statuses) -> Router {
    Router::new()
        .route("/healthz", get(|| async { "ok\n" }))
        .route("/api/v1/loops", get(loops))
        .route("/api/v1/loops/{loop}", get(one_loop))
        .fallback(|uri: axum::http::Uri| async move { ApiError::UnknownRoute(uri.path().to_owned()) })
        .with_state(statuses)
}

async fn loops(State(statuses): State<Statuses>) -> Json<Vec<LoopStatus>> {
    Json(statuses.iter().map(|s| s.borrow().clone()).collect())
}

async fn one_loop(
    State(statuses): State<Statuses>,
    Path(name): Path<String>,
) -> Result<Json<LoopStatus>, ApiError> {
    statuses
        .iter()
        .map(|s| s.borrow().clone())
        .find(|s| s.name == name)
        .map(Json)
        .ok_or(ApiError::UnknownLoop(name))
}
