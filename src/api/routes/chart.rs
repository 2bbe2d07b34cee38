//! POST /v1/chart: an SVG picture of the law of the count around a threshold, for dashboards to embed. The
//! probabilities come from the engine (exact pmf for the bars, the chosen approximations for the lines); the
//! drawing is `crate::chart`. Validation and limits are those of POST /v1/tail.

use crate::api::cancel::off_executor;
use crate::api::extract::Body;
use crate::api::problem::Problem;
use crate::api::routes::tail::{work_of, MAX_POISSON_THRESHOLD};
use crate::api::types::ChartRequest;
use crate::api::AppState;
use crate::chart::{self, Chart, Overlay};
use crate::config::ServiceLimits;
use crate::engine::{self, MethodId, Prepared, Side};
use crate::portfolio::{validate::build_model, Violation};
use axum::extract::State;
use axum::http::{header, HeaderValue};
use axum::response::{IntoResponse, Response};

pub const DEFAULT_WIDTH: u32 = 760;
pub const DEFAULT_HEIGHT: u32 = 420;
const WIDTH_RANGE: (u32, u32) = (240, 4000);
const HEIGHT_RANGE: (u32, u32) = (160, 3000);

/// The pmf as bars with the tail shaded, the threshold marked and approximations overlaid, as SVG.
#[utoipa::path(
    post, path = "/v1/chart", tag = "probabilities",
    request_body = ChartRequest,
    responses(
        (status = 200, description = "An SVG image (deterministic for a given request)", body = String, content_type = "image/svg+xml"),
        (status = 400, description = "Malformed JSON", body = Problem, content_type = "application/problem+json"),
        (status = 408, description = "Not answered within the request timeout", body = Problem, content_type = "application/problem+json"),
        (status = 413, description = "Body or work over the configured limits", body = Problem, content_type = "application/problem+json"),
        (status = 415, description = "Not JSON", body = Problem, content_type = "application/problem+json"),
        (status = 422, description = "Invalid field, with its JSON pointer", body = Problem, content_type = "application/problem+json"),
        (status = 503, description = "All computing slots busy and the queue full (see Retry-After)", body = Problem, content_type = "application/problem+json"),
    )
)]
pub async fn chart(State(state): State<AppState>, Body(req): Body<ChartRequest>) -> Result<Response, Problem> {
    let limits = state.limits.clone();
    let svg = off_executor(move |_| compute(&req, &limits)).await?;
    let mut res = svg.into_response();
    res.headers_mut().insert(header::CONTENT_TYPE, HeaderValue::from_static("image/svg+xml"));
    Ok(res)
}

/// Validate, compute the probabilities and render; synchronous and free of HTTP.
pub fn compute(req: &ChartRequest, limits: &ServiceLimits) -> Result<String, Problem> {
    let mut errs = Vec::new();
    let mut overlays: Vec<MethodId> = Vec::new();
    for (i, m) in req.methods.iter().enumerate() {
        match m {
            MethodId::Exact => errs.push(Violation::new(format!("/methods/{i}"), "exact is always drawn, as the bars")),
            MethodId::Auto => errs.push(Violation::new(
                format!("/methods/{i}"),
                "auto picks a method per threshold, so it has no single curve; name the method",
            )),
            m if !overlays.contains(m) => overlays.push(*m),
            _ => {}
        }
    }
    let mut size = |v: Option<u32>, default: u32, (lo, hi): (u32, u32), field: &str| -> u32 {
        let v = v.unwrap_or(default);
        if !(lo..=hi).contains(&v) {
            errs.push(Violation::new(field, format!("must be between {lo} and {hi} pixels, got {v}")));
        }
        v
    };
    let width = size(req.width, DEFAULT_WIDTH, WIDTH_RANGE, "/width");
    let height = size(req.height, DEFAULT_HEIGHT, HEIGHT_RANGE, "/height");
    let model = match build_model(&req.portfolio, "/portfolio", &limits.portfolio) {
        Ok(m) if errs.is_empty() => m,
        Ok(_) => return Err(Problem::invalid(errs)),
        Err(mut v) => {
            errs.append(&mut v);
            return Err(Problem::invalid(errs));
        }
    };
    if model.poisson > 0.0 && req.threshold > MAX_POISSON_THRESHOLD {
        return Err(Problem::invalid(vec![Violation::new(
            "/threshold",
            format!(
                "{} exceeds {MAX_POISSON_THRESHOLD}, the largest threshold served with a Poisson part",
                req.threshold
            ),
        )]));
    }
    let prep = Prepared::new(&model);
    let m = &prep.moments;
    let (counts, stride) =
        chart::plot_counts(m.mean, m.sd(), model.support_min(), model.support_max(), req.threshold, req.side);
    // One exact batch for the bars plus the title's tail, one batch per overlay.
    let work = work_of(&model, counts.len() * (1 + overlays.len()) + 1);
    if work > limits.max_work {
        return Err(Problem::too_large(format!(
            "exposures x plotted counts = {work:.0} exceeds the work budget {} (see --max-work)",
            limits.max_work
        )));
    }
    let mut queries: Vec<(u64, Side)> = counts.iter().map(|&k| (k, Side::Point)).collect();
    queries.push((req.threshold, req.side));
    let ln_of = |e: &engine::Estimate| (e.ln_probability.is_finite()).then_some(e.ln_probability);
    let exact = engine::run(MethodId::Exact, &prep, &queries, None);
    let exact_ln: Vec<Option<f64>> = exact[..counts.len()].iter().map(ln_of).collect();
    let tail_ln = ln_of(&exact[counts.len()]);
    let points = &queries[..counts.len()];
    let lines: Vec<(MethodId, Vec<Option<f64>>)> =
        overlays.iter().map(|&id| (id, engine::run(id, &prep, points, None).iter().map(ln_of).collect())).collect();
    let picture = Chart {
        counts: &counts,
        stride,
        exact_ln: &exact_ln,
        overlays: lines.iter().map(|(id, ln)| Overlay { method: *id, ln }).collect(),
        threshold: req.threshold,
        side: req.side,
        tail_ln,
        exposures: model.exposures,
        mean: m.mean,
        sd: m.sd(),
        log_scale: req.log_scale,
        width,
        height,
    };
    Ok(chart::render(&picture))
}
