//! The reverse stress question: how far may the book's probabilities (or its dependence) move before the tail
//! P(S >= k) exceeds a level alpha? For a uniform probability factor f (p_i -> min(1, f p_i)), an odds factor
//! (odds x f) or the one-factor model's rho, the largest value that keeps the tail at or under alpha, found by
//! bisection (on ln f for the factors, on rho itself) with every evaluation an exact tail with its bound.
//!
//! The bracket [low, high] is what the bounds prove: at `low` the tail plus its bound is still <= alpha, at
//! `high` the tail minus its bound already exceeds alpha; the true root lies between them when the tail is
//! non-decreasing in the searched value. That holds for both factors (each stressed p_i is non-decreasing in f,
//! and P(S >= k) of independent exposures is non-decreasing in every p_i, by coupling; under the factor model
//! p_i(z) is non-decreasing in p_i at every z). For rho it does not hold over all of [0, 1) (as rho -> 1 the
//! tail falls towards the chance that every exposure has its event, and below the mean it falls from the
//! start), so the rho search walks a grid up from 0 and answers the largest rho up to which the tail stays
//! under the level, bisecting below the first grid point not shown under it; between grid points and inside
//! the bisection it assumes the tail non-decreasing. Every answer says whether its own evaluations
//! contradicted monotonicity, and notes a threshold at or below the mean.

use super::cost::{self, Footprint};
use super::dependence::Dependence;
use super::error::Error;
use super::law::{Law, Summary, ValueOut};
use super::pipeline::{Analytic, Ctx, Inputs};
use super::scenario::{assumptions, Assumptions, ModelOut, MAX_UNBOUNDED_COUNT};
use crate::config::ServiceLimits;
use crate::engine::exact::lattice;
use crate::engine::{Side, Value};
use crate::portfolio::stress::{stressed, Stress};
use crate::portfolio::validate::build_model_with;
use crate::portfolio::{Model, PortfolioSpec, Violation};
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

/// What is searched for.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Serialize, ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum Which {
    /// A uniform factor on every probability, p -> min(1, f p) (Poisson rates x f).
    ProbabilityFactor,
    /// A uniform factor on every odds p / (1 - p) (Poisson rates x f).
    OddsFactor,
    /// The one-factor Gaussian model's rho (exposures with their own loadings keep them).
    Rho,
}

/// POST /v1/reverse-stress request.
#[derive(Debug, Clone, Deserialize, Serialize, ToSchema)]
#[serde(remote = "Self", deny_unknown_fields)]
pub struct ReverseStressRequest {
    pub portfolio: PortfolioSpec,
    /// The threshold k of the tail P(S >= k) (in units when the book has units).
    #[schema(example = 12)]
    pub threshold: u64,
    /// The level alpha in (0, 1) the tail must not exceed.
    #[schema(example = 0.01, exclusive_minimum = 0.0, exclusive_maximum = 1.0)]
    pub level: f64,
    pub which: Which,
    /// Stop once the search bracket is this narrow: relative (high / low - 1) for the factors, absolute for
    /// rho; in [1e-12, 1], default 1e-4.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    #[schema(example = 1e-4, minimum = 1e-12, maximum = 1.0)]
    pub tolerance: Option<f64>,
    /// Dependence between exposures; with `which: rho` it gives the quadrature tolerance (its rho is the
    /// starting model of `summary`).
    #[serde(default)]
    pub dependence: Option<Dependence>,
}
crate::portfolio::objects::objects_only!(ReverseStressRequest);

/// How the search ended.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Serialize, ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum Outcome {
    /// The largest value keeping the tail under the level lies in the bracket.
    Found,
    /// No value keeps the tail under the level (already at factor 0 or rho 0 it exceeds it, e.g. certain
    /// exposures reach the threshold).
    NoneKeeps,
    /// Every value searched keeps the tail under the level (up to the end of the range, `bracket.low`).
    EveryKeeps,
}

