//! The quantile question. Quantiles of the count: the smallest k with P(S <= k) >= level, with P(S <= k) and P(S <= k - 1) so that
//! a client sees the bracket, and for an approximate method the range of counts consistent with its bound.
//!
//! How. P(S <= k) is monotone in k, so each answer is an integer search: a first guess from the normal law
//! with the Cornish-Fisher skewness term (the large-pool limit under dependence), then galloping outwards in
//! doubling steps until the level is bracketed, then bisection. Every probe is one evaluation of the chosen
//! method (for `exact`, one tilted law), and probes are cached across the three searches of one level (the
//! count itself and the two ends of the range that the error bound allows).
//!
//! Under the factor in units (or with compound sources) the exact search is one scan of the law mixed over the
//! factor once (`factor::MixedLaw`) rather than a probe per step, each probe an integral of lattice laws.
//!
//! Losses in units. The law lives on the lattice S = offset + span j, so the search runs on the index j (no
//! total between two lattice points has mass of its own) and the answer reports the lattice point in units:
//! the smallest total s with P(S <= s) >= level is always a lattice point, and P(S <= s - 1) is P(S <= the
//! previous lattice point).

use super::checks::{check_tolerance, distinct_methods, list_size};
use super::cost::{self, Footprint};
use super::dependence::Dependence;
use super::error::Error;
use super::factor::MixedLaw;
use super::law::{Law, Summary};
use super::pipeline::{Analytic, Ctx, Inputs};
use super::scenario::{assumptions, Assumptions, ModelOut};
use super::tail::default_methods;
use crate::config::ServiceLimits;
use crate::engine::numerics::normal_law;
use crate::engine::Tolerance;
use crate::engine::{BoundKind, MethodId, Side, Value};
use crate::portfolio::stress::Stress;
use crate::portfolio::{Model, PortfolioSpec, Violation};
use serde::{Deserialize, Serialize};
use std::collections::HashMap;
use utoipa::ToSchema;

#[derive(Debug, Clone, PartialEq)]
pub struct Quantile {
    pub level: f64,
    pub method: MethodId,
    /// Smallest k with P(S <= k) >= level by the method's value.
    pub count: u64,
    pub cdf_at_count: Value,
    /// P(S <= k - 1) (0 when k is the support's minimum).
    pub cdf_below: Value,
    /// Smallest and largest count that the error bound leaves possible (None: unbounded above).
    pub count_range: (u64, Option<u64>),
}

struct Cdf<'a> {
    law: &'a Law,
    method: MethodId,
    tol: Option<Tolerance>,
    cache: HashMap<u64, Value>,
    min: u64,
    max: Option<u64>,
    /// Largest count probed when the support is unbounded: every level below 1 in f64 (1 - 2^-53 at most)
    /// has its quantile far below mean + 60 sd + 100, and an approximate bound that has not reached the
    /// level by then is reported as unbounded rather than chased further.
    top: u64,
}

impl Cdf<'_> {
    fn at(&mut self, k: u64) -> Value {
        // A stopped search ends at once: every probe reads 0 and the answer is thrown away.
        if k < self.min || crate::engine::interrupt::requested() {
            return Value::default();
        }
        if self.max.is_some_and(|m| k >= m) {
            return Value { value: 1.0, ln_value: 0.0, ..Value::default() };
        }
        if let Some(v) = self.cache.get(&k) {
            return *v;
        }
        let v = if self.method == MethodId::Exact {
            self.law.exact(&[(k, Side::Lower)])[0]
        } else {
            self.law.estimates(self.method, &[(k, Side::Lower)], self.tol)[0].value()
        };
        self.cache.insert(k, v);
        v
    }

    /// Smallest k >= min with pred(F(k)), None if no count qualifies (only possible for bounds that never
    /// reach the level).
    fn search(&mut self, guess: u64, pred: impl Fn(&Value) -> bool) -> Option<u64> {
        let top = self.max.unwrap_or(self.top);
        let guess = guess.clamp(self.min, top);
        let (mut lo, mut hi); // pred false at lo (or lo < min), true at hi
        if pred(&self.at(guess)) {
            hi = guess;
            let mut step = 1u64;
            loop {
                if hi == self.min {
                    return Some(hi);
                }
                let k = hi.saturating_sub(step).max(self.min);
                if pred(&self.at(k)) {
                    hi = k;
                    step = step.saturating_mul(2);
                } else {
                    lo = k;
                    break;
                }
            }
        } else {
            lo = guess;
            let mut step = 1u64;
            loop {
                if lo >= top {
                    return None;
                }
                let k = lo.saturating_add(step).min(top);
                if pred(&self.at(k)) {
                    hi = k;
                    break;
                }
                lo = k;
                step = step.saturating_mul(2);
            }
        }
        while hi - lo > 1 {
            let mid = lo + (hi - lo) / 2;
            if pred(&self.at(mid)) {
                hi = mid;
            } else {
                lo = mid;
            }
        }
        Some(hi)
    }
}

