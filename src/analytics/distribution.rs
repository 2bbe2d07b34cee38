//! The distribution question: the whole law over a range of counts, pmf, cdf P(S <= k) and survival P(S > k), each exact with
//! its bound and logarithm, and the range that holds all but a given mass.
//!
//! Every value comes from the exact engine's tilted laws (one per cluster of nearby counts), so far-tail
//! values keep their relative accuracy and their logarithms stay finite where the values underflow.
//!
//! Losses in units. The range asked is in units and the rows are the lattice points S = offset + span j inside
//! it, `step` (the span) apart: a total off the lattice has probability exactly 0 and gets no row, so a book
//! in units of 1000 does not list 999 zeros between its points. The row limit counts lattice points.

use super::checks::unbounded_counts;
use super::cost::{self, Footprint};
use super::dependence::Dependence;
use super::error::Error;
use super::law::{Law, Summary};
use super::pipeline::{Analytic, Ctx, Inputs};
use super::quantiles::quantiles;
use super::scenario::{assumptions, Assumptions, ModelOut};
use crate::config::ServiceLimits;
use crate::engine::exact::lattice;
use crate::engine::{BoundKind, MethodId, Side, Value};
use crate::portfolio::stress::Stress;
use crate::portfolio::{Model, PortfolioSpec, Violation};
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

pub struct Table {
    pub from: u64,
    pub to: u64,
    pub pmf: Vec<Value>,
    pub cdf: Vec<Value>,
    /// P(S > k).
    pub sf: Vec<Value>,
}

pub fn table(law: &Law, from: u64, to: u64) -> Table {
    if let Some(mx) = law.mixed() {
        // Under the factor in units: every row read from the one mixed law (`factor::MixedLaw`).
        let col = |f: &dyn Fn(u64) -> Value| (from..=to).map(f).collect::<Vec<_>>();
        let (pmf, cdf) = (col(&|k| mx.point(k)), col(&|k| mx.lower(k)));
        return Table { from, to, pmf, cdf, sf: col(&|k| mx.upper(k.saturating_add(1))) };
    }
    let mut queries = Vec::with_capacity(3 * (to - from + 1) as usize);
    for k in from..=to {
        queries.push((k, Side::Point));
        queries.push((k, Side::Lower));
        queries.push((k.saturating_add(1), Side::Upper));
    }
    let vals = law.exact(&queries);
    let pick = |o: usize| vals.iter().skip(o).step_by(3).copied().collect::<Vec<_>>();
    Table { from, to, pmf: pick(0), cdf: pick(1), sf: pick(2) }
}

/// The smallest range [a, b] with P(S < a) <= mass / 2 and P(S > b) <= mass / 2 (by exact values).
pub fn central_range(law: &Law, mass: f64) -> (u64, u64) {
    let q = quantiles(law, &[mass / 2.0, 1.0 - mass / 2.0], MethodId::Exact, None);
    // P(S <= a - 1) < mass/2 at the lower quantile a; the upper quantile b has P(S <= b) >= 1 - mass/2.
    (q[0].count, q[1].count)
}

/// Mass left outside the range when neither `from`/`to` nor `mass` is given.
pub const DEFAULT_MASS: f64 = 1e-12;

/// POST /v1/distribution request: `from` and `to` (inclusive), or `mass` (default 1e-12). The range answered
/// holds at most `--max-thresholds` (10,000 by default) counts, or lattice points with loss units; a wider one
/// is refused with 413. The central range by `mass` is about 2 z sd wide for an independent book (z the normal
/// quantile of mass / 2, sd the law's standard deviation) and wider under the one-factor model, where the
/// conditional mean moves with the factor (from its value at the factor's -z to its value at +z): there, ask
/// for an explicit range or a larger mass.
#[derive(Debug, Clone, Deserialize, Serialize, ToSchema)]
#[serde(remote = "Self", deny_unknown_fields)]
pub struct DistributionRequest {
    pub portfolio: PortfolioSpec,
    /// First count of the range (inclusive); with loss units a total in units, on the lattice or not.
    pub from: Option<u64>,
    /// Last count of the range (inclusive); with loss units a total in units, on the lattice or not.
    pub to: Option<u64>,
    /// Probability mass allowed outside the range (half on each side), in (0, 1).
    #[schema(exclusive_minimum = 0.0, exclusive_maximum = 1.0)]
    pub mass: Option<f64>,
    #[serde(default)]
    pub stress: Option<Stress>,
    #[serde(default)]
    pub dependence: Option<Dependence>,
}
crate::portfolio::objects::objects_only!(DistributionRequest);

