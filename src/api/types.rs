//! Request and response types of the HTTP API (serde + OpenAPI schemas). No computation here beyond copying
//! engine results into wire form.

use crate::engine::dependence::Dependence;
use crate::engine::moments::Moments;
use crate::engine::select::{Selection, Tolerance};
use crate::engine::{BoundKind, Estimate, MethodId, Side};
use crate::portfolio::stress::Stress;
use crate::portfolio::{Model, PortfolioSpec};
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

/// The model's assumptions, returned with every answer.
pub const ASSUMPTIONS: &[&str] = &[
    "Exposures and sources are mutually independent unless a dependence model is named in `model`; under the one-factor Gaussian model they are independent given the common factor, and Poisson sources are independent of it.",
    "Each listed probability is the exposure's event probability over the same period.",
    "Results support, and do not replace, the judgement of a qualified actuary or engineer and the rules of local regulation.",
];

/// POST /v1/tail request.
#[derive(Debug, Clone, Deserialize, Serialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct TailRequest {
    pub portfolio: PortfolioSpec,
    /// Counts k at which to evaluate the probability.
    #[schema(example = json!([10, 25, 40]), min_items = 1)]
    pub thresholds: Vec<u64>,
    /// Which probability: `upper` P(S >= k) (default), `lower` P(S <= k) or `point` P(S = k).
    #[serde(default)]
    pub side: Side,
    /// Methods to run; each threshold gets one estimate per method.
    #[serde(default = "default_methods")]
    #[schema(min_items = 1)]
    pub methods: Vec<MethodId>,
    /// For `auto`: `{"absolute": a}` or `{"relative": r}`; default `{"relative": 0.001}`.
    #[serde(default)]
    pub tolerance: Option<Tolerance>,
    /// Stress every probability by a factor; the answer then also carries the unstressed figures in `base`.
    #[serde(default)]
    pub stress: Option<Stress>,
    /// Dependence between exposures; independent by default.
    #[serde(default)]
    pub dependence: Option<Dependence>,
}

fn default_methods() -> Vec<MethodId> {
    vec![MethodId::Exact]
}

/// Summary of the portfolio's law.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct Summary {
    /// Exposures as counted by the client (p = 0 and p = 1 included; group sizes counted).
    pub exposures: u64,
    pub mean: f64,
    pub variance: f64,
    pub standard_deviation: f64,
    pub skewness: f64,
    /// Lyapunov ratio sum E|X - EX|^3 / sd^3: the Berry-Esseen bound is a constant times this.
    pub lyapunov_ratio: Option<f64>,
    pub support_min: u64,
    /// Largest possible count; null when a Poisson part makes it unbounded.
    pub support_max: Option<u64>,
}

impl Summary {
    /// The summary of a law: its own moments, which under dependence are those of the mixture.
    pub fn of_law(law: &crate::engine::law::Law) -> Summary {
        let m = law.moments();
        let (min, max) = law.support();
        let lr = m.lyapunov_ratio();
        Summary {
            exposures: law.exposures(),
            mean: m.mean,
            variance: m.variance,
            standard_deviation: m.sd(),
            skewness: m.skewness(),
            // The Berry-Esseen diagnostic belongs to independent sums only.
            lyapunov_ratio: (lr.is_finite() && !law.is_mixture()).then_some(lr),
            support_min: min,
            support_max: max,
        }
    }

    pub fn of(model: &Model, m: &Moments) -> Summary {
        let lr = m.lyapunov_ratio();
        Summary {
            exposures: model.exposures,
            mean: m.mean,
            variance: m.variance,
            standard_deviation: m.sd(),
            skewness: m.skewness(),
            lyapunov_ratio: lr.is_finite().then_some(lr),
            support_min: model.support_min(),
            support_max: model.support_max(),
        }
    }
}

/// One method's estimate for one threshold.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct EstimateOut {
    pub method: MethodId,
    pub probability: f64,
    /// Natural logarithm of the probability; exact even where `probability` underflows to 0
    /// (null only when the probability is exactly 0).
    pub ln_probability: Option<f64>,
    /// Bound on |probability - truth|.
    pub error_bound: f64,
    /// Bound on |probability - truth| / truth, where the method gives one.
    pub relative_error_bound: Option<f64>,
    pub bound_kind: BoundKind,
    /// [lo, hi], clipped to [0, 1]: where the truth lies given the bound.
    pub interval: [f64; 2],
    /// Compute time attributed to this estimate, in microseconds.
    pub elapsed_us: f64,
    /// Saddlepoint only: ln of the rigorous Chernoff upper bound exp(K(s) - s k) at the same saddlepoint.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub chernoff_ln_bound: Option<f64>,
    /// `auto` only: the bounds checked, their cost, and the method chosen.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub selection: Option<Selection>,
}

impl From<&Estimate> for EstimateOut {
    fn from(e: &Estimate) -> Self {
        let (lo, hi) = e.interval();
        EstimateOut {
            method: e.method,
            probability: e.probability,
            ln_probability: e.ln_probability.is_finite().then_some(e.ln_probability),
            error_bound: e.error_bound,
            relative_error_bound: e.relative_error_bound.filter(|r| r.is_finite()),
            bound_kind: e.bound_kind,
            interval: [lo, hi],
            elapsed_us: (e.elapsed_us * 1000.0).round() / 1000.0,
            chernoff_ln_bound: e.chernoff_ln_bound,
            selection: e.selection.clone(),
        }
    }
}

#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct ThresholdResult {
    pub threshold: u64,
    pub side: Side,
    pub estimates: Vec<EstimateOut>,
}

/// POST /v1/tail response.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct TailResponse {
    pub summary: Summary,
    /// The dependence model and stress behind these figures.
    pub model: crate::api::scenario::ModelOut,
    pub results: Vec<ThresholdResult>,
    /// Under `stress`: the same figures for the unstressed portfolio.
    #[serde(skip_serializing_if = "Option::is_none")]
    #[schema(no_recursion)]
    pub base: Option<Box<TailResponse>>,
    /// The model's assumptions and the usual caution.
    pub assumptions: Vec<String>,
}

/// POST /v1/chart request: the picture of the law around one threshold.
#[derive(Debug, Clone, Deserialize, Serialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct ChartRequest {
    pub portfolio: PortfolioSpec,
    /// The count k whose tail is shaded and marked.
    #[schema(example = 110)]
    pub threshold: u64,
    /// Which region is shaded: `upper` S >= k (default), `lower` S <= k or `point` S = k.
    #[serde(default)]
    pub side: Side,
    /// Approximations drawn as lines over the exact bars: any of `normal`, `edgeworth`, `poisson`,
    /// `saddlepoint` (none by default).
    #[serde(default)]
    #[schema(example = json!(["normal", "saddlepoint"]))]
    pub methods: Vec<MethodId>,
    /// Logarithmic probability axis, for far tails (values below 1e-308 plot too).
    #[serde(default)]
    pub log_scale: bool,
    /// Width in pixels, 240 to 4000 (default 760).
    #[serde(default)]
    pub width: Option<u32>,
    /// Height in pixels, 160 to 3000 (default 420).
    #[serde(default)]
    pub height: Option<u32>,
}
