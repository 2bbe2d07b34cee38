//! GET /docs: interactive API documentation. One self-contained page (no script, style or font from
//! elsewhere, so it works without internet access) that reads /openapi.json and lists every operation with
//! its schemas and a form to try it.

use axum::http::{header, HeaderValue};
use axum::response::{IntoResponse, Response};

/// The page, committed beside this file.
pub const PAGE: &str = include_str!("docs.html");

/// Interactive documentation of this API, built from its OpenAPI document.
#[utoipa::path(
    get, path = "/docs", tag = "operations",
    responses((status = 200, description = "HTML page", body = String, content_type = "text/html; charset=utf-8"))
)]
pub async fn docs() -> Response {
    let mut res = PAGE.into_response();
    res.headers_mut().insert(header::CONTENT_TYPE, HeaderValue::from_static("text/html; charset=utf-8"));
    // The page's one script is inline; allow nothing from other origins.
    res.headers_mut().insert(
        header::CONTENT_SECURITY_POLICY,
        HeaderValue::from_static(
            "default-src 'none'; script-src 'unsafe-inline'; style-src 'unsafe-inline'; connect-src 'self'; img-src 'self' data:",
        ),
    );
    res
}