/// POST /v1/distribution response (arrays over the counts from..=to; with loss units over the lattice points
/// from, from + step, ..., to).
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct DistributionResponse {
    pub summary: Summary,
    pub model: ModelOut,
    /// The first row's count; with loss units the first lattice point of the range asked, in units.
    pub from: u64,
    /// The last row's count; with loss units the last lattice point of the range asked, in units.
    pub to: u64,
    /// Only with loss units: the units between consecutive rows (the lattice span), row i being the total
    /// from + i step. Totals off the lattice (offset + span j) have probability exactly 0 and get no row; every
    /// lattice point of the range gets one, 0 included.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub step: Option<u64>,
    pub pmf: Vec<f64>,
    /// P(S <= k).
    pub cdf: Vec<f64>,
    /// P(S > k).
    pub sf: Vec<f64>,
    /// ln P(S = k) (null where the probability is 0).
    pub ln_pmf: Vec<Option<f64>>,
    pub ln_cdf: Vec<Option<f64>>,
    pub ln_sf: Vec<Option<f64>>,
    /// Bound on |pmf - truth| per count.
    pub pmf_error_bound: Vec<f64>,
    /// Largest error bound of any cdf or sf value.
    pub cdf_sf_max_error_bound: f64,
    pub bound_kind: BoundKind,
    #[serde(skip_serializing_if = "Option::is_none")]
    #[schema(no_recursion)]
    pub base: Option<Box<DistributionResponse>>,
    #[schema(value_type = Vec<String>)]
    pub assumptions: Assumptions,
}

pub struct Distribution;

impl Analytic for Distribution {
    type Request = DistributionRequest;
    type Answer = DistributionResponse;

    /// Only a short explicit range: by mass (or by default) the range's length depends on the law.
    fn may_inline(req: &DistributionRequest) -> bool {
        matches!((req.from, req.to), (Some(a), Some(b)) if b >= a && b - a <= 1_000)
    }

    fn inputs(req: &DistributionRequest) -> Inputs<'_> {
        Inputs { portfolio: &req.portfolio, stress: req.stress, dependence: req.dependence }
    }

    fn check(req: &DistributionRequest, limits: &ServiceLimits, errs: &mut Vec<Violation>) {
        match (req.from, req.to, req.mass) {
            (Some(a), Some(b), None) => {
                if b < a {
                    errs.push(Violation::new("/to", format!("must be >= from ({a}), got {b}")));
                } else if b - a >= limits.max_thresholds as u64 && !has_units(&req.portfolio) {
                    errs.push(Violation::new(
                        "/to",
                        format!(
                            "the range holds {} counts, over the limit of {}",
                            (b - a) as u128 + 1,
                            limits.max_thresholds
                        ),
                    ));
                }
            }
            (None, None, Some(m)) => {
                if !(m > 0.0 && m < 1.0) {
                    errs.push(Violation::new("/mass", format!("must be strictly between 0 and 1, got {m}")));
                }
            }
            (None, None, None) => {}
            (_, _, Some(_)) => errs.push(Violation::new("/mass", "give either from and to, or mass, not both")),
            (None, _, _) => errs.push(Violation::new("/from", "from and to go together")),
            (_, None, _) => errs.push(Violation::new("/to", "from and to go together")),
        }
    }

    fn check_units(req: &DistributionRequest) -> Result<(), Vec<Violation>> {
        super::quantiles::refuse_in_units(&[], &req.portfolio)
    }

    /// Under the factor a book with compound sources is a book in units: its exact values come from one
    /// mixed law (`factor::MixedLaw`) or one integral per figure, each node's conditional law built by the
    /// exact engine with the sources in it (checked in tests/factor_mixed.rs against a quadrature of Panjer's
    /// recursion).
    fn factor_takes_compound() -> bool {
        true
    }

    fn check_model(req: &DistributionRequest, model: &Model) -> Result<(), Error> {
        // With a Poisson part the support is unbounded and the exact engine's window grows with the count (the
        // tilted Poisson window is about 25 sqrt(k) long): an explicit range meets the same limit as a
        // threshold, before any window is built.
        let ends = [("/from", req.from), ("/to", req.to)];
        unbounded_counts(model, ends.into_iter().filter_map(|(at, k)| k.map(|k| (at.to_string(), k))), "count")
    }

    fn evaluations(_req: &DistributionRequest) -> Option<f64> {
        // A range of counts costs about one tilted law per 1.5 standard deviations; the pmf cells are cheap.
        // Measured by examples/work_calibration: the central range of 10^5 and 5 x 10^5 exposures cost what
        // 20 tail evaluations cost (at 64 the work said three times the time).
        Some(20.0)
    }

    fn footprint(req: &DistributionRequest, model: &Model, limits: &ServiceLimits) -> Footprint {
        let counts = match (req.from, req.to) {
            // In units: the lattice points of the range, no more than the row limit (`answer` refuses more).
            (Some(a), Some(b)) if has_units(&req.portfolio) => {
                lattice_range(model, a, b).map_or(0, |(j0, j1)| j1 - j0 + 1).min(limits.max_thresholds as u64)
            }
            (Some(a), Some(b)) => b.saturating_sub(a) + 1,
            _ => limits.max_thresholds as u64,
        };
        // Three values per count with their bounds, and seven JSON arrays.
        let answer = 250.0 * counts as f64;
        let top = req.to.unwrap_or(0);
        let working = cost::mixed_law_bytes(model, top, &req.dependence);
        Footprint { windows: 8.0 * cost::exact_window_doubles(model, top), working, answer }
    }

    fn answer(
        req: &DistributionRequest,
        law: &Law,
        stress: Option<Stress>,
        ctx: &Ctx,
    ) -> Result<DistributionResponse, Error> {
        let max_counts = ctx.limits.max_thresholds;
        let model = law.model();
        if model.weighted() || has_units(&req.portfolio) {
            return in_units(req, law, stress, ctx);
        }
        let (from, to) = match (req.from, req.to) {
            (Some(a), Some(b)) => (a, b),
            _ => central_range(law, req.mass.unwrap_or(DEFAULT_MASS)),
        };
        if to - from >= max_counts as u64 {
            return Err(Error::TooLarge(format!(
                "the range {from}..{to} that holds the requested mass has {} counts, over the limit of {} (see --max-thresholds); ask for a larger mass or an explicit range",
                (to - from) as u128 + 1,
                max_counts
            )));
        }
        Ok(response(law, stress, table(law, from, to), None))
    }

    fn with_base(answer: &mut DistributionResponse, base: DistributionResponse) {
        answer.base = Some(Box::new(base));
    }
}

