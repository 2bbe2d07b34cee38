//! The chart question: the exact pmf at the counts worth plotting around a threshold, the probability asked
//! about, and the chosen approximations at the same counts, all as natural logarithms (so that values below
//! the f64 range still plot on a log axis). The API draws it (`api::svg`). Validation and limits are those of
//! the tail question; the choice of counts ([`plot_counts`]) is the one the explorer page applies too.
//!
//! Losses in units: the counts are chosen on the lattice index j (the law's moments are in steps there) and
//! reported as the lattice points offset + span j, so the bars stand on the lattice and the threshold, in
//! units, need not be one of them.

use super::checks::unbounded_counts;
use super::cost::{self, Footprint};
use super::error::Error;
use super::law::Law;
use super::pipeline::{Analytic, Ctx, Inputs};
use super::scenario::{part_windows, work_of};
use crate::config::ServiceLimits;
use crate::engine::exact::lattice;
use crate::engine::{self, Estimate, MethodId, Prepared, Side};
use crate::portfolio::stress::Stress;
use crate::portfolio::{Model, PortfolioSpec, Violation};
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

pub const DEFAULT_WIDTH: u32 = 760;
pub const DEFAULT_HEIGHT: u32 = 420;
const WIDTH_RANGE: (u32, u32) = (240, 4000);
const HEIGHT_RANGE: (u32, u32) = (160, 3000);

/// POST /v1/chart request: the picture of the law around one threshold.
#[derive(Debug, Clone, Deserialize, Serialize, ToSchema)]
#[serde(remote = "Self", deny_unknown_fields)]
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
    #[schema(minimum = 240, maximum = 4000)]
    pub width: Option<u32>,
    /// Height in pixels, 160 to 3000 (default 420).
    #[serde(default)]
    #[schema(minimum = 160, maximum = 3000)]
    pub height: Option<u32>,
}
crate::portfolio::objects::objects_only!(ChartRequest);

/// Everything one picture shows.
#[derive(Debug, Clone, PartialEq)]
pub struct ChartData {
    /// The plotted counts (with loss units: lattice points, in units).
    pub counts: Vec<u64>,
    /// The distance between plotted counts (in units with loss units).
    pub stride: u64,
    /// With loss units: the lattice span (units between lattice points); None for a count.
    pub span: Option<u64>,
    /// Exact ln P(S = k) at each count (None where P = 0).
    pub exact_ln: Vec<Option<f64>>,
    /// Each approximation's ln P(S = k) at each count (None where it is 0), in the order asked.
    pub overlays: Vec<(MethodId, Vec<Option<f64>>)>,
    pub threshold: u64,
    pub side: Side,
    /// Exact ln of the probability asked about (the shaded tail), for the title.
    pub tail_ln: Option<f64>,
    pub exposures: u64,
    pub mean: f64,
    pub sd: f64,
    pub log_scale: bool,
    pub width: u32,
    pub height: u32,
}

/// The overlays asked, without repeats (`exact` and `auto` have no line of their own).
fn overlays(req: &ChartRequest) -> Vec<MethodId> {
    let mut out: Vec<MethodId> = Vec::new();
    for m in &req.methods {
        if !matches!(m, MethodId::Exact | MethodId::Auto) && !out.contains(m) {
            out.push(*m);
        }
    }
    out
}

fn size(v: Option<u32>, default: u32, (lo, hi): (u32, u32), field: &str, errs: &mut Vec<Violation>) -> u32 {
    let v = v.unwrap_or(default);
    if !(lo..=hi).contains(&v) {
        errs.push(Violation::new(field, format!("must be between {lo} and {hi} pixels, got {v}")));
    }
    v
}

pub struct Chart;

impl Analytic for Chart {
    type Request = ChartRequest;
    type Answer = ChartData;

