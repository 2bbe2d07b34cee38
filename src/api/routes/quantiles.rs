//! POST /v1/quantiles: the smallest count k with P(S <= k) >= level, for each level and method, with the
//! bracket P(S <= k - 1) < level <= P(S <= k) and the counts consistent with the method's error bound.

use crate::api::cancel::{off_executor, Cancel};
use crate::api::extract::Body;
use crate::api::problem::Problem;
use crate::api::scenario::{self, ModelOut, Scenario};
use crate::api::types::{Summary, ASSUMPTIONS};
use crate::api::AppState;
use crate::config::ServiceLimits;
use crate::engine::dependence::Dependence;
use crate::engine::law::Law;
use crate::engine::quantiles::quantiles as compute_quantiles;
use crate::engine::select::Tolerance;
use crate::engine::{BoundKind, MethodId};
use crate::portfolio::stress::Stress;
use crate::portfolio::{PortfolioSpec, Violation};
use axum::extract::State;
use axum::Json;
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

/// POST /v1/quantiles request.
#[derive(Debug, Clone, Deserialize, Serialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct QuantilesRequest {
    pub portfolio: PortfolioSpec,
    /// Levels strictly inside (0, 1).
    #[schema(example = json!([0.95, 0.99, 0.995]), min_items = 1)]
    pub levels: Vec<f64>,
    /// Methods; each level gets one quantile per method (default `exact`).
    #[serde(default = "default_methods")]
    #[schema(min_items = 1)]
    pub methods: Vec<MethodId>,
    #[serde(default)]
    pub tolerance: Option<Tolerance>,
    #[serde(default)]
    pub stress: Option<Stress>,
    #[serde(default)]
    pub dependence: Option<Dependence>,
}

fn default_methods() -> Vec<MethodId> {
    vec![MethodId::Exact]
}

/// One quantile.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct QuantileOut {
    pub level: f64,
    pub method: MethodId,
    /// The smallest count k with P(S <= k) >= level (by the method's value).
    pub count: u64,
    /// P(S <= count).
    pub cdf_at_count: f64,
    /// P(S <= count - 1).
    pub cdf_below: f64,
    pub ln_cdf_at_count: Option<f64>,
    pub ln_cdf_below: Option<f64>,
    /// Error bounds of `cdf_at_count` and `cdf_below`.
    pub cdf_error_bounds: [f64; 2],
    pub bound_kind: BoundKind,
    /// [lo, hi]: every count that the error bound leaves possible as the quantile (hi null: unbounded).
    pub count_range: [Option<u64>; 2],
}

/// POST /v1/quantiles response.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct QuantilesResponse {
    pub summary: Summary,
    pub model: ModelOut,
    pub quantiles: Vec<QuantileOut>,
    /// Under `stress`: the same figures for the unstressed portfolio.
    #[serde(skip_serializing_if = "Option::is_none")]
    #[schema(no_recursion)]
    pub base: Option<Box<QuantilesResponse>>,
    pub assumptions: Vec<String>,
}

/// Quantiles of the count.
#[utoipa::path(
    post, path = "/v1/quantiles", tag = "analytics",
    request_body = QuantilesRequest,
    responses(
        (status = 200, description = "One quantile per level and method", body = QuantilesResponse),
        (status = 400, description = "Malformed JSON", body = Problem, content_type = "application/problem+json"),
        (status = 408, description = "Not answered within the request timeout", body = Problem, content_type = "application/problem+json"),
        (status = 413, description = "Body or work over the configured limits", body = Problem, content_type = "application/problem+json"),
        (status = 415, description = "Not JSON", body = Problem, content_type = "application/problem+json"),
        (status = 422, description = "Invalid field, with its JSON pointer", body = Problem, content_type = "application/problem+json"),
        (status = 503, description = "All computing slots busy and the queue full (see Retry-After)", body = Problem, content_type = "application/problem+json"),
    )
)]
pub async fn quantiles(
    State(state): State<AppState>,
    Body(req): Body<QuantilesRequest>,
) -> Result<Json<QuantilesResponse>, Problem> {
    let limits = state.limits.clone();
    let out = off_executor(move |cancel| compute_cancellable(&req, &limits, cancel)).await?;
    Ok(Json(out))
}