/// Whether the request gives loss units anywhere (even all 1: the range is then counted in lattice points,
/// which are the counts themselves).
pub(super) fn has_units(spec: &PortfolioSpec) -> bool {
    !spec.units.is_empty()
        || spec.groups.iter().any(|g| g.units.is_some())
        || spec.families.iter().any(|f| f.units().is_some())
}

/// The first and last lattice index whose point lies in [a, b] (totals in units), None when none does.
fn lattice_range(model: &Model, a: u64, b: u64) -> Option<(u64, u64)> {
    let (j0, _) = lattice::query(model, a, Side::Upper).ok()?;
    let (j1, _) = lattice::query(model, b, Side::Lower).ok()?;
    (j1 >= j0).then_some((j0, j1))
}

/// The answer in units: rows at the lattice points of the range asked (or of the central range by mass).
fn in_units(
    req: &DistributionRequest,
    law: &Law,
    stress: Option<Stress>,
    ctx: &Ctx,
) -> Result<DistributionResponse, Error> {
    let model = law.model();
    let max_counts = ctx.limits.max_thresholds as u64;
    let (j0, j1) = match (req.from, req.to) {
        (Some(a), Some(b)) => {
            let (j0, j1) = lattice_range(model, a, b).ok_or_else(|| {
                Error::Invalid(vec![Violation::new(
                    "/to",
                    format!(
                        "no total from {a} to {b} is a point of the lattice {} + {} j on which the losses lie; widen the range",
                        model.offset,
                        model.span()
                    ),
                )])
            })?;
            if j1 - j0 >= max_counts {
                return Err(Error::Invalid(vec![Violation::new(
                    "/to",
                    format!(
                        "the range holds {} lattice points ({} units apart), over the limit of {max_counts}",
                        j1 - j0 + 1,
                        model.span()
                    ),
                )]));
            }
            (j0, j1)
        }
        _ => {
            let (j0, j1) = central_range(law, req.mass.unwrap_or(DEFAULT_MASS));
            if j1 - j0 >= max_counts {
                return Err(Error::TooLarge(format!(
                    "the range {}..{} that holds the requested mass has {} lattice points, over the limit of {max_counts} (see --max-thresholds); ask for a larger mass or an explicit range",
                    model.units_of(j0),
                    model.units_of(j1),
                    j1 - j0 + 1,
                )));
            }
            (j0, j1)
        }
    };
    let t = table(law, j0, j1);
    let mut out = response(law, stress, t, Some(model.span()));
    (out.from, out.to) = (model.units_of(j0), model.units_of(j1));
    Ok(out)
}

/// The answer's arrays from a table (`step`: the units between rows, for a book in units).
fn response(law: &Law, stress: Option<Stress>, t: Table, step: Option<u64>) -> DistributionResponse {
    let ln = |v: &[Value]| v.iter().map(Value::ln).collect::<Vec<_>>();
    let kind = t.pmf.iter().chain(&t.cdf).chain(&t.sf).fold(BoundKind::Rigorous, |k, v| k.and(v.kind));
    DistributionResponse {
        summary: Summary::of_law(law),
        model: ModelOut::of(law, stress),
        from: t.from,
        to: t.to,
        step,
        pmf: t.pmf.iter().map(|v| v.value).collect(),
        cdf: t.cdf.iter().map(|v| v.value).collect(),
        sf: t.sf.iter().map(|v| v.value).collect(),
        ln_pmf: ln(&t.pmf),
        ln_cdf: ln(&t.cdf),
        ln_sf: ln(&t.sf),
        pmf_error_bound: t.pmf.iter().map(|v| v.abs_err).collect(),
        cdf_sf_max_error_bound: t.cdf.iter().chain(&t.sf).map(|v| v.abs_err).fold(0.0, f64::max),
        bound_kind: kind,
        base: None,
        assumptions: assumptions(),
    }
}
