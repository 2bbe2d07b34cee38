//! POST /v1/distribution: pmf, cdf and survival function (with their logarithms and bounds) over a count range,
//! given as `from`/`to` or as the central range holding all but `mass`. JSON by default; CSV when the client
//! sends `Accept: text/csv`.

use crate::analytics::distribution::{Distribution, DistributionRequest, DistributionResponse};
use crate::api::encode::Json;
use crate::api::extract::Body;
use crate::api::offload::answer;
use crate::api::problem::Problem;
use crate::api::responses::ComputingProblems;
use crate::api::{Admitted, AppState};
use axum::extract::State;
use axum::http::{header, HeaderMap, HeaderValue};
use axum::response::{IntoResponse, Response};
use axum::Extension;
use std::fmt::Write;

/// The count distribution over a range.
#[utoipa::path(
    post, path = "/v1/distribution", tag = "analytics",
    request_body(
        description = "The request as JSON, or as multipart/form-data with the exposures as a table (`TableUpload`)",
        content((DistributionRequest = "application/json"), (crate::api::tables::TableUpload = "multipart/form-data"))
    ),
    responses(
        (status = 200, description = "pmf, cdf and survival over the range (CSV with `Accept: text/csv`)",
            content((DistributionResponse = "application/json"), (String = "text/csv"))),
        ComputingProblems,
    )
)]
pub async fn distribution(
    State(state): State<AppState>,
    admitted: Option<Extension<Admitted>>,
    headers: HeaderMap,
    Body(req): Body<DistributionRequest>,
) -> Result<Response, Problem> {
    let csv = headers
        .get(header::ACCEPT)
        .and_then(|v| v.to_str().ok())
        .is_some_and(|a| a.split(',').any(|m| m.trim().starts_with("text/csv")));
    let out = answer::<Distribution>(req, state.limits.clone(), admitted.map(|Extension(a)| a)).await?;
    if csv {
        let mut res = to_csv(&out).into_response();
        res.headers_mut().insert(header::CONTENT_TYPE, HeaderValue::from_static("text/csv; charset=utf-8"));
        return Ok(res);
    }
    Ok(Json(out).into_response())
}

fn opt(x: Option<f64>) -> String {
    x.map(|v| format!("{v:e}")).unwrap_or_default()
}

/// Leading `# ` comment lines (the assumptions and cautions every answer carries; `comment="#"` in pandas,
/// skipped rows in a spreadsheet), then count,pmf,cdf,sf,ln_pmf,ln_cdf,ln_sf,pmf_error_bound; one row per
/// count (the stressed law under stress). `sf` is P(S > k). With loss units the first column is `total`, in
/// units, one row per lattice point (`step` apart; totals off the lattice have probability 0 and no row).
pub fn to_csv(d: &DistributionResponse) -> String {
    let mut s = String::new();
    for a in d.assumptions.iter() {
        let _ = writeln!(s, "# {}", a.replace(['\r', '\n'], " "));
    }
    s.push_str(if d.step.is_some() { "total" } else { "count" });
    s.push_str(",pmf,cdf,sf,ln_pmf,ln_cdf,ln_sf,pmf_error_bound\n");
    let step = d.step.unwrap_or(1);
    for i in 0..d.pmf.len() {
        let _ = writeln!(
            s,
            "{},{:e},{:e},{:e},{},{},{},{:e}",
            d.from + i as u64 * step,
            d.pmf[i],
            d.cdf[i],
            d.sf[i],
            opt(d.ln_pmf[i]),
            opt(d.ln_cdf[i]),
            opt(d.ln_sf[i]),
            d.pmf_error_bound[i]
        );
    }
    s
}
