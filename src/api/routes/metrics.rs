//! GET /metrics: the Prometheus scrape endpoint (text exposition format 0.0.4).

use axum::http::{header, HeaderValue};
use axum::response::{IntoResponse, Response};

/// The content type Prometheus expects for the text format.
pub const CONTENT_TYPE: &str = "text/plain; version=0.0.4; charset=utf-8";

/// Request counts, latency histograms, requests in flight, problems by type and exposures processed.
#[utoipa::path(
    get, path = "/metrics", tag = "operations",
    responses((status = 200, description = "Prometheus text exposition format 0.0.4", body = String,
               content_type = "text/plain; version=0.0.4; charset=utf-8"))
)]
pub async fn metrics() -> Response {
    let mut res = crate::telemetry::metrics::render().into_response();
    res.headers_mut().insert(header::CONTENT_TYPE, HeaderValue::from_static(CONTENT_TYPE));
    res
}