/// First guess: the smallest k whose continuity-corrected normal (Cornish-Fisher) cdf reaches the level; under
/// the factor, the large-pool limit (the conditional mean at the factor's quantile).
fn guess(law: &Law, level: f64) -> u64 {
    if let Some(g) = law.quantile_guess(level) {
        return g;
    }
    let m = law.moments();
    let z = normal_law::normal_quantile(level);
    let cf = z + (z * z - 1.0) * m.skewness() / 6.0;
    (m.mean + m.sd() * cf - 0.5).ceil().max(0.0) as u64
}

pub fn quantiles(law: &Law, levels: &[f64], method: MethodId, tol: Option<Tolerance>) -> Vec<Quantile> {
    let (min, max) = law.support();
    let m = law.moments();
    let top = (m.mean + 60.0 * m.sd() + 100.0).min(1e15) as u64;
    let mut cdf = Cdf { law, method, tol, cache: HashMap::new(), min, max, top };
    let mixed = if method == MethodId::Exact { law.mixed() } else { None };
    levels
        .iter()
        .map(|&level| {
            if let Some(q) = mixed.and_then(|mx| from_mixture(mx, level, min, max)) {
                return q;
            }
            let g = guess(law, level);
            let count = cdf.search(g, |v| v.value >= level).unwrap_or(max.unwrap_or(u64::MAX));
            let lo = cdf.search(count, |v| v.value + v.abs_err >= level).unwrap_or(count);
            let hi = cdf.search(count, |v| v.value - v.abs_err >= level).filter(|&h| max.is_some() || h < top);
            let cdf_at_count = cdf.at(count);
            let cdf_below = if count == 0 { Value::default() } else { cdf.at(count - 1) };
            Quantile { level, method, count, cdf_at_count, cdf_below, count_range: (lo, hi.or(max)) }
        })
        .collect()
}

/// A quantile read from the law mixed over the factor (`factor::MixedLaw`): the smallest lattice index whose cdf
/// reaches the level, and the range that the cdf's bounds leave, by one scan of the mixture's sums. None when
/// the level lies beyond the mass the mixture holds (the probing search then takes over).
fn from_mixture(mx: &MixedLaw, level: f64, min: u64, max: Option<u64>) -> Option<Quantile> {
    let cdf = |j: u64| -> Value {
        if j < min {
            Value::default()
        } else if max.is_some_and(|m| j >= m) {
            Value { value: 1.0, ln_value: 0.0, ..Value::default() }
        } else {
            mx.lower(j)
        }
    };
    let first = |pred: &dyn Fn(&Value) -> bool| -> Option<u64> {
        let end = max.map_or(mx.end(), |m| m.min(mx.end().max(min)));
        (min.max(mx.lo)..=end).find(|&j| pred(&cdf(j)))
    };
    let count = first(&|v| v.value >= level)?;
    let lo = first(&|v| v.value + v.abs_err >= level).unwrap_or(count).min(count);
    let hi = first(&|v| v.value - v.abs_err >= level).or(max);
    let cdf_below = if count == 0 { Value::default() } else { cdf(count - 1) };
    let method = MethodId::Exact;
    Some(Quantile { level, method, count, cdf_at_count: cdf(count), cdf_below, count_range: (lo, hi) })
}

/// The refusals of a question asked in loss units: a method that does not take this book's units at its place
/// in `methods` (`tail::refused_in_units`: today every method computes on the lattice, compound sources
/// included). Under the factor model the exact values come from one law mixed over the factor
/// (`factor::MixedLaw`), so the factor is no reason to refuse.
pub fn refuse_in_units(methods: &[MethodId], portfolio: &PortfolioSpec) -> Result<(), Vec<Violation>> {
    let compound = !portfolio.compound_sources.is_empty();
    let errs: Vec<Violation> = methods
        .iter()
        .enumerate()
        .filter_map(|(i, &m)| {
            super::tail::refused_in_units(m, compound).map(|why| Violation::new(format!("/methods/{i}"), why))
        })
        .collect();
    if errs.is_empty() {
        Ok(())
    } else {
        Err(errs)
    }
}

/// POST /v1/quantiles request.
#[derive(Debug, Clone, Deserialize, Serialize, ToSchema)]
#[serde(remote = "Self", deny_unknown_fields)]
pub struct QuantilesRequest {
    pub portfolio: PortfolioSpec,
    /// Levels strictly inside (0, 1).
    #[schema(example = json!([0.95, 0.99, 0.995]), min_items = 1, max_items = 10_000)]
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
crate::portfolio::objects::objects_only!(QuantilesRequest);

/// One quantile.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct QuantileOut {
    pub level: f64,
    pub method: MethodId,
    /// The smallest count k with P(S <= k) >= level (by the method's value). With loss units: the smallest
    /// total in units, always a point of the lattice offset + span j.
    pub count: u64,
    /// P(S <= count).
    pub cdf_at_count: f64,
    /// P(S <= count - 1) (with loss units: P(S <= the lattice point below `count`), the same probability).
    pub cdf_below: f64,
    pub ln_cdf_at_count: Option<f64>,
    pub ln_cdf_below: Option<f64>,
    /// Error bounds of `cdf_at_count` and `cdf_below`.
    pub cdf_error_bounds: [f64; 2],
    pub bound_kind: BoundKind,
    /// [lo, hi]: every count that the error bound leaves possible as the quantile (hi null: unbounded); lattice
    /// points in units when the book has loss units.
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
    #[schema(value_type = Vec<String>)]
    pub assumptions: Assumptions,
}

