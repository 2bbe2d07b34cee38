//! POST /v1/tail: tail, cumulative or point probabilities at a list of thresholds, one estimate per method.

use crate::api::extract::Body;
use crate::api::problem::Problem;
use crate::api::types::{EstimateOut, Summary, TailRequest, TailResponse, ThresholdResult, ASSUMPTIONS};
use crate::api::AppState;
use crate::config::ServiceLimits;
use crate::engine::{self, Prepared};
use crate::portfolio::{validate::build_model, Violation};
use axum::extract::State;
use axum::Json;

/// Probabilities P(S >= k), P(S <= k) or P(S = k) with error bounds.
#[utoipa::path(
    post, path = "/v1/tail", tag = "probabilities",
    request_body = TailRequest,
    responses(
        (status = 200, description = "One result per threshold, one estimate per method", body = TailResponse),
        (status = 400, description = "Malformed JSON", body = Problem, content_type = "application/problem+json"),
        (status = 413, description = "Body or work over the configured limits", body = Problem, content_type = "application/problem+json"),
        (status = 415, description = "Not JSON", body = Problem, content_type = "application/problem+json"),
        (status = 422, description = "Invalid field, with its JSON pointer", body = Problem, content_type = "application/problem+json"),
    )
)]
pub async fn tail(State(state): State<AppState>, Body(req): Body<TailRequest>) -> Result<Json<TailResponse>, Problem> {
    let limits = state.limits.clone();
    let out = tokio::task::spawn_blocking(move || compute(&req, &limits))
        .await
        .map_err(|e| Problem::internal(format!("computation failed: {e}")))??;
    Ok(Json(out))
}

/// Largest threshold for an unbounded (Poisson) portfolio: its tilted window then holds about 10^6 counts.
pub const MAX_POISSON_THRESHOLD: u64 = 1_000_000_000;

/// The whole computation, synchronous and free of HTTP (also used by the command line).
pub fn compute(req: &TailRequest, limits: &ServiceLimits) -> Result<TailResponse, Problem> {
    let mut errs = Vec::new();
    if req.thresholds.is_empty() {
        errs.push(Violation::new("/thresholds", "at least one threshold is required"));
    }
    if req.thresholds.len() > limits.max_thresholds {
        errs.push(Violation::new(
            "/thresholds",
            format!("{} thresholds exceed the limit of {}", req.thresholds.len(), limits.max_thresholds),
        ));
    }
    if let Some(t) = req.tolerance {
        let (v, field) = match t {
            engine::select::Tolerance::Absolute(a) => (a, "/tolerance/absolute"),
            engine::select::Tolerance::Relative(r) => (r, "/tolerance/relative"),
        };
        if !(v.is_finite() && v > 0.0) {
            errs.push(Violation::new(field, format!("must be a finite number > 0, got {v}")));
        }
    }
    if req.methods.is_empty() {
        errs.push(Violation::new("/methods", "at least one method is required"));
    }
    let model = build_model(&req.portfolio, "/portfolio", &limits.portfolio);
    let model = match model {
        Ok(m) if errs.is_empty() => m,
        Ok(_) => return Err(Problem::invalid(errs)),
        Err(mut v) => {
            errs.append(&mut v);
            return Err(Problem::invalid(errs));
        }
    };
    // With a Poisson part the support is unbounded and the exact engine's window grows like sqrt(k): refuse
    // thresholds whose windows would not fit in memory rather than exhaust it.
    if model.poisson > 0.0 {
        let bad: Vec<Violation> = req
            .thresholds
            .iter()
            .enumerate()
            .filter(|(_, &k)| k > MAX_POISSON_THRESHOLD)
            .take(20)
            .map(|(i, &k)| {
                Violation::new(
                    format!("/thresholds/{i}"),
                    format!("{k} exceeds {MAX_POISSON_THRESHOLD}, the largest threshold served with a Poisson part"),
                )
            })
            .collect();
        if !bad.is_empty() {
            return Err(Problem::invalid(bad));
        }
    }
    let work =
        (model.bernoulli.len() as f64 + model.binomials.len() as f64 * 64.0 + 64.0) * req.thresholds.len() as f64;
    if work > limits.max_work {
        return Err(Problem::too_large(format!(
            "exposures x thresholds = {work:.0} exceeds the work budget {} (see --max-work); split the request",
            limits.max_work
        )));
    }
    crate::api::metrics::exposures_processed(model.exposures);
    let prep = Prepared::new(&model);
    let queries: Vec<(u64, engine::Side)> = req.thresholds.iter().map(|&k| (k, req.side)).collect();
    let mut per_method = Vec::new();
    for id in &req.methods {
        per_method.push(engine::run(*id, &prep, &queries, req.tolerance));
    }
    let results = req
        .thresholds
        .iter()
        .enumerate()
        .map(|(i, &k)| ThresholdResult {
            threshold: k,
            side: req.side,
            estimates: per_method.iter().map(|m| EstimateOut::from(&m[i])).collect(),
        })
        .collect();
    Ok(TailResponse {
        summary: Summary::of(&model, &prep.moments),
        results,
        assumptions: ASSUMPTIONS.iter().map(|s| s.to_string()).collect(),
    })
}