/// What the bounds prove about the root.
#[derive(Debug, Clone, Copy, Serialize, Deserialize, ToSchema)]
pub struct Bracket {
    /// Largest value evaluated whose tail plus bound is <= level (null when none was).
    pub low: Option<f64>,
    /// Smallest value evaluated whose tail minus bound is > level (null when none was).
    pub high: Option<f64>,
}

/// POST /v1/reverse-stress response.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct ReverseStressResponse {
    /// The unstressed law.
    pub summary: Summary,
    /// The dependence model (nodes counted over all evaluations).
    pub model: ModelOut,
    pub which: Which,
    pub threshold: u64,
    pub level: f64,
    pub outcome: Outcome,
    /// The answer: the largest value shown to keep the tail <= level (`bracket.low`); null under `none_keeps`.
    pub factor: Option<f64>,
    pub bracket: Bracket,
    /// P(S >= k) at `factor` (under `none_keeps`: at factor 0, or rho 0), with its bound.
    pub tail: ValueOut,
    /// Tail evaluations used (each an exact tail; under the factor model each an integration over it).
    pub evaluations: u64,
    /// False when two evaluations contradict a tail non-decreasing in the searched value (beyond their bounds).
    pub monotone: bool,
    /// What the answer assumes beyond the model, and how the search ended.
    pub notes: Vec<String>,
    #[schema(value_type = Vec<String>)]
    pub assumptions: Assumptions,
}

/// Default tolerance on the bracket.
pub const DEFAULT_TOLERANCE: f64 = 1e-4;
/// Smallest positive factor tried (below it every tail of a book without certain exposures is negligible).
pub const SMALLEST_FACTOR: f64 = 1e-100;
/// Largest rho tried (the quadrature over the factor degrades as rho approaches 1).
pub const LARGEST_RHO: f64 = 0.99;
/// The rho grid: RHO_GRID - 1 steps of RHO_STEP from 0, then LARGEST_RHO.
const RHO_GRID: usize = 20;
const RHO_STEP: f64 = 0.05;
/// Width of the search in its coordinate that the budget is planned for: ln f spans at most ln(1e300 /
/// 1e-100) for the factors, rho at most 1.
const LN_SPAN: f64 = 921.1;

/// The evaluations a search may use (0, the end of the range or the rho grid, the smallest positive factor, the
/// bisection to the tolerance): known before it starts, for the work budget.
pub fn planned_evaluations(which: Which, tolerance: Option<f64>) -> u64 {
    // Asked before the fields are checked: a tolerance out of range plans as its nearest end.
    let tol = tolerance.filter(|t| !t.is_nan()).unwrap_or(DEFAULT_TOLERANCE).clamp(1e-12, 1.0);
    let (ends, span, width) = match which {
        Which::Rho => (1 + RHO_GRID as u64, RHO_STEP, tol),
        _ => (3, LN_SPAN, tol.ln_1p()),
    };
    ends + (span / width).log2().ceil().max(0.0) as u64
}

pub struct ReverseStress;

impl Analytic for ReverseStress {
    type Request = ReverseStressRequest;
    type Answer = ReverseStressResponse;

