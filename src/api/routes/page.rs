//! GET /: the explorer, a self-contained page (HTML, CSS and script in one file, `assets/explorer.html`) that
//! calls this service's own API. Nothing is fetched from elsewhere, and the content security policy says so.

use axum::http::{header, HeaderValue};
use axum::response::{IntoResponse, Response};

const PAGE: &str = include_str!("../../../assets/explorer.html");

/// Only this origin's API may be called, and only the page's own inline script and style run.
const CSP: &str = "default-src 'none'; script-src 'unsafe-inline'; style-src 'unsafe-inline'; \
                   connect-src 'self'; img-src 'self' data:; form-action 'none'; base-uri 'none'; frame-ancestors 'none'";

/// The explorer page: enter a portfolio, see its law, tail, approximations and quantiles.
#[utoipa::path(
    get, path = "/", tag = "operations",
    responses((status = 200, description = "The explorer page (self-contained HTML)", body = String, content_type = "text/html"))
)]
pub async fn explorer() -> Response {
    let mut res = PAGE.into_response();
    let h = res.headers_mut();
    h.insert(header::CONTENT_TYPE, HeaderValue::from_static("text/html; charset=utf-8"));
    h.insert(header::CONTENT_SECURITY_POLICY, HeaderValue::from_static(CSP));
    h.insert(header::X_CONTENT_TYPE_OPTIONS, HeaderValue::from_static("nosniff"));
    res
}
