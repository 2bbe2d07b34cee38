//! POST /v1/contributions: which exposures drive a tail. For threshold k and every listed or generated
//! exposure i: the sensitivity dP(S >= k)/dp_i = P(S without i = k - 1), the tail without it, and its impact
//! p_i x sensitivity = P(S >= k) - P(S without i >= k) (formed as a product, so small impacts keep their
//! accuracy); ranked, optionally only the top N.

use crate::api::cancel::{off_executor, Cancel};
use crate::api::extract::Body;
use crate::api::problem::Problem;
use crate::api::scenario::{self, ModelOut, Scenario, ValueOut};
use crate::api::types::{Summary, ASSUMPTIONS};
use crate::api::AppState;
use crate::config::ServiceLimits;
use crate::engine::contributions::contributions as compute_contributions;
use crate::engine::dependence::Dependence;
use crate::engine::exact::{self, ExactValue};
use crate::engine::law::{Law, LawValue};
use crate::engine::Side;
use crate::portfolio::families::expand;
use crate::portfolio::stress::Stress;
use crate::portfolio::{PortfolioSpec, Violation};
use axum::extract::State;
use axum::Json;
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

/// How contributions are ranked (largest first).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Deserialize, Serialize, ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum RankBy {
    /// dP(S >= k)/dp_i.
    #[default]
    Sensitivity,
    /// p_i x sensitivity: how much the tail falls without the exposure.
    Impact,
}

/// POST /v1/contributions request.
#[derive(Debug, Clone, Deserialize, Serialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct ContributionsRequest {
    pub portfolio: PortfolioSpec,
    /// The threshold k of the tail P(S >= k).
    #[schema(example = 12)]
    pub threshold: u64,
    /// Return only the first `top` after ranking (all by default).
    pub top: Option<usize>,
    #[serde(default)]
    pub rank_by: RankBy,
    #[serde(default)]
    pub stress: Option<Stress>,
    /// Only `independent` is served here: under a common factor the derivative in p_i also moves p_i(z).
    #[serde(default)]
    pub dependence: Option<Dependence>,
}

#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct ContributionOut {
    /// Position among `probabilities`, then the members of `families` in order.
    pub index: usize,
    pub probability: f64,
    /// dP(S >= k)/dp_i = P(S without i = k - 1).
    pub sensitivity: f64,
    /// P(S without i >= k).
    pub tail_without: f64,
    /// p_i x sensitivity = P(S >= k) - tail_without.
    pub impact: f64,
    /// The two values with logarithms and error bounds.
    pub detail: ContributionDetail,
}

#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct ContributionDetail {
    pub sensitivity: ValueOut,
    pub tail_without: ValueOut,
}

/// POST /v1/contributions response.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct ContributionsResponse {
    pub summary: Summary,
    pub model: ModelOut,
    pub threshold: u64,
    /// P(S >= threshold).
    pub tail_probability: ValueOut,
    /// Exposures counted (listed and generated); groups and Poisson sources are part of every S without i.
    pub exposures_ranked: usize,
    pub contributions: Vec<ContributionOut>,
    #[serde(skip_serializing_if = "Option::is_none")]
    #[schema(no_recursion)]
    pub base: Option<Box<ContributionsResponse>>,
    pub assumptions: Vec<String>,
}

/// Tail drivers: every exposure's sensitivity and leave-one-out tail.
#[utoipa::path(
    post, path = "/v1/contributions", tag = "analytics",
    request_body = ContributionsRequest,
    responses(
        (status = 200, description = "Every exposure's sensitivity and leave-one-out tail, ranked", body = ContributionsResponse),
        (status = 400, description = "Malformed JSON", body = Problem, content_type = "application/problem+json"),
        (status = 408, description = "Not answered within the request timeout", body = Problem, content_type = "application/problem+json"),
        (status = 413, description = "Body or work over the configured limits", body = Problem, content_type = "application/problem+json"),
        (status = 415, description = "Not JSON", body = Problem, content_type = "application/problem+json"),
        (status = 422, description = "Invalid field, with its JSON pointer", body = Problem, content_type = "application/problem+json"),
        (status = 503, description = "All computing slots busy and the queue full (see Retry-After)", body = Problem, content_type = "application/problem+json"),
    )
)]
pub async fn contributions(
    State(state): State<AppState>,
    Body(req): Body<ContributionsRequest>,
) -> Result<Json<ContributionsResponse>, Problem> {
    let limits = state.limits.clone();
    let out = off_executor(move |cancel| compute_cancellable(&req, &limits, cancel)).await?;
    Ok(Json(out))
}

