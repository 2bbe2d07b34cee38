//! POST /v1/layers: count layers (expected events in the layer, probability touched and exhausted) and the
//! expected count beyond quantiles (conditional tail expectation of the count).

use crate::api::cancel::{off_executor, Cancel};
use crate::api::extract::Body;
use crate::api::problem::Problem;
use crate::api::scenario::{self, ModelOut, Scenario, ValueOut};
use crate::api::types::{Summary, ASSUMPTIONS};
use crate::api::AppState;
use crate::config::ServiceLimits;
use crate::engine::dependence::Dependence;
use crate::engine::law::Law;
use crate::engine::layers::{layer, tail_expectation};
use crate::portfolio::stress::Stress;
use crate::portfolio::{PortfolioSpec, Violation};
use axum::extract::State;
use axum::Json;
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

/// A count layer (attachment, attachment + limit]; no `limit` means unlimited.
#[derive(Debug, Clone, Copy, Deserialize, Serialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct LayerSpec {
    #[schema(example = 20)]
    pub attachment: u64,
    #[schema(example = 10)]
    pub limit: Option<u64>,
}

/// POST /v1/layers request.
#[derive(Debug, Clone, Deserialize, Serialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct LayersRequest {
    pub portfolio: PortfolioSpec,
    #[serde(default)]
    pub layers: Vec<LayerSpec>,
    /// Levels in (0, 1) at which to report E[S | S > q_level].
    #[serde(default)]
    #[schema(example = json!([0.99]))]
    pub tail_levels: Vec<f64>,
    #[serde(default)]
    pub stress: Option<Stress>,
    #[serde(default)]
    pub dependence: Option<Dependence>,
}

#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct LayerOut {
    pub attachment: u64,
    pub limit: Option<u64>,
    /// E[min((S - attachment)+, limit)].
    pub expected_count: f64,
    /// P(S > attachment).
    pub probability_touched: f64,
    /// P(S >= attachment + limit) (0 for an unlimited layer).
    pub probability_exhausted: f64,
    /// The same three values with logarithms and error bounds.
    pub detail: LayerDetail,
}

#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct LayerDetail {
    pub expected_count: ValueOut,
    pub probability_touched: ValueOut,
    pub probability_exhausted: ValueOut,
}

#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct TailExpectationOut {
    pub level: f64,
    /// q: the smallest count with P(S <= q) >= level.
    pub quantile: u64,
    /// E[S | S > q] (q itself when nothing lies beyond it).
    pub expected_count: ValueOut,
    /// P(S > q).
    pub probability_beyond: ValueOut,
}

/// POST /v1/layers response.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct LayersResponse {
    pub summary: Summary,
    pub model: ModelOut,
    pub layers: Vec<LayerOut>,
    pub tail_expectations: Vec<TailExpectationOut>,
    #[serde(skip_serializing_if = "Option::is_none")]
    #[schema(no_recursion)]
    pub base: Option<Box<LayersResponse>>,
    pub assumptions: Vec<String>,
}

/// Count layers and conditional tail expectations.
#[utoipa::path(
    post, path = "/v1/layers", tag = "analytics",
    request_body = LayersRequest,
    responses(
        (status = 200, description = "One result per layer and per tail level", body = LayersResponse),
        (status = 400, description = "Malformed JSON", body = Problem, content_type = "application/problem+json"),
        (status = 408, description = "Not answered within the request timeout", body = Problem, content_type = "application/problem+json"),
        (status = 413, description = "Body or work over the configured limits", body = Problem, content_type = "application/problem+json"),
        (status = 415, description = "Not JSON", body = Problem, content_type = "application/problem+json"),
        (status = 422, description = "Invalid field, with its JSON pointer", body = Problem, content_type = "application/problem+json"),
        (status = 503, description = "All computing slots busy and the queue full (see Retry-After)", body = Problem, content_type = "application/problem+json"),
    )
)]
pub async fn layers(
    State(state): State<AppState>,
    Body(req): Body<LayersRequest>,
) -> Result<Json<LayersResponse>, Problem> {
    let limits = state.limits.clone();
    let out = off_executor(move |cancel| compute_cancellable(&req, &limits, cancel)).await?;
    Ok(Json(out))
}