/// Probes a quantile search may need (guess, gallop and bisection of three searches), for the work budget.
const PROBES_PER_LEVEL: f64 = 40.0;

/// The whole computation, synchronous and free of HTTP (also used by batches and the command line).
pub fn compute(req: &QuantilesRequest, limits: &ServiceLimits) -> Result<QuantilesResponse, Problem> {
    compute_cancellable(req, limits, &Cancel::never())
}

/// `compute`, giving up with an error once `cancel` is set.
pub fn compute_cancellable(
    req: &QuantilesRequest,
    limits: &ServiceLimits,
    cancel: &Cancel,
) -> Result<QuantilesResponse, Problem> {
    let mut errs = Vec::new();
    if req.levels.is_empty() {
        errs.push(Violation::new("/levels", "at least one level is required"));
    }
    if req.levels.len() > limits.max_thresholds {
        errs.push(Violation::new(
            "/levels",
            format!("{} levels exceed the limit of {}", req.levels.len(), limits.max_thresholds),
        ));
    }
    for (i, &l) in req.levels.iter().enumerate().take(limits.max_thresholds) {
        if !(l > 0.0 && l < 1.0) {
            errs.push(Violation::new(format!("/levels/{i}"), format!("must be strictly between 0 and 1, got {l}")));
        }
    }
    if req.methods.is_empty() {
        errs.push(Violation::new("/methods", "at least one method is required"));
    }
    scenario::check(&req.stress, &req.dependence, &mut errs);
    let model = scenario::model(&req.portfolio, &req.stress, limits, errs)?;
    let evals = req.levels.len() as f64 * req.methods.len() as f64 * PROBES_PER_LEVEL;
    scenario::check_work(&model, evals, Scenario::work_factor(&req.stress, &req.dependence), limits)?;
    let sc = scenario::build(model, req.stress, req.dependence);
    let mut out = answer(req, &sc.law, sc.stress, cancel)?;
    if let Some(base) = &sc.base {
        out.base = Some(Box::new(answer(req, base, None, cancel)?));
    }
    Ok(out)
}

fn answer(
    req: &QuantilesRequest,
    law: &Law,
    stress: Option<Stress>,
    cancel: &Cancel,
) -> Result<QuantilesResponse, Problem> {
    // Checked between methods: the engine searches a method's levels together.
    let per_method = req
        .methods
        .iter()
        .map(|&m| cancel.check().map(|()| compute_quantiles(law, &req.levels, m, req.tolerance)))
        .collect::<Result<Vec<_>, Problem>>()?;
    let mut out = Vec::new();
    // Levels in the order asked, and for each level the methods in the order asked.
    for i in 0..req.levels.len() {
        for (qs, &m) in per_method.iter().zip(&req.methods) {
            let q = &qs[i];
            let (a, b) = (q.cdf_at_count, q.cdf_below);
            out.push(QuantileOut {
                level: q.level,
                method: m,
                count: q.count,
                cdf_at_count: a.value,
                cdf_below: b.value,
                ln_cdf_at_count: a.ln_value.is_finite().then_some(a.ln_value),
                ln_cdf_below: b.ln_value.is_finite().then_some(b.ln_value),
                cdf_error_bounds: [a.abs_err, b.abs_err],
                bound_kind: if a.kind == BoundKind::Rigorous && b.kind == BoundKind::Rigorous {
                    BoundKind::Rigorous
                } else {
                    BoundKind::Estimated
                },
                count_range: [Some(q.count_range.0), q.count_range.1],
            });
        }
    }
    Ok(QuantilesResponse {
        summary: Summary::of_law(law),
        model: Scenario::model_out(law, stress),
        quantiles: out,
        base: None,
        assumptions: ASSUMPTIONS.iter().map(|s| s.to_string()).collect(),
    })
}
