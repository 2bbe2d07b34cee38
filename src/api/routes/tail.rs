//! POST /v1/tail: tail, cumulative or point probabilities at a list of thresholds, one estimate per method.

use crate::api::cancel::{off_executor, Cancel};
use crate::api::extract::Body;
use crate::api::problem::Problem;
use crate::api::scenario;
use crate::api::types::{EstimateOut, Summary, TailRequest, TailResponse, ThresholdResult, ASSUMPTIONS};
use crate::api::AppState;
use crate::config::ServiceLimits;
use crate::engine::{self, law::Law};
use crate::portfolio::Violation;
use axum::extract::State;
use axum::Json;

/// Probabilities P(S >= k), P(S <= k) or P(S = k) with error bounds.
#[utoipa::path(
    post, path = "/v1/tail", tag = "probabilities",
    request_body = TailRequest,
    responses(
        (status = 200, description = "One result per threshold, one estimate per method", body = TailResponse),
        (status = 400, description = "Malformed JSON", body = Problem, content_type = "application/problem+json"),
        (status = 408, description = "Not answered within the request timeout", body = Problem, content_type = "application/problem+json"),
        (status = 413, description = "Body or work over the configured limits", body = Problem, content_type = "application/problem+json"),
        (status = 415, description = "Not JSON", body = Problem, content_type = "application/problem+json"),
        (status = 422, description = "Invalid field, with its JSON pointer", body = Problem, content_type = "application/problem+json"),
        (status = 503, description = "All computing slots busy and the queue full (see Retry-After)", body = Problem, content_type = "application/problem+json"),
    )
)]
pub async fn tail(State(state): State<AppState>, Body(req): Body<TailRequest>) -> Result<Json<TailResponse>, Problem> {
    let limits = state.limits.clone();
    let out = off_executor(move |cancel| compute_cancellable(&req, &limits, cancel)).await?;
    Ok(Json(out))
}

/// Largest threshold for an unbounded (Poisson) portfolio: its tilted window then holds about 10^6 counts.
pub const MAX_POISSON_THRESHOLD: u64 = 1_000_000_000;

/// The work a request costs, in exposure-threshold units, to compare with `--max-work`.
pub fn work_of(model: &crate::portfolio::Model, thresholds: usize) -> f64 {
    (model.bernoulli.len() as f64 + model.binomials.len() as f64 * 64.0 + 64.0) * thresholds as f64
}

/// The whole computation, synchronous and free of HTTP (also used by the command line).
pub fn compute(req: &TailRequest, limits: &ServiceLimits) -> Result<TailResponse, Problem> {
    compute_cancellable(req, limits, &Cancel::never())
}

/// `compute`, giving up with an error once `cancel` is set.
pub fn compute_cancellable(
    req: &TailRequest,
    limits: &ServiceLimits,
    cancel: &Cancel,
) -> Result<TailResponse, Problem> {
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
    scenario::check(&req.stress, &req.dependence, &mut errs);
    let model = scenario::model(&req.portfolio, &req.stress, limits, errs)?;
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
    let factor = scenario::Scenario::work_factor(&req.stress, &req.dependence);
    scenario::check_work(&model, req.thresholds.len() as f64, factor, limits)?;
    let sc = scenario::build(model, req.stress, req.dependence);
    let mut out = answer(req, &sc.law, sc.stress, cancel)?;
    if let Some(base) = &sc.base {
        out.base = Some(Box::new(answer(req, base, None, cancel)?));
    }
    Ok(out)
}

fn answer(
    req: &TailRequest,
    law: &Law,
    stress: Option<crate::portfolio::stress::Stress>,
    cancel: &Cancel,
) -> Result<TailResponse, Problem> {
    let queries: Vec<(u64, engine::Side)> = req.thresholds.iter().map(|&k| (k, req.side)).collect();
    // The engine evaluates a method's thresholds together (nearby ones share one tilted law), so the
    // cancellation check goes between methods rather than between thresholds.
    let per_method = req
        .methods
        .iter()
        .map(|id| cancel.check().map(|()| law.estimates(*id, &queries, req.tolerance)))
        .collect::<Result<Vec<_>, Problem>>()?;
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
        summary: Summary::of_law(law),
        model: scenario::Scenario::model_out(law, stress),
        results,
        base: None,
        assumptions: ASSUMPTIONS.iter().map(|s| s.to_string()).collect(),
    })
}
