//! The layers question. Count layers and the tail expectation: for a layer (a, a + l], the expected number of events in it
//! E[min((S - a)+, l)], the probability that it is touched P(S > a) and that it is exhausted P(S >= a + l);
//! and the expected count beyond a quantile, E[S | S > q_level].
//!
//! The expectations come from the exact engine's weighted tilted sums (`exact::layer_expectation`), so a layer
//! far in the tail keeps its relative accuracy; the probabilities are ordinary exact tails.
//!
//! Losses in units. Attachments, limits, quantiles and expectations are all in units: E[min((S - a)+, l)] is
//! then the layer's stop-loss premium, summed over the lattice points S = offset + span j (attachments need
//! not be lattice points), and the probabilities are tails of the lattice index (`lattice::query`).

use super::cost::{self, Footprint};
use super::dependence::Dependence;
use super::error::Error;
use super::law::{Law, Summary, ValueOut};
use super::pipeline::{Analytic, Ctx, Inputs};
use super::quantiles::quantiles;
use super::scenario::{assumptions, Assumptions, ModelOut, MAX_UNBOUNDED_COUNT};
use crate::config::ServiceLimits;
use crate::engine::exact::lattice;
use crate::engine::numerics::float::{up, U};
use crate::engine::{BoundKind, MethodId, Side, Value};
use crate::portfolio::stress::Stress;
use crate::portfolio::{Model, PortfolioSpec, Violation};
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

pub struct Layer {
    pub attachment: u64,
    pub limit: Option<u64>,
    pub expected_count: Value,
    pub probability_touched: Value,
    pub probability_exhausted: Value,
}

pub fn layer(law: &Law, attachment: u64, limit: Option<u64>) -> Layer {
    let expected_count = law.layer_expectation(attachment, limit);
    let mut qs = vec![(attachment.saturating_add(1), Side::Upper)];
    if let Some(l) = limit {
        qs.push((attachment.saturating_add(l), Side::Upper));
    }
    let v = upper_tails(law, &qs);
    let exhausted = if limit.is_some() { v[1] } else { Value::default() };
    Layer { attachment, limit, expected_count, probability_touched: v[0], probability_exhausted: exhausted }
}

/// Exact upper tails P(S >= k), with k in units when the book has loss units (an upper tail is always a
/// question about a lattice index).
fn upper_tails(law: &Law, qs: &[(u64, Side)]) -> Vec<Value> {
    let model = law.model();
    if !model.weighted() {
        return law.exact(qs);
    }
    let mapped: Vec<(u64, Side)> = qs
        .iter()
        .map(|&(k, side)| lattice::query(model, k, side).expect("an upper tail maps onto the lattice"))
        .collect();
    law.exact(&mapped)
}

pub struct TailExpectation {
    pub level: f64,
    /// The quantile q at the level (smallest k with P(S <= k) >= level).
    pub quantile: u64,
    /// E[S | S > q], or q when nothing lies beyond it.
    pub expected_count: Value,
    /// P(S > q).
    pub probability_beyond: Value,
}

pub fn tail_expectation(law: &Law, level: f64) -> TailExpectation {
    // The quantile search runs on the lattice index; everything after it is in units.
    let q = law.model().units_of(quantiles(law, &[level], MethodId::Exact, None).remove(0).count);
    let beyond = upper_tails(law, &[(q.saturating_add(1), Side::Upper)])[0];
    if beyond.value <= 0.0 {
        let v =
            Value { value: q as f64, ln_value: (q as f64).ln(), abs_err: 0.0, rel_err: 0.0, kind: BoundKind::Rigorous };
        return TailExpectation { level, quantile: q, expected_count: v, probability_beyond: beyond };
    }
    let excess = law.layer_expectation(q, None);
    // E[S | S > q] = q + E[(S - q)+] / P(S > q); relative errors of the ratio add to first order.
    let ratio = excess.value / beyond.value;
    let rel = up(excess.rel_err + beyond.rel_err + excess.rel_err * beyond.rel_err);
    let value = q as f64 + ratio;
    let abs_err = up(ratio * rel + 2.0 * U * value);
    let kind = excess.kind.and(beyond.kind);
    let expected_count = Value { value, ln_value: value.ln(), abs_err, rel_err: up(abs_err / value), kind };
    TailExpectation { level, quantile: q, expected_count, probability_beyond: beyond }
}

/// A count layer (attachment, attachment + limit]; no `limit` means unlimited. With loss units both are in
/// units (any whole number, on the lattice or not).
#[derive(Debug, Clone, Copy, Deserialize, Serialize, ToSchema)]
#[serde(remote = "Self", deny_unknown_fields)]
pub struct LayerSpec {
    #[schema(example = 20, maximum = 1_000_000_000)]
    pub attachment: u64,
    #[schema(example = 10, maximum = 1_000_000_000)]
    pub limit: Option<u64>,
}
crate::portfolio::objects::objects_only!(LayerSpec);