    fn inputs(req: &ReverseStressRequest) -> Inputs<'_> {
        // The rho search integrates over the factor at every evaluation, whatever the base model.
        let dependence = match (req.which, req.dependence) {
            (Which::Rho, None | Some(Dependence::Independent {})) => Some(Dependence::one_factor(0.0)),
            (_, d) => d,
        };
        Inputs { portfolio: &req.portfolio, stress: None, dependence }
    }

    fn check(req: &ReverseStressRequest, _limits: &ServiceLimits, errs: &mut Vec<Violation>) {
        if !(req.level > 0.0 && req.level < 1.0) {
            errs.push(Violation::new("/level", format!("must be strictly between 0 and 1, got {}", req.level)));
        }
        if let Some(t) = req.tolerance {
            if !(1e-12..=1.0).contains(&t) {
                errs.push(Violation::new("/tolerance", format!("must be in [1e-12, 1], got {t}")));
            }
        }
    }

    fn check_units(_req: &ReverseStressRequest) -> Result<(), Vec<Violation>> {
        // Every search runs on the lattice: a stressed book keeps it (`stress::stressed`), and so does each
        // conditional portfolio under the factor (`dependence::conditional`).
        Ok(())
    }

    fn factor_takes_compound() -> bool {
        // The sources are independent of the factor; every evaluation is a tail under it (`factor::Factor::exact`),
        // as on /v1/tail.
        true
    }

    fn check_model(req: &ReverseStressRequest, model: &Model) -> Result<(), Error> {
        // An unbounded law is served up to MAX_UNBOUNDED_COUNT; a threshold beyond a bounded law's largest total
        // is answered (the tail is 0 under every stress: every factor keeps it).
        let k = req.threshold;
        if model.support_max().is_none() && k > MAX_UNBOUNDED_COUNT {
            return Err(Error::Invalid(vec![Violation::new(
                "/threshold",
                format!("{k} is beyond the largest threshold served for an unbounded law, {MAX_UNBOUNDED_COUNT}"),
            )]));
        }
        Ok(())
    }

    fn evaluations(req: &ReverseStressRequest) -> Option<f64> {
        Some(planned_evaluations(req.which, req.tolerance) as f64)
    }

    fn footprint(req: &ReverseStressRequest, model: &Model, limits: &ServiceLimits) -> Footprint {
        // The widest stressed law: the Poisson rate at the largest factor tried (the count windows are sized
        // for the worst case p = 1/2 already).
        let mut m = model.clone();
        m.poisson = poisson_cap(model, req.threshold, limits.portfolio.max_poisson_rate).unwrap_or(0.0);
        Footprint { windows: 8.0 * cost::exact_window_doubles(&m, req.threshold), working: 0.0, answer: 4_000.0 }
    }

    fn answer(
        req: &ReverseStressRequest,
        law: &Law,
        _stress: Option<Stress>,
        ctx: &Ctx,
    ) -> Result<ReverseStressResponse, Error> {
        let mut search = Search { req, law, ctx, points: Vec::new(), nodes: (0, 0) };
        let found = search.run()?;
        let mut notes = found.notes;
        let monotone = search.monotone();
        if !monotone {
            notes.push(
                "two evaluations contradict a tail non-decreasing in the searched value beyond their bounds: the bracket may not hold the root".into(),
            );
        }
        if let Some(j) = law.model().support_max() {
            let model = law.model();
            let max = if model.weighted() { model.units_of(j) } else { j };
            if req.threshold > max {
                notes.push(format!(
                    "the threshold is beyond the largest possible total {max}: the tail is 0 under every stress"
                ));
            }
        }
        if req.which == Which::Rho {
            let s = Summary::of_law(law);
            if (req.threshold as f64) <= s.mean {
                notes.push(format!(
                    "the threshold is at or below the mean {}: the tail need not increase with rho, which the search assumes",
                    s.mean
                ));
            }
        }
        let (a, b) = search.nodes;
        Ok(ReverseStressResponse {
            summary: Summary::of_law(law),
            model: ModelOut {
                dependence: law.dependence,
                nodes_evaluated: (search.req.which == Which::Rho || law.is_mixture()).then_some([a, b]),
                stress: None,
            },
            which: req.which,
            threshold: req.threshold,
            level: req.level,
            outcome: found.outcome,
            factor: found.factor,
            bracket: found.bracket,
            tail: found.tail.into(),
            evaluations: search.points.len() as u64,
            monotone,
            notes,
            assumptions: assumptions(),
        })
    }

    fn with_base(_answer: &mut ReverseStressResponse, _base: ReverseStressResponse) {}
}

/// The largest Poisson rate a factor search stresses to: enough for the tail at `k` to be near 1 (4k + 1000,
/// within the service's rate limit, or the rate itself when larger); None without a Poisson part.
fn poisson_cap(model: &Model, k: u64, max_rate: f64) -> Option<f64> {
    (model.poisson > 0.0).then(|| model.poisson.max((4.0 * k.min(MAX_UNBOUNDED_COUNT) as f64 + 1000.0).min(max_rate)))
}

struct Found {
    outcome: Outcome,
    factor: Option<f64>,
    bracket: Bracket,
    tail: Value,
    notes: Vec<String>,
}