/// Largest attachment or limit served with a Poisson part (its windows grow like the square root of the count).
const MAX_UNBOUNDED_COUNT: u64 = 1_000_000_000;

/// The whole computation, synchronous and free of HTTP (also used by batches and the command line).
pub fn compute(req: &LayersRequest, limits: &ServiceLimits) -> Result<LayersResponse, Problem> {
    compute_cancellable(req, limits, &Cancel::never())
}

/// `compute`, giving up with an error once `cancel` is set.
pub fn compute_cancellable(
    req: &LayersRequest,
    limits: &ServiceLimits,
    cancel: &Cancel,
) -> Result<LayersResponse, Problem> {
    let mut errs = Vec::new();
    if req.layers.is_empty() && req.tail_levels.is_empty() {
        errs.push(Violation::new("/layers", "give at least one layer or one tail level"));
    }
    if req.layers.len() + req.tail_levels.len() > limits.max_thresholds {
        errs.push(Violation::new("/layers", format!("more than {} layers and levels", limits.max_thresholds)));
    }
    for (i, l) in req.layers.iter().enumerate().take(limits.max_thresholds) {
        if l.attachment > MAX_UNBOUNDED_COUNT {
            errs.push(Violation::new(
                format!("/layers/{i}/attachment"),
                format!("must be at most {MAX_UNBOUNDED_COUNT}"),
            ));
        }
        if l.limit.is_some_and(|x| x > MAX_UNBOUNDED_COUNT) {
            errs.push(Violation::new(format!("/layers/{i}/limit"), format!("must be at most {MAX_UNBOUNDED_COUNT}")));
        }
    }
    for (i, &l) in req.tail_levels.iter().enumerate().take(limits.max_thresholds) {
        if !(l > 0.0 && l < 1.0) {
            errs.push(Violation::new(
                format!("/tail_levels/{i}"),
                format!("must be strictly between 0 and 1, got {l}"),
            ));
        }
    }
    scenario::check(&req.stress, &req.dependence, &mut errs);
    let model = scenario::model(&req.portfolio, &req.stress, limits, errs)?;
    let evals = req.layers.len() as f64 * 3.0 + req.tail_levels.len() as f64 * 20.0;
    scenario::check_work(&model, evals, Scenario::work_factor(&req.stress, &req.dependence), limits)?;
    let sc = scenario::build(model, req.stress, req.dependence);
    let mut out = answer(req, &sc.law, sc.stress, cancel)?;
    if let Some(base) = &sc.base {
        out.base = Some(Box::new(answer(req, base, None, cancel)?));
    }
    Ok(out)
}

fn answer(req: &LayersRequest, law: &Law, stress: Option<Stress>, cancel: &Cancel) -> Result<LayersResponse, Problem> {
    let layers = req
        .layers
        .iter()
        .map(|l| {
            cancel.check()?;
            let r = layer(law, l.attachment, l.limit);
            Ok(LayerOut {
                attachment: l.attachment,
                limit: l.limit,
                expected_count: r.expected_count.value,
                probability_touched: r.probability_touched.value,
                probability_exhausted: r.probability_exhausted.value,
                detail: LayerDetail {
                    expected_count: r.expected_count.into(),
                    probability_touched: r.probability_touched.into(),
                    probability_exhausted: r.probability_exhausted.into(),
                },
            })
        })
        .collect::<Result<Vec<_>, Problem>>()?;
    let tail_expectations = req
        .tail_levels
        .iter()
        .map(|&lvl| {
            cancel.check()?;
            let t = tail_expectation(law, lvl);
            Ok(TailExpectationOut {
                level: lvl,
                quantile: t.quantile,
                expected_count: t.expected_count.into(),
                probability_beyond: t.probability_beyond.into(),
            })
        })
        .collect::<Result<Vec<_>, Problem>>()?;
    Ok(LayersResponse {
        summary: Summary::of_law(law),
        model: Scenario::model_out(law, stress),
        layers,
        tail_expectations,
        base: None,
        assumptions: ASSUMPTIONS.iter().map(|s| s.to_string()).collect(),
    })
}