/// Work of the contribution tree in units of one exact evaluation (log2 of the blocks times a full product,
/// plus the per-exposure block sums).
const EVALUATIONS: f64 = 40.0;

pub fn compute(req: &ContributionsRequest, limits: &ServiceLimits) -> Result<ContributionsResponse, Problem> {
    compute_cancellable(req, limits, &Cancel::never())
}

/// `compute`, giving up with an error once `cancel` is set (checked between the base and stressed laws).
pub fn compute_cancellable(
    req: &ContributionsRequest,
    limits: &ServiceLimits,
    cancel: &Cancel,
) -> Result<ContributionsResponse, Problem> {
    let mut errs = Vec::new();
    if matches!(req.dependence, Some(Dependence::OneFactorGaussian { .. })) {
        errs.push(Violation::new(
            "/dependence",
            "contributions are served for independent exposures only (under a common factor the derivative in p_i also moves every conditional p_i(z))",
        ));
    }
    if req.threshold > crate::api::routes::tail::MAX_POISSON_THRESHOLD {
        errs.push(Violation::new(
            "/threshold",
            format!("must be at most {}", crate::api::routes::tail::MAX_POISSON_THRESHOLD),
        ));
    }
    scenario::check(&req.stress, &None, &mut errs);
    let model = scenario::model(&req.portfolio, &req.stress, limits, errs)?;
    scenario::check_work(&model, EVALUATIONS, Scenario::work_factor(&req.stress, &None), limits)?;
    let mut listed: Vec<f64> = req.portfolio.probabilities.clone();
    for f in &req.portfolio.families {
        expand(f, |p| listed.push(p));
    }
    let base_out = req.stress.map(|_| answer(req, &model, &listed, None));
    cancel.check()?;
    let (model, listed) = match req.stress {
        Some(s) => {
            let m = crate::portfolio::stress::stressed(&model, &s);
            let l: Vec<f64> = listed.iter().map(|&p| s.apply(p)).collect();
            (m, l)
        }
        None => (model, listed),
    };
    let mut out = answer(req, &model, &listed, req.stress);
    out.base = base_out.map(Box::new);
    Ok(out)
}

fn value(v: ExactValue) -> ValueOut {
    LawValue::from(v).into()
}

fn answer(
    req: &ContributionsRequest,
    model: &crate::portfolio::Model,
    listed: &[f64],
    stress: Option<Stress>,
) -> ContributionsResponse {
    let k = req.threshold;
    let moments = crate::engine::moments::Moments::of(model);
    let per = compute_contributions(model, &moments, k);
    // Exposures that are impossible or certain are not in the model: S without them is S, or S - 1.
    let fixed = exact::evaluate(
        model,
        &moments,
        &[(k, Side::Upper), (k.saturating_sub(1), Side::Point), (k, Side::Point), (k.saturating_add(1), Side::Upper)],
    )
    .0;
    let (tail, point_below, point_at, tail_above) = (fixed[0], fixed[1], fixed[2], fixed[3]);
    let point_below = if k == 0 { ExactValue::certain(0.0) } else { point_below };
    let mut next = 0;
    let mut rows: Vec<ContributionOut> = listed
        .iter()
        .enumerate()
        .map(|(index, &p)| {
            let (s, t) = if p <= 0.0 {
                (point_below, tail)
            } else if p >= 1.0 {
                (point_at, tail_above)
            } else {
                let c = per[next];
                next += 1;
                (c.sensitivity, c.tail_without)
            };
            ContributionOut {
                index,
                probability: p,
                sensitivity: s.p,
                tail_without: t.p,
                impact: p * s.p,
                detail: ContributionDetail { sensitivity: value(s), tail_without: value(t) },
            }
        })
        .collect();
    let key = |c: &ContributionOut| match req.rank_by {
        RankBy::Sensitivity => c.sensitivity,
        RankBy::Impact => c.impact,
    };
    rows.sort_by(|a, b| key(b).total_cmp(&key(a)).then(a.index.cmp(&b.index)));
    let ranked = rows.len();
    if let Some(n) = req.top {
        rows.truncate(n);
    }
    let law = Law::independent(model.clone());
    ContributionsResponse {
        summary: Summary::of_law(&law),
        model: Scenario::model_out(&law, stress),
        threshold: k,
        tail_probability: value(tail),
        exposures_ranked: ranked,
        contributions: rows,
        base: None,
        assumptions: ASSUMPTIONS.iter().map(|s| s.to_string()).collect(),
    }
}