    fn inputs(req: &ChartRequest) -> Inputs<'_> {
        Inputs { portfolio: &req.portfolio, stress: None, dependence: None }
    }

    fn check(req: &ChartRequest, _limits: &ServiceLimits, errs: &mut Vec<Violation>) {
        for (i, m) in req.methods.iter().enumerate() {
            match m {
                MethodId::Exact => {
                    errs.push(Violation::new(format!("/methods/{i}"), "exact is always drawn, as the bars"))
                }
                MethodId::Auto => errs.push(Violation::new(
                    format!("/methods/{i}"),
                    "auto picks a method per threshold, so it has no single curve; name the method",
                )),
                _ => {}
            }
        }
        size(req.width, DEFAULT_WIDTH, WIDTH_RANGE, "/width", errs);
        size(req.height, DEFAULT_HEIGHT, HEIGHT_RANGE, "/height", errs);
    }

    fn check_units(req: &ChartRequest) -> Result<(), Vec<Violation>> {
        super::quantiles::refuse_in_units(&req.methods, &req.portfolio)
    }

    fn check_model(req: &ChartRequest, model: &Model) -> Result<(), Error> {
        unbounded_counts(model, [("/threshold".to_string(), req.threshold)], "threshold")
    }

    /// The plotted counts depend on the law's moments, so the budget is checked in `answer`.
    fn evaluations(_req: &ChartRequest) -> Option<f64> {
        None
    }

    fn footprint(req: &ChartRequest, model: &Model, _limits: &ServiceLimits) -> Footprint {
        // At most MAX_POINTS bars and as many points per line, drawn as about 100 bytes each.
        let answer = 100.0 * MAX_POINTS as f64 * (2 + req.methods.len()) as f64;
        Footprint { windows: 8.0 * cost::exact_window_doubles(model, req.threshold), working: 0.0, answer }
    }

    fn answer(req: &ChartRequest, law: &Law, _stress: Option<Stress>, ctx: &Ctx) -> Result<ChartData, Error> {
        let (model, moments) = law.single().expect("charts are drawn of an independent law");
        let prep = Prepared { model, moments: *moments };
        let m = &prep.moments;
        let overlays = overlays(req);
        // In units, the question about the threshold as one about the lattice index (or an exact answer off it),
        // and the index the plot is anchored at.
        let asked = if model.weighted() {
            lattice::query(model, req.threshold, req.side)
        } else {
            Ok((req.threshold, req.side))
        };
        let anchor = match asked {
            Ok((j, _)) => j,
            Err(_) => lattice::query(model, req.threshold, Side::Upper).map_or(0, |(j, _)| j),
        };
        let (counts, stride) = plot_counts(m.mean, m.sd(), model.support_min(), model.support_max(), anchor, req.side);
        // One exact batch for the bars plus the title's tail, one batch per overlay.
        let evaluations = counts.len() * (1 + overlays.len()) + 1;
        let work = work_of(model, evaluations) + part_windows(model, &None) * evaluations as f64;
        if work > ctx.limits.max_work {
            return Err(Error::TooLarge(format!(
                "exposures x plotted counts = {work:.0} exceeds the work budget {} (see --max-work)",
                ctx.limits.max_work
            )));
        }
        let mut queries: Vec<(u64, Side)> = counts.iter().map(|&k| (k, Side::Point)).collect();
        if let Ok(q) = asked {
            queries.push(q);
        }
        let ln_of = |e: &Estimate| e.value().ln();
        let exact = engine::run(MethodId::Exact, &prep, &queries, None);
        let exact_ln: Vec<Option<f64>> = exact[..counts.len()].iter().map(ln_of).collect();
        let tail_ln = match asked {
            Ok(_) => ln_of(&exact[counts.len()]),
            Err(p) => crate::engine::Value::certain(p).ln(),
        };
        let points = &queries[..counts.len()];
        let lines = overlays
            .iter()
            .map(|&id| {
                ctx.cancel.check()?;
                Ok((id, engine::run(id, &prep, points, None).iter().map(ln_of).collect()))
            })
            .collect::<Result<Vec<_>, Error>>()?;
        // Back to units: the lattice points, their spacing and the moments of the total.
        let (span, mean, sd) = if model.weighted() {
            let h = model.span();
            (Some(h), model.offset as f64 + h as f64 * m.mean, h as f64 * m.sd())
        } else {
            (None, m.mean, m.sd())
        };
        let counts = if span.is_some() { counts.iter().map(|&j| model.units_of(j)).collect() } else { counts };
        Ok(ChartData {
            counts,
            stride: stride * span.unwrap_or(1),
            span,
            exact_ln,
            overlays: lines,
            threshold: req.threshold,
            side: req.side,
            tail_ln,
            exposures: model.exposures,
            mean,
            sd,
            log_scale: req.log_scale,
            width: req.width.unwrap_or(DEFAULT_WIDTH),
            height: req.height.unwrap_or(DEFAULT_HEIGHT),
        })
    }

    fn with_base(_answer: &mut ChartData, _base: ChartData) {}
}

