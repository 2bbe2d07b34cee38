//! Liveness and readiness probes.

use axum::Json;
use serde_json::{json, Value};

/// The process is alive.
#[utoipa::path(get, path = "/healthz", tag = "operations", responses((status = 200, description = "alive")))]
pub async fn healthz() -> Json<Value> {
    Json(json!({"status": "ok"}))
}

/// The service is ready to take requests.
#[utoipa::path(get, path = "/readyz", tag = "operations", responses((status = 200, description = "ready")))]
pub async fn readyz() -> Json<Value> {
    Json(json!({"status": "ready"}))
}
