//! POST /v1/chart: an SVG picture of the law of the count around a threshold, for dashboards to embed. The
//! figures come from the chart question (`analytics::chart`); the drawing is `api::svg`.

use crate::analytics::chart::{Chart, ChartRequest};
use crate::api::extract::Body;
use crate::api::offload::answer;
use crate::api::problem::Problem;
use crate::api::responses::ComputingProblems;
use crate::api::svg;
use crate::api::{Admitted, AppState};
use axum::extract::State;
use axum::http::{header, HeaderValue};
use axum::response::{IntoResponse, Response};
use axum::Extension;

/// The pmf as bars with the tail shaded, the threshold marked and approximations overlaid, as SVG.
#[utoipa::path(
    post, path = "/v1/chart", tag = "probabilities",
    request_body(
        description = "The request as JSON, or as multipart/form-data with the exposures as a table (`TableUpload`)",
        content((ChartRequest = "application/json"), (crate::api::tables::TableUpload = "multipart/form-data"))
    ),
    responses(
        (status = 200, description = "An SVG image (deterministic for a given request)", body = String, content_type = "image/svg+xml"),
        ComputingProblems,
    )
)]
pub async fn chart(
    State(state): State<AppState>,
    admitted: Option<Extension<Admitted>>,
    Body(req): Body<ChartRequest>,
) -> Result<Response, Problem> {
    let data = answer::<Chart>(req, state.limits.clone(), admitted.map(|Extension(a)| a)).await?;
    let mut res = svg::render(&data).into_response();
    res.headers_mut().insert(header::CONTENT_TYPE, HeaderValue::from_static("image/svg+xml"));
    Ok(res)
}