/// Tilted laws a quantile's search costs per level and method, for the work budget. The guess, gallop and
/// bisection of its three searches probe up to about 40 counts, but probes within a tilted standard deviation
/// share one tilted law and are cached: measured by examples/work_calibration, a level cost what 1.5 to 4 tail
/// evaluations cost (at 40 the work said ten times the time).
const PROBES_PER_LEVEL: f64 = 4.0;

pub struct Quantiles;

impl Analytic for Quantiles {
    type Request = QuantilesRequest;
    type Answer = QuantilesResponse;

    fn inputs(req: &QuantilesRequest) -> Inputs<'_> {
        Inputs { portfolio: &req.portfolio, stress: req.stress, dependence: req.dependence }
    }

    fn check(req: &QuantilesRequest, limits: &ServiceLimits, errs: &mut Vec<Violation>) {
        list_size("/levels", ("level", "levels"), req.levels.len(), limits.max_thresholds, errs);
        for (i, &l) in req.levels.iter().enumerate().take(limits.max_thresholds) {
            if !(l > 0.0 && l < 1.0) {
                errs.push(Violation::new(format!("/levels/{i}"), format!("must be strictly between 0 and 1, got {l}")));
            }
        }
        if req.methods.is_empty() {
            errs.push(Violation::new("/methods", "at least one method is required"));
        }
        distinct_methods(&req.methods, errs);
        // As for the tail: a tolerance of 0 (or below) cannot be met, and the document says > 0.
        check_tolerance(req.tolerance, errs);
    }

    fn check_units(req: &QuantilesRequest) -> Result<(), Vec<Violation>> {
        refuse_in_units(&req.methods, &req.portfolio)
    }

    /// Under the factor a book with compound sources is a book in units: its exact values come from one
    /// mixed law (`factor::MixedLaw`) or one integral per figure, each node's conditional law built by the
    /// exact engine with the sources in it (checked in tests/factor_mixed.rs against a quadrature of Panjer's
    /// recursion).
    fn factor_takes_compound() -> bool {
        true
    }

    fn evaluations(req: &QuantilesRequest) -> Option<f64> {
        Some(req.levels.len() as f64 * req.methods.len() as f64 * PROBES_PER_LEVEL)
    }

    fn footprint(req: &QuantilesRequest, model: &Model, _limits: &ServiceLimits) -> Footprint {
        let answer = 400.0 * req.levels.len() as f64 * req.methods.len() as f64;
        let working = cost::mixed_law_bytes(model, 0, &req.dependence);
        Footprint { windows: 8.0 * cost::exact_window_doubles(model, 0), working, answer }
    }

    fn answer(
        req: &QuantilesRequest,
        law: &Law,
        stress: Option<Stress>,
        ctx: &Ctx,
    ) -> Result<QuantilesResponse, Error> {
        // Checked between methods: the search handles a method's levels together.
        let per_method = req
            .methods
            .iter()
            .map(|&m| ctx.cancel.check().map(|()| quantiles(law, &req.levels, m, req.tolerance)))
            .collect::<Result<Vec<_>, Error>>()?;
        // In units: every count below is a lattice index, reported as its point offset + span j.
        let model = law.model();
        let units = |j: u64| model.units_of(j);
        let mut out = Vec::new();
        // Levels in the order asked, and for each level the methods in the order asked.
        for i in 0..req.levels.len() {
            for (qs, &m) in per_method.iter().zip(&req.methods) {
                let q = &qs[i];
                let (a, b) = (q.cdf_at_count, q.cdf_below);
                out.push(QuantileOut {
                    level: q.level,
                    method: m,
                    count: units(q.count),
                    cdf_at_count: a.value,
                    cdf_below: b.value,
                    ln_cdf_at_count: a.ln(),
                    ln_cdf_below: b.ln(),
                    cdf_error_bounds: [a.abs_err, b.abs_err],
                    bound_kind: a.kind.and(b.kind),
                    count_range: [Some(units(q.count_range.0)), q.count_range.1.map(units)],
                });
            }
        }
        Ok(QuantilesResponse {
            summary: Summary::of_law(law),
            model: ModelOut::of(law, stress),
            quantiles: out,
            base: None,
            assumptions: assumptions(),
        })
    }

    fn with_base(answer: &mut QuantilesResponse, base: QuantilesResponse) {
        answer.base = Some(Box::new(base));
    }
}
