//! The tail question: P(S >= k), P(S <= k) or P(S = k) at a list of thresholds, one estimate per method.

use super::checks::{check_tolerance, distinct_methods, list_size, unbounded_counts};
use super::cost::{self, Footprint};
use super::dependence::Dependence;
use super::error::Error;
use super::law::{Law, Summary};
use super::pipeline::{Analytic, Ctx, Inputs};
use super::scenario::{assumptions, Assumptions, ModelOut};
use crate::config::ServiceLimits;
use crate::engine::exact::lattice;
use crate::engine::vocabulary::{Selection, Tolerance};
use crate::engine::{BoundKind, Estimate, MethodId, Side, Value};
use crate::portfolio::stress::Stress;
use crate::portfolio::{Model, PortfolioSpec, Violation};
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

/// POST /v1/tail request.
#[derive(Debug, Clone, Deserialize, Serialize, ToSchema)]
#[serde(remote = "Self", deny_unknown_fields)]
pub struct TailRequest {
    pub portfolio: PortfolioSpec,
    /// Counts k at which to evaluate the probability.
    #[schema(example = json!([10, 25, 40]), min_items = 1, max_items = 10_000)]
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
crate::portfolio::objects::objects_only!(TailRequest);

pub fn default_methods() -> Vec<MethodId> {
    vec![MethodId::Exact]
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
    pub model: ModelOut,
    pub results: Vec<ThresholdResult>,
    /// Under `stress`: the same figures for the unstressed portfolio.
    #[serde(skip_serializing_if = "Option::is_none")]
    #[schema(no_recursion)]
    pub base: Option<Box<TailResponse>>,
    /// The model's assumptions and the usual caution.
    #[schema(value_type = Vec<String>)]
    pub assumptions: Assumptions,
}

pub struct Tail;

/// Why a method does not take this book in units, or None when it does. In units the Poisson method is the
/// compound Poisson approximation. Edgeworth and the saddlepoint carry lumpiness terms measured on books of
/// exposures in units and on books with compound sources (their cumulants in the terms; docs/accuracy.md), so
/// every method takes every book today; `_compound` (whether the book has compound sources) stays for callers.
pub fn refused_in_units(m: MethodId, _compound: bool) -> Option<&'static str> {
    match m {
        MethodId::Exact
        | MethodId::Normal
        | MethodId::Poisson
        | MethodId::Edgeworth
        | MethodId::Saddlepoint
        | MethodId::Auto => None,
    }
}

impl Analytic for Tail {
    type Request = TailRequest;
    type Answer = TailResponse;

    fn inputs(req: &TailRequest) -> Inputs<'_> {
        Inputs { portfolio: &req.portfolio, stress: req.stress, dependence: req.dependence }
    }

    fn check(req: &TailRequest, limits: &ServiceLimits, errs: &mut Vec<Violation>) {
        list_size("/thresholds", ("threshold", "thresholds"), req.thresholds.len(), limits.max_thresholds, errs);
        check_tolerance(req.tolerance, errs);
        if req.methods.is_empty() {
            errs.push(Violation::new("/methods", "at least one method is required"));
        }
        distinct_methods(&req.methods, errs);
    }

    fn check_units(req: &TailRequest) -> Result<(), Vec<Violation>> {
        // Every method computes on the lattice (in steps; see each method's module note). Under the factor model
        // each conditional portfolio keeps the units and the lattice (`dependence::conditional`).
        let compound = !req.portfolio.compound_sources.is_empty();
        let errs: Vec<Violation> = req
            .methods
            .iter()
            .enumerate()
            .filter_map(|(i, &m)| refused_in_units(m, compound).map(|why| Violation::new(format!("/methods/{i}"), why)))
            .collect();
        if errs.is_empty() {
            Ok(())
        } else {
            Err(errs)
        }
    }

    fn factor_takes_compound() -> bool {
        true
    }

    fn check_model(req: &TailRequest, model: &Model) -> Result<(), Error> {
        // With a Poisson part the support is unbounded and the exact engine's window grows like sqrt(k): refuse
        // thresholds whose windows would not fit in memory rather than exhaust it.
        let counts = req.thresholds.iter().enumerate().map(|(i, &k)| (format!("/thresholds/{i}"), k));
        unbounded_counts(model, counts, "threshold")
    }

    fn evaluations(req: &TailRequest) -> Option<f64> {
        Some(req.thresholds.len() as f64)
    }

    fn footprint(req: &TailRequest, model: &Model, _limits: &ServiceLimits) -> Footprint {
        let top = req.thresholds.iter().copied().max().unwrap_or(0);
        // One estimate is about 600 bytes as a structure and as JSON.
        let answer = 600.0 * req.thresholds.len() as f64 * req.methods.len() as f64;
        let mut windows = cost::exact_window_doubles(model, top);
        if model.weighted() && req.methods.contains(&MethodId::Poisson) {
            // The compound Poisson approximation computes on its own model, whose Poisson parts are wider.
            let approx = crate::engine::poisson::PoissonApprox::compound_model(model);
            windows = windows.max(cost::exact_window_doubles(&approx, top));
        }
        Footprint { windows: 8.0 * windows, working: 0.0, answer }
    }

    fn answer(req: &TailRequest, law: &Law, stress: Option<Stress>, ctx: &Ctx) -> Result<TailResponse, Error> {
        let model = law.model();
        // Losses in units: each threshold as a question about the lattice index, or an exact 0 or 1 off it.
        let mapped: Vec<Result<(u64, Side), f64>> = if model.weighted() {
            req.thresholds.iter().map(|&k| lattice::query(model, k, req.side)).collect()
        } else {
            req.thresholds.iter().map(|&k| Ok((k, req.side))).collect()
        };
        let queries: Vec<(u64, Side)> = mapped.iter().filter_map(|q| q.ok()).collect();
        // The engine evaluates a method's thresholds together (nearby ones share one tilted law), so the
        // cancellation check goes between methods rather than between thresholds.
        let per_method = req
            .methods
            .iter()
            .map(|id| {
                ctx.cancel.check().map(|()| {
                    let mut on_lattice = law.estimates(*id, &queries, req.tolerance).into_iter();
                    mapped
                        .iter()
                        .map(|q| match q {
                            Ok(_) => on_lattice.next().expect("one estimate per lattice query"),
                            Err(p) => Estimate::of_value(*id, Value::certain(*p), 0.0),
                        })
                        .collect::<Vec<_>>()
                })
            })
            .collect::<Result<Vec<_>, Error>>()?;
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
            model: ModelOut::of(law, stress),
            results,
            base: None,
            assumptions: assumptions(),
        })
    }

    fn with_base(answer: &mut TailResponse, base: TailResponse) {
        answer.base = Some(Box::new(base));
    }
}