/// Most bars drawn: beyond this the counts are sampled with a stride.
pub const MAX_POINTS: u64 = 300;

/// Standard deviations either side of the mean that the plot covers (before the threshold is added).
pub const SPREAD_SD: f64 = 6.0;

/// The counts to plot, in increasing order, and the stride between them.
///
/// The bulk mean +- 6 sd (clipped to the support) decides the stride, so that it fits in [`MAX_POINTS`] bars;
/// the threshold (clamped to the support) is always one of the counts. A threshold far outside the bulk moves
/// the window to the threshold rather than stretching the stride, since the bulk would then be a few pixels
/// wide anyway; the window keeps a fifth of its width on the far side of the threshold.
pub fn plot_counts(
    mean: f64,
    sd: f64,
    support_min: u64,
    support_max: Option<u64>,
    threshold: u64,
    side: Side,
) -> (Vec<u64>, u64) {
    let max = support_max.unwrap_or(u64::MAX);
    let clip = |x: f64| -> u64 {
        if x.is_nan() || x <= support_min as f64 {
            support_min
        } else if x >= max as f64 {
            max
        } else {
            x as u64
        }
    };
    let bulk_lo = clip((mean - SPREAD_SD * sd).floor());
    let bulk_hi = clip((mean + SPREAD_SD * sd).ceil()).max(bulk_lo);
    let k = threshold.clamp(support_min, max);
    let stride = (bulk_hi - bulk_lo) / MAX_POINTS + 1;
    let (mut lo, mut hi) = (bulk_lo.min(k), bulk_hi.max(k));
    // Show some of the tail beyond a threshold at the edge of the bulk, not just its first bar.
    let ext = ((bulk_hi - bulk_lo) / 8).max(3 * stride);
    match side {
        Side::Upper => hi = hi.max(k.saturating_add(ext).min(max)),
        Side::Lower => lo = lo.min(k.saturating_sub(ext).max(support_min)),
        Side::Point => {}
    }
    let span = (MAX_POINTS - 1) * stride;
    if hi - lo > span {
        let margin = span / 5;
        if k > bulk_hi {
            hi = k.saturating_add(margin).min(max);
            lo = hi.saturating_sub(span).max(support_min);
        } else {
            lo = k.saturating_sub(margin).max(support_min);
            hi = lo.saturating_add(span).min(max);
        }
    }
    // Grid points k + j * stride inside [lo, hi].
    let first = k - (k - lo) / stride * stride;
    let mut counts = Vec::new();
    let mut c = first;
    while c <= hi {
        counts.push(c);
        match c.checked_add(stride) {
            Some(n) => c = n,
            None => break,
        }
    }
    (counts, stride)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn plot_counts_cover_the_bulk_and_the_threshold() {
        let up = Side::Upper;
        let (c, s) = plot_counts(85.5, 9.1, 0, None, 110, up);
        assert_eq!(s, 1);
        assert_eq!((c[0], *c.last().unwrap()), (30, 141));
        // A threshold beyond the bulk is included with some of its tail; a far one moves the window.
        let (c, _) = plot_counts(85.5, 9.1, 0, None, 200, up);
        assert!(c.contains(&200) && c[0] == 30 && *c.last().unwrap() == 213);
        let (c, _) = plot_counts(85.5, 9.1, 0, None, 20, Side::Lower);
        assert!(c[0] == 7 && *c.last().unwrap() == 141);
        let (c, s) = plot_counts(85.5, 9.1, 0, None, 5000, up);
        assert_eq!(s, 1);
        assert!(c.contains(&5000) && c.len() as u64 == MAX_POINTS);
        // Clipped to the support, a threshold above it clamped onto its edge.
        let (c, _) = plot_counts(0.6, 0.68, 0, Some(3), 9, up);
        assert_eq!(c, vec![0, 1, 2, 3]);
        // A wide law is sampled with a stride that keeps the threshold on the grid.
        let (c, s) = plot_counts(1e6, 1e3, 0, None, 1_000_123, Side::Point);
        assert!(s > 1 && c.len() as u64 <= MAX_POINTS && c.contains(&1_000_123));
        assert!(c.windows(2).all(|w| w[1] - w[0] == s));
    }
}