/// One evaluation: the searched value and the tail there.
#[derive(Clone, Copy)]
struct Point {
    x: f64,
    tail: Value,
}

struct Search<'a> {
    req: &'a ReverseStressRequest,
    law: &'a Law,
    ctx: &'a Ctx<'a>,
    points: Vec<Point>,
    nodes: (usize, usize),
}

impl Search<'_> {
    /// P(S >= k) at the searched value x.
    fn tail(&mut self, x: f64) -> Result<Value, Error> {
        self.ctx.cancel.check()?;
        let base = self.law.model();
        let law = match self.req.which {
            Which::ProbabilityFactor => Law::new(stressed(base, &Stress::ProbabilityFactor(x)), self.law.dependence),
            Which::OddsFactor => Law::new(stressed(base, &Stress::OddsFactor(x)), self.law.dependence),
            Which::Rho => {
                let tol = self.law.dependence.tolerance();
                // Exposures with a loading of their own keep it; the others load on the common factor with the
                // rho searched. The model was built with the default 0 in their place, so a book that names any
                // loading is built again at x (it has been checked already: a failure is not expected).
                let model = if base.loaded() {
                    build_model_with(&self.req.portfolio, "/portfolio", &self.ctx.limits.portfolio, Some(x))
                        .map_err(Error::Invalid)?
                } else {
                    base.clone()
                };
                Law::new(model, Dependence::one_factor_with(x, tol.rel, tol.abs))
            }
        }
        .cancellable(self.ctx.cancel);
        let model = law.model();
        let q = if model.weighted() {
            lattice::query(model, self.req.threshold, Side::Upper)
        } else {
            Ok((self.req.threshold, Side::Upper))
        };
        let v = match q {
            Ok(q) => law.exact(&[q])[0],
            Err(p) => Value::certain(p),
        };
        self.ctx.cancel.check()?;
        let (a, b) = law.nodes_used();
        self.nodes = (self.nodes.0 + a, self.nodes.1 + b);
        self.points.push(Point { x, tail: v });
        Ok(v)
    }

    fn below(&self, v: &Value) -> bool {
        v.value + v.abs_err <= self.req.level
    }

    fn above(&self, v: &Value) -> bool {
        v.value - v.abs_err > self.req.level
    }

    /// The end of the range: every probability 1 (probability factor), every probability 1 in floating point
    /// (odds), the Poisson rate at its cap, or the largest rho.
    fn largest(&self) -> f64 {
        let m = self.law.model();
        let p_min = m.bernoulli.iter().chain(m.binomials.iter().map(|b| &b.p)).fold(1.0f64, |a, &p| a.min(p));
        let ends = match self.req.which {
            Which::Rho => return LARGEST_RHO,
            Which::ProbabilityFactor => (1.0 + 1e-9) / p_min,
            Which::OddsFactor => 1e17 / p_min,
        };
        // With a Poisson part the tail tends to 1 only as the rate grows: the end is the rate at its cap.
        let end = match poisson_cap(m, self.req.threshold, self.ctx.limits.portfolio.max_poisson_rate) {
            Some(cap) => cap / m.poisson,
            None => ends,
        };
        end.clamp(1.0, 1e300)
    }

    fn run(&mut self) -> Result<Found, Error> {
        let rho = self.req.which == Which::Rho;
        let tol = self.req.tolerance.unwrap_or(DEFAULT_TOLERANCE);
        let budget = planned_evaluations(self.req.which, self.req.tolerance) as usize;
        // Search coordinates: ln f for the factors, rho itself.
        let to_x = |s: f64| if rho { s } else { s.exp() };
        let width = if rho { tol } else { tol.ln_1p() };
        let mut notes = Vec::new();

        let zero = self.tail(0.0)?;
        if !self.below(&zero) {
            let what = if rho { "rho 0 (independence)" } else { "factor 0" };
            notes.push(format!("no value keeps the tail under the level: already at {what} it is {}", zero.value));
            let high = self.above(&zero).then_some(0.0);
            return Ok(Found {
                outcome: Outcome::NoneKeeps,
                factor: None,
                bracket: Bracket { low: None, high },
                tail: zero,
                notes,
            });
        }
        let top = self.largest();
        // The factors need only the end of the range (the tail is monotone in them). The tail need not be
        // monotone in rho over [0, 1) (as rho -> 1 it falls to about the chance that every exposure has its
        // event), so the rho search walks a grid up from 0 and bisects below the first point not shown under
        // the level: its answer is the largest rho up to which the tail stays under the level.
        let grid: Vec<f64> =
            if rho { (1..RHO_GRID).map(|i| i as f64 * RHO_STEP).chain([top]).collect() } else { vec![top] };
        let mut low = (0.0, zero);
        let mut crossing = None;
        for &x in &grid {
            let v = self.tail(x)?;
            if self.below(&v) {
                low = (x, v);
            } else {
                crossing = Some((x, v));
                break;
            }
        }
        let Some((x_hi, v_hi)) = crossing else {
            notes.push(match self.req.which {
                Which::Rho => format!(
                    "every rho on the grid 0, {RHO_STEP}, ..., {:.2} and {top} keeps the tail under the level (between grid points it was not evaluated)",
                    (RHO_GRID - 1) as f64 * RHO_STEP
                ),
                _ => format!(
                    "every factor up to {top:e} keeps the tail under the level: the end of the range searched (where every probability is 1 in floating point, the Poisson rate reaches its cap, or 1e300)"
                ),
            });
            return Ok(Found {
                outcome: Outcome::EveryKeeps,
                factor: Some(low.0),
                bracket: Bracket { low: Some(low.0), high: None },
                tail: low.1,
                notes,
            });
        };
        let mut high = self.above(&v_hi).then_some(x_hi);
        let (mut lo, mut hi) = if rho { (low.0, x_hi) } else { (SMALLEST_FACTOR.ln(), x_hi.ln()) };
        if !rho {
            let v = self.tail(SMALLEST_FACTOR)?;
            if self.below(&v) {
                low = (SMALLEST_FACTOR, v);
            } else if self.above(&v) {
                high = Some(SMALLEST_FACTOR);
                hi = lo;
            }
            // Otherwise the bound straddles the level there (the exact engine's relative bound can fail for
            // probabilities near 1e-100, leaving an absolute bound of 1): the bisection follows the estimates
            // and the proven bracket starts from factor 0.
        }
        while hi - lo > width && self.points.len() < budget {
            let mid = 0.5 * (lo + hi);
            let x = to_x(mid);
            let v = self.tail(x)?;
            if self.below(&v) {
                low = (x, v);
                lo = mid;
            } else if self.above(&v) {
                high = Some(high.map_or(x, |h: f64| h.min(x)));
                hi = mid;
            } else if v.value <= self.req.level {
                // The bound straddles the level: follow the estimate, the proven bracket stays as it was.
                lo = mid;
            } else {
                hi = mid;
            }
        }
        if let Some(h) = high {
            let wide = if rho { h - low.0 > tol * (1.0 + 1e-9) } else { h > low.0 * (1.0 + tol) * (1.0 + 1e-9) };
            if wide {
                notes.push(
                    "the bracket is wider than the tolerance: near the root the tails' error bounds straddle the level"
                        .into(),
                );
            }
        }
        Ok(Found {
            outcome: Outcome::Found,
            factor: Some(low.0),
            bracket: Bracket { low: Some(low.0), high },
            tail: low.1,
            notes,
        })
    }

    /// No two evaluations show the tail decreasing beyond their bounds.
    fn monotone(&self) -> bool {
        let mut pts = self.points.clone();
        pts.sort_by(|a, b| a.x.total_cmp(&b.x));
        let mut lowest_upper = f64::INFINITY;
        for p in pts.iter().rev() {
            // Scanning from the largest x down: a smaller x whose tail is surely above a larger x's.
            if p.tail.value - p.tail.abs_err > lowest_upper {
                return false;
            }
            lowest_upper = lowest_upper.min(p.tail.value + p.tail.abs_err);
        }
        true
    }
}