/// POST /v1/layers request.
#[derive(Debug, Clone, Deserialize, Serialize, ToSchema)]
#[serde(remote = "Self", deny_unknown_fields)]
pub struct LayersRequest {
    pub portfolio: PortfolioSpec,
    #[serde(default)]
    #[schema(max_items = 10_000)]
    pub layers: Vec<LayerSpec>,
    /// Levels in (0, 1) at which to report E[S | S > q_level].
    #[serde(default)]
    #[schema(example = json!([0.99]), max_items = 10_000)]
    pub tail_levels: Vec<f64>,
    #[serde(default)]
    pub stress: Option<Stress>,
    #[serde(default)]
    pub dependence: Option<Dependence>,
}
crate::portfolio::objects::objects_only!(LayersRequest);

#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct LayerOut {
    pub attachment: u64,
    pub limit: Option<u64>,
    /// E[min((S - attachment)+, limit)]; with loss units, in units: the layer's stop-loss premium.
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
    /// q: the smallest count with P(S <= q) >= level (with loss units: the lattice point, in units).
    pub quantile: u64,
    /// E[S | S > q] (q itself when nothing lies beyond it); in units when the book has loss units.
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
    #[schema(value_type = Vec<String>)]
    pub assumptions: Assumptions,
}

/// Tilted laws a tail level costs, for the work budget (`Layers::evaluations`).
pub const TAIL_LEVEL_EVALUATIONS: f64 = 5.0;

pub struct Layers;

impl Analytic for Layers {
    type Request = LayersRequest;
    type Answer = LayersResponse;

    fn inputs(req: &LayersRequest) -> Inputs<'_> {
        Inputs { portfolio: &req.portfolio, stress: req.stress, dependence: req.dependence }
    }

    fn check(req: &LayersRequest, limits: &ServiceLimits, errs: &mut Vec<Violation>) {
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
                errs.push(Violation::new(
                    format!("/layers/{i}/limit"),
                    format!("must be at most {MAX_UNBOUNDED_COUNT}"),
                ));
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
    }

    fn check_units(req: &LayersRequest) -> Result<(), Vec<Violation>> {
        super::quantiles::refuse_in_units(&[], &req.portfolio)
    }

    /// Under the factor a book with compound sources is a book in units: its exact values come from one
    /// mixed law (`factor::MixedLaw`) or one integral per figure, each node's conditional law built by the
    /// exact engine with the sources in it (checked in tests/factor_mixed.rs against a quadrature of Panjer's
    /// recursion).
    fn factor_takes_compound() -> bool {
        true
    }

    /// A layer costs about 3 tilted laws and a tail level (its quantile's search and the expectation beyond it)
    /// about 5, each as wide as the book's windows, which the pipeline counts (`scenario::part_windows`; under
    /// the factor, 150 of them per figure). Measured by examples/work_calibration: at 20 per level a tail level
    /// cost a quarter of what its work said.
    fn evaluations(req: &LayersRequest) -> Option<f64> {
        let mut n = req.layers.len() as f64 * 3.0 + req.tail_levels.len() as f64 * TAIL_LEVEL_EVALUATIONS;
        // Under the factor in units the expectations come from one mixed law (`factor::MixedLaw`) of at most
        // MAX_NODES lattice laws, FACTOR_WORK each per evaluation counted.
        let units = super::distribution::has_units(&req.portfolio) || !req.portfolio.compound_sources.is_empty();
        if units && req.dependence.as_ref().and_then(|d| d.rho()).is_some() {
            n += super::factor::MAX_NODES as f64 / super::scenario::FACTOR_WORK;
        }
        Some(n)
    }

    fn footprint(req: &LayersRequest, model: &Model, _limits: &ServiceLimits) -> Footprint {
        let top = req.layers.iter().map(|l| l.attachment.saturating_add(l.limit.unwrap_or(0))).max().unwrap_or(0);
        let answer = 800.0 * (req.layers.len() + req.tail_levels.len()) as f64;
        // Tail expectations search their quantiles in the mixed law under the factor (`quantiles`).
        let working = if req.tail_levels.is_empty() { 0.0 } else { cost::mixed_law_bytes(model, top, &req.dependence) };
        Footprint { windows: 8.0 * cost::exact_window_doubles(model, top), working, answer }
    }

    fn answer(req: &LayersRequest, law: &Law, stress: Option<Stress>, ctx: &Ctx) -> Result<LayersResponse, Error> {
        let layers = req
            .layers
            .iter()
            .map(|l| {
                ctx.cancel.check()?;
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
            .collect::<Result<Vec<_>, Error>>()?;
        let tail_expectations = req
            .tail_levels
            .iter()
            .map(|&lvl| {
                ctx.cancel.check()?;
                let t = tail_expectation(law, lvl);
                Ok(TailExpectationOut {
                    level: lvl,
                    quantile: t.quantile,
                    expected_count: t.expected_count.into(),
                    probability_beyond: t.probability_beyond.into(),
                })
            })
            .collect::<Result<Vec<_>, Error>>()?;
        Ok(LayersResponse {
            summary: Summary::of_law(law),
            model: ModelOut::of(law, stress),
            layers,
            tail_expectations,
            base: None,
            assumptions: assumptions(),
        })
    }

    fn with_base(answer: &mut LayersResponse, base: LayersResponse) {
        answer.base = Some(Box::new(base));
    }
}
