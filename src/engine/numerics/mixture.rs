//! Expectations over a standard normal factor, E[f_q(Z)] for a vector of integrands f_q at once, by adaptive
//! Gauss-Kronrod panels on a finite range, refined jointly, with monotone brackets where the shape allows.
//!
//! Range. Z is truncated to [-LIMIT, LIMIT]; the mass left out, 2 Q(37) < 1.2e-299, times the largest value an
//! integrand can take, is added to every error.
//!
//! Panels. The range is cut at the caller's breakpoints (for the factor model: where the conditional mean
//! crosses each count asked, and a few conditional standard deviations either side), every interior
//! breakpoint is evaluated, and each panel [a, b] gets an estimate of int_a^b phi(z) f_q(z) dz in one of two ways:
//!
//! * a bracket: where f_q is monotone in z (a tail probability of the conditional law, an expected layer) its
//!   values at the panel's ends bound it on the whole panel, so the integral lies in [lo, hi] (Phi(b) - Phi(a))
//!   and the midpoint is within half the width; the same holds with the natural range of f_q at the ends of the
//!   whole range, and with an envelope (a point probability is below both one-sided tails at the same count).
//!   This is rigorous given the end values' bounds, costs no evaluation, and settles the panels where the
//!   conditional law is far from the count, which for a large pool is almost all of the line;
//! * the 15-point Gauss-Kronrod rule with its embedded 7-point Gauss rule (Kronrod 1965; the constants and the
//!   error estimate of QUADPACK's QK15, Piessens, de Doncker-Kapenga, Ueberhuber and Kahaner, "QUADPACK",
//!   Springer 1983): the value is the Kronrod sum, the error estimate resasc min(1, (200 |K - G| / resasc)^1.5)
//!   with resasc the Kronrod integral of |f - mean f|, and never below 50 eps times the integral of |f|. The
//!   scaling is QUADPACK's: 200 |K - G| is a generous bound on the Gauss rule's error, and the exponent 1.5
//!   accounts for the Kronrod rule converging much faster than the Gauss rule once the panel resolves f.
//!
//! A panel keeps whichever estimate has the smaller error (the Kronrod value clipped into the bracket).
//!
//! Refinement. Each round marks, for every integrand whose summed error is over its tolerance
//! max(abs, rel |I_q|), its worst panels until the unmarked ones hold at most half the tolerance, over all
//! integrands at once; a marked panel without a Kronrod estimate gets one if it is at most `MAX_GK_WIDTH` wide
//! (or lies beyond |z| = 10, where phi < 1e-22), and otherwise (or if it has one) is bisected, which costs one
//! evaluation at the midpoint (its children start with brackets). The nodes of a round are evaluated together,
//! on all cores; every node is one call of the integrand for all q, so its conditional model is built once and
//! dropped. Refinement stops when every integrand meets its tolerance, at the node budget, or when `stop` says so.
//!
//! Errors are kept in two parts: the quadrature's (the Kronrod estimate, bracket widths and the truncated mass),
//! which the tolerance is checked against, and the node values' own bounds integrated with the weights (the
//! exact engine's rigorous bounds, or an approximation's), which are reported but are not the quadrature's to
//! reduce.

use super::float::{Sum, U};
use super::normal_law::{cdf, ln_pdf, sf};
use crate::engine::vocabulary::Value;

/// Half-width of the factor's range.
pub const LIMIT: f64 = 37.0;

/// Upper bound on the factor's mass outside [-LIMIT, LIMIT]: 2 Q(37) = 1.13e-299 (the asymptotic series
/// phi(z)/z (1 - 1/z^2 + ...) is an upper bound when cut after its first term).
pub const OMITTED_MASS: f64 = 1.2e-299;

/// Widest panel given a Kronrod estimate inside |z| < 10: wider ones are bisected first, so that no single
/// 15-point rule has to resolve several unit scales of phi.
pub const MAX_GK_WIDTH: f64 = 2.0;

/// Abscissae of the 15-point Kronrod rule on [-1, 1] from the outermost to the centre (the Gauss nodes are
/// entries 1, 3, 5 and 7), the Kronrod weights, and the weights of the 7-point Gauss rule at entries 1, 3, 5, 7.
/// QUADPACK's QK15 constants (Piessens et al. 1983), recalled from memory; `rule_constants_are_exact` checks
/// that they integrate every monomial up to degree 22 (Kronrod) and 13 (Gauss) exactly, which determines them.
#[allow(clippy::excessive_precision)] // the published digits, kept as published
const XGK: [f64; 8] = [
    0.991_455_371_120_812_639_206_854_697_526_329,
    0.949_107_912_342_758_524_526_189_684_047_851,
    0.864_864_423_359_769_072_789_712_788_640_926,
    0.741_531_185_599_394_439_863_864_773_280_788,
    0.586_087_235_467_691_130_294_144_845_693_013,
    0.405_845_151_377_397_166_906_606_412_076_961,
    0.207_784_955_007_898_467_600_689_403_773_245,
    0.0,
];
#[allow(clippy::excessive_precision)] // the published digits, kept as published
const WGK: [f64; 8] = [
    0.022_935_322_010_529_224_963_732_008_058_970,
    0.063_092_092_629_978_553_290_700_663_189_204,
    0.104_790_010_322_250_183_839_876_322_541_518,
    0.140_653_259_715_525_918_745_189_590_510_238,
    0.169_004_726_639_267_902_826_583_426_598_550,
    0.190_350_578_064_785_409_913_256_402_421_014,
    0.204_432_940_075_298_892_414_161_999_234_649,
    0.209_482_141_084_727_828_012_999_174_891_714,
];
#[allow(clippy::excessive_precision)] // the published digits, kept as published
const WG: [f64; 4] = [
    0.129_484_966_168_869_693_270_611_432_679_082,
    0.279_705_391_489_276_667_901_467_771_423_780,
    0.381_830_050_505_118_944_950_369_775_488_975,
    0.417_959_183_673_469_387_755_102_040_816_327,
];

/// The 15 nodes of the rule on [a, b], ascending, with their Kronrod and Gauss weights on [a, b] (the Gauss
/// weight is 0 at the 8 Kronrod-only nodes).
pub fn gk15(a: f64, b: f64) -> [(f64, f64, f64); 15] {
    let (c, h) = (0.5 * (a + b), 0.5 * (b - a));
    let mut out = [(0.0, 0.0, 0.0); 15];
    for j in 0..8 {
        let wg = if j % 2 == 1 { WG[j / 2] } else { 0.0 };
        out[j] = (c - h * XGK[j], h * WGK[j], h * wg);
        out[14 - j] = (c + h * XGK[j], h * WGK[j], h * wg);
    }
    out
}

/// QUADPACK's QK15 combination of the values f_j (already multiplied by any weight function) at the nodes of
/// `gk15(a, b)`: (Kronrod value, error estimate, Kronrod integral of |f|).
pub fn qk15(rule: &[(f64, f64, f64); 15], f: &[f64; 15]) -> (f64, f64, f64) {
    let (mut k, mut g, mut abs) = (0.0, 0.0, 0.0);
    let mut width = 0.0;
    for (&(_, wk, wg), &v) in rule.iter().zip(f) {
        k += wk * v;
        g += wg * v;
        abs += wk * v.abs();
        width += wk;
    }
    let mean = if width > 0.0 { k / width } else { 0.0 };
    let asc: f64 = rule.iter().zip(f).map(|(&(_, wk, _), &v)| wk * (v - mean).abs()).sum();
    let mut err = (k - g).abs();
    if asc != 0.0 && err != 0.0 {
        err = asc * (200.0 * err / asc).powf(1.5).min(1.0);
    }
    if abs > f64::MIN_POSITIVE / (50.0 * f64::EPSILON) {
        err = err.max(50.0 * f64::EPSILON * abs);
    }
    (k, err, abs)
}

/// Phi(b) - Phi(a) for a <= b without cancellation in either tail, and a bound on its rounding error.
pub fn normal_mass(a: f64, b: f64) -> (f64, f64) {
    let (m, scale) = if b <= 0.0 {
        (cdf(b) - cdf(a), cdf(b))
    } else if a >= 0.0 {
        (sf(a) - sf(b), sf(a))
    } else {
        let (l, r) = (cdf(a), sf(b));
        (1.0 - l - r, 1.0)
    };
    // The erfc values are within a few ulps (statrs follows Boost's rational approximations).
    (m.max(0.0), 16.0 * U * scale)
}

/// How an integrand varies with z, for brackets.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Shape {
    Decreasing,
    Increasing,
    /// No known shape: the natural range is the only bracket.
    Free,
    /// Between the lower end of the range and both integrands named (a decreasing and an increasing one).
    Below {
        decreasing: usize,
        increasing: usize,
    },
}

/// What the driver knows about an integrand besides its values.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Spec {
    pub shape: Shape,
    /// f(z) lies in [range.0, range.1] for every z.
    pub range: (f64, f64),
    /// Whether the integral must meet the tolerance (integrands used only in other integrands' brackets
    /// need not).
    pub target: bool,
}

impl Spec {
    pub fn new(shape: Shape, range: (f64, f64)) -> Spec {
        Spec { shape, range, target: true }
    }
}

/// Stop when the quadrature error is at most max(abs, rel |value|).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Tol {
    pub rel: f64,
    pub abs: f64,
}

#[derive(Debug, Clone, Copy)]
pub struct Options {
    pub tol: Tol,
    /// Most nodes evaluated (panel ends and Kronrod nodes); refinement stops there, with the errors as they are.
    pub max_nodes: usize,
    /// Evaluate a round's nodes on all cores.
    pub parallel: bool,
}

/// One integral with its errors.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Integral {
    pub value: f64,
    /// ln of the value, from the panels' logarithms (finite where the value underflows).
    pub ln_value: f64,
    /// Quadrature error estimate: Kronrod estimates, bracket widths, truncated mass and summation rounding.
    pub quad_err: f64,
    /// The node values' own error bounds, integrated.
    pub node_err: f64,
}

/// A panel of the final partition.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PanelOut {
    pub a: f64,
    pub b: f64,
    /// Whether the panel was given a Kronrod estimate.
    pub kronrod: bool,
    /// Index of the evaluated end in `Outcome::ends` (None at the ends of the range).
    pub left: Option<usize>,
    pub right: Option<usize>,
}

pub struct Outcome {
    pub integrals: Vec<Integral>,
    pub panels: Vec<PanelOut>,
    /// Evaluated panel ends: z and (value, error bound) of each integrand.
    pub ends: Vec<(f64, Vec<(f64, f64)>)>,
    /// Nodes evaluated, and how many of them were Gauss nodes (the embedded check rule's).
    pub nodes: usize,
    pub gauss_nodes: usize,
    pub converged: bool,
}

/// A panel's estimate of one integral.
#[derive(Debug, Clone, Copy, Default)]
struct Est {
    value: f64,
    ln: f64,
    quad: f64,
    node: f64,
}

struct Panel {
    a: f64,
    b: f64,
    left: Option<usize>,
    right: Option<usize>,
    /// Kronrod estimates per integrand.
    gk: Option<Vec<Est>>,
    /// Chosen estimates per integrand.
    est: Vec<Est>,
    /// Too narrow to bisect further.
    last: bool,
    /// Phi(b) - Phi(a) and its rounding bound.
    mass: (f64, f64),
}

impl Panel {
    fn new(a: f64, b: f64, left: Option<usize>, right: Option<usize>) -> Panel {
        Panel { a, b, left, right, gk: None, est: vec![], last: false, mass: normal_mass(a, b) }
    }
}

/// Evaluate f at every z, on all cores when asked (nodes are handed out one at a time, since their cost varies).
pub fn evaluate_all<R: Send>(zs: &[f64], parallel: bool, f: &(impl Fn(f64) -> R + Sync)) -> Vec<R> {
    let threads =
        if parallel { std::thread::available_parallelism().map(|n| n.get()).unwrap_or(1).min(zs.len()) } else { 1 };
    if threads <= 1 {
        return zs.iter().map(|&z| f(z)).collect();
    }
    let next = std::sync::atomic::AtomicUsize::new(0);
    // The workers carry the caller's stop flag, so the exact engine stops inside a node on every thread.
    let flag = crate::engine::interrupt::current();
    let mut parts: Vec<(usize, R)> = std::thread::scope(|s| {
        let handles: Vec<_> = (0..threads)
            .map(|_| {
                let flag = flag.clone();
                let (next, f) = (&next, f);
                s.spawn(move || {
                    crate::engine::interrupt::with(flag, || {
                        let mut mine = Vec::new();
                        loop {
                            let i = next.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
                            if i >= zs.len() {
                                break;
                            }
                            mine.push((i, f(zs[i])));
                        }
                        mine
                    })
                })
            })
            .collect();
        handles.into_iter().flat_map(|h| h.join().expect("node evaluation panicked")).collect()
    });
    parts.sort_by_key(|(i, _)| *i);
    parts.into_iter().map(|(_, r)| r).collect()
}

fn ln_of(v: f64) -> f64 {
    if v > 0.0 {
        v.ln()
    } else {
        f64::NEG_INFINITY
    }
}

struct Driver<'a> {
    specs: &'a [Spec],
    ends: Vec<(f64, Vec<(f64, f64)>)>,
}

impl Driver<'_> {
    /// Upper and lower bounds of integrand q at a panel end (None: an end of the whole range).
    fn at(&self, end: Option<usize>, q: usize) -> (f64, f64) {
        let (lo, hi) = self.specs[q].range;
        match end {
            None => (lo, hi),
            Some(i) => {
                let (v, e) = self.ends[i].1[q];
                ((v - e).max(lo), (v + e).min(hi))
            }
        }
    }

    /// Bounds of f_q on the panel.
    fn bracket(&self, p: &Panel, q: usize) -> (f64, f64) {
        let (lo, hi) = self.specs[q].range;
        let (l, r) = (p.left, p.right);
        let (a, b) = match self.specs[q].shape {
            Shape::Decreasing => (self.at(r, q).0, self.at(l, q).1),
            Shape::Increasing => (self.at(l, q).0, self.at(r, q).1),
            Shape::Free => (lo, hi),
            Shape::Below { decreasing, increasing } => (lo, self.at(l, decreasing).1.min(self.at(r, increasing).1)),
        };
        let (a, b) = (a.clamp(lo, hi), b.clamp(lo, hi));
        if a <= b {
            (a, b)
        } else {
            // Inconsistent end values (within their bounds they cannot be): keep the wider reading.
            (b, a)
        }
    }

    fn estimate(&self, p: &Panel, q: usize) -> Est {
        let (lo, hi) = self.bracket(p, q);
        let (mass, mass_err) = p.mass;
        let mid = 0.5 * (lo + hi) * mass;
        let br = Est {
            value: mid,
            ln: ln_of(mid),
            quad: 0.5 * (hi - lo) * mass + hi.abs().max(lo.abs()) * mass_err,
            node: 0.0,
        };
        match &p.gk {
            Some(gk) if gk[q].quad + gk[q].node < br.quad => {
                let k = gk[q];
                let clipped = k.value.clamp(lo * mass, hi * mass);
                Est { value: clipped, ln: if clipped == k.value { k.ln } else { ln_of(clipped) }, ..k }
            }
            _ => br,
        }
    }
}

/// Integrals of phi(z) f_q(z) over the line, by the scheme in the module's documentation. `f(z)` returns the
/// values of every integrand at z with their error bounds.
pub fn integrate<F>(
    specs: &[Spec],
    breakpoints: &[f64],
    opts: &Options,
    f: F,
    stop: &(dyn Fn() -> bool + Sync),
) -> Outcome
where
    F: Fn(f64) -> Vec<Value> + Sync,
{
    let nq = specs.len();
    let mut pts: Vec<f64> = breakpoints.iter().copied().filter(|z| z.is_finite() && z.abs() < LIMIT).collect();
    pts.sort_by(f64::total_cmp);
    pts.dedup_by(|a, b| (*a - *b).abs() <= 1e-12 * (1.0 + b.abs()));
    let to_pairs = |v: Vec<Value>| -> Vec<(f64, f64)> { v.into_iter().map(|x| (x.value, x.abs_err)).collect() };
    let mut nodes = pts.len();
    let mut gauss_nodes = 0;
    let first = evaluate_all(&pts, opts.parallel, &f);
    let mut d = Driver { specs, ends: pts.iter().zip(first).map(|(&z, v)| (z, to_pairs(v))).collect() };
    let mut panels: Vec<Panel> = Vec::with_capacity(pts.len() + 1);
    let mut edges: Vec<(f64, Option<usize>)> = vec![(-LIMIT, None)];
    edges.extend(pts.iter().enumerate().map(|(i, &z)| (z, Some(i))));
    edges.push((LIMIT, None));
    for w in edges.windows(2) {
        panels.push(Panel::new(w[0].0, w[1].0, w[0].1, w[1].1));
    }
    for p in panels.iter_mut() {
        p.est = (0..nq).map(|q| d.estimate(p, q)).collect();
    }
    let trunc: Vec<f64> = specs.iter().map(|s| s.range.0.abs().max(s.range.1.abs()) * OMITTED_MASS).collect();
    let mut converged;
    loop {
        // Totals and the integrands still over their tolerance.
        let mut over: Vec<(usize, f64)> = Vec::new();
        for q in 0..nq {
            if !specs[q].target {
                continue;
            }
            let (mut v, mut e) = (0.0, trunc[q]);
            for p in &panels {
                v += p.est[q].value;
                e += p.est[q].quad;
            }
            let tol = opts.tol.abs.max(opts.tol.rel * v.abs());
            if e > tol {
                over.push((q, tol));
            }
        }
        converged = over.is_empty();
        if converged || nodes >= opts.max_nodes || stop() {
            break;
        }
        // Mark, per integrand over its tolerance, its worst panels until the rest hold at most half of it.
        let mut score = vec![0.0f64; panels.len()];
        for &(q, tol) in &over {
            let mut order: Vec<usize> = (0..panels.len()).filter(|&i| !panels[i].last).collect();
            order.sort_by(|&i, &j| panels[j].est[q].quad.total_cmp(&panels[i].est[q].quad));
            let mut rest: f64 = trunc[q] + panels.iter().map(|p| p.est[q].quad).sum::<f64>();
            for i in order {
                if rest <= 0.5 * tol {
                    break;
                }
                rest -= panels[i].est[q].quad;
                score[i] = score[i].max(panels[i].est[q].quad / tol);
            }
        }
        let mut marked: Vec<usize> = (0..panels.len()).filter(|&i| score[i] > 0.0).collect();
        if marked.is_empty() {
            break;
        }
        marked.sort_by(|&i, &j| score[j].total_cmp(&score[i]));
        // Actions within the node budget: a Kronrod estimate or a bisection.
        let mut gk_jobs: Vec<usize> = Vec::new();
        let mut split_jobs: Vec<usize> = Vec::new();
        let mut budget = opts.max_nodes.saturating_sub(nodes);
        for i in marked {
            let p = &panels[i];
            let far = p.a >= 10.0 || p.b <= -10.0;
            if p.gk.is_none() && (p.b - p.a <= MAX_GK_WIDTH || far) {
                if budget < 15 {
                    continue;
                }
                budget -= 15;
                gk_jobs.push(i);
            } else {
                if budget < 1 {
                    continue;
                }
                budget -= 1;
                split_jobs.push(i);
            }
        }
        if gk_jobs.is_empty() && split_jobs.is_empty() {
            break;
        }
        let mut zs: Vec<f64> = Vec::with_capacity(15 * gk_jobs.len() + split_jobs.len());
        let rules: Vec<[(f64, f64, f64); 15]> = gk_jobs.iter().map(|&i| gk15(panels[i].a, panels[i].b)).collect();
        for r in &rules {
            zs.extend(r.iter().map(|n| n.0));
        }
        let mids: Vec<f64> = split_jobs.iter().map(|&i| 0.5 * (panels[i].a + panels[i].b)).collect();
        zs.extend(&mids);
        let mut vals = evaluate_all(&zs, opts.parallel, &f).into_iter();
        nodes += zs.len();
        gauss_nodes += 7 * gk_jobs.len();
        for (&i, rule) in gk_jobs.iter().zip(&rules) {
            let at: Vec<Vec<Value>> = (0..15).map(|_| vals.next().expect("a value per node")).collect();
            // ln of the Kronrod weight times phi at each node, for the logarithm of tiny integrals.
            let lnw: Vec<f64> = rule.iter().map(|n| n.1.ln() + ln_pdf(n.0)).collect();
            let phi: Vec<f64> = rule.iter().map(|n| ln_pdf(n.0).exp()).collect();
            let gk = (0..nq)
                .map(|q| {
                    let mut fv = [0.0; 15];
                    let mut node = 0.0;
                    let mut max_ln = f64::NEG_INFINITY;
                    for j in 0..15 {
                        let v = at[j][q];
                        fv[j] = phi[j] * v.value;
                        node += rule[j].1 * phi[j] * v.abs_err;
                        max_ln = max_ln.max(lnw[j] + v.ln_value);
                    }
                    let (k, err, _) = qk15(rule, &fv);
                    let ln = if k > 1e-290 || max_ln == f64::NEG_INFINITY {
                        ln_of(k)
                    } else {
                        let s: f64 = (0..15).map(|j| (lnw[j] + at[j][q].ln_value - max_ln).exp()).sum();
                        max_ln + s.ln()
                    };
                    Est { value: k, ln, quad: err, node: node * (1.0 + 32.0 * U) }
                })
                .collect();
            panels[i].gk = Some(gk);
            panels[i].est.clear();
        }
        // Bisections, from the highest index so that the indices still to visit stay valid.
        let mut splits: Vec<(usize, f64, Vec<Value>)> =
            split_jobs.iter().zip(&mids).map(|(&i, &m)| (i, m, vals.next().expect("a value per node"))).collect();
        splits.sort_by_key(|y| std::cmp::Reverse(y.0));
        for (i, m, v) in splits {
            let p = &panels[i];
            if !(m > p.a && m < p.b) || (p.b - p.a) <= 1e-12 * (1.0 + m.abs()) {
                panels[i].last = true;
                continue;
            }
            let e = d.ends.len();
            d.ends.push((m, to_pairs(v)));
            let (a, b, l, r) = (p.a, p.b, p.left, p.right);
            let left = Panel::new(a, m, l, Some(e));
            let right = Panel::new(m, b, Some(e), r);
            panels.splice(i..=i, [left, right]);
        }
        for p in panels.iter_mut().filter(|p| p.est.is_empty()) {
            p.est = (0..nq).map(|q| d.estimate(p, q)).collect();
        }
    }
    let integrals = (0..nq)
        .map(|q| {
            let mut s = Sum::default();
            let (mut quad, mut node) = (trunc[q], 0.0);
            let mut max_ln = f64::NEG_INFINITY;
            for p in &panels {
                let e = p.est[q];
                s.add(e.value);
                quad += e.quad;
                node += e.node;
                max_ln = max_ln.max(e.ln);
            }
            let value = s.value();
            let ln_value = if value > 1e-290 || max_ln == f64::NEG_INFINITY {
                ln_of(value)
            } else {
                let t: f64 = panels.iter().map(|p| (p.est[q].ln - max_ln).exp()).sum();
                max_ln + t.ln()
            };
            Integral { value, ln_value, quad_err: quad + s.error_bound(), node_err: node }
        })
        .collect();
    let panels = panels
        .iter()
        .map(|p| PanelOut { a: p.a, b: p.b, kronrod: p.gk.is_some(), left: p.left, right: p.right })
        .collect();
    Outcome { integrals, panels, ends: d.ends, nodes, gauss_nodes, converged }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// K15 integrates x^m exactly for m <= 22 and G7 for m <= 13 on [-1, 1] (int x^m = 2/(m+1) for even m).
    #[test]
    fn rule_constants_are_exact() {
        let rule = gk15(-1.0, 1.0);
        for m in 0..=23u32 {
            let want = if m % 2 == 0 { 2.0 / (m as f64 + 1.0) } else { 0.0 };
            let k: f64 = rule.iter().map(|n| n.1 * n.0.powi(m as i32)).sum();
            let g: f64 = rule.iter().map(|n| n.2 * n.0.powi(m as i32)).sum();
            if m <= 22 {
                assert!((k - want).abs() < 1e-15, "Kronrod, degree {m}: {k} vs {want}");
            }
            if m <= 13 {
                assert!((g - want).abs() < 1e-15, "Gauss, degree {m}: {g} vs {want}");
            }
        }
        // The Gauss rule misses degree 14 and the Kronrod rule degree 24, as rules of their orders must.
        let g14: f64 = rule.iter().map(|n| n.2 * n.0.powi(14)).sum();
        assert!((g14 - 2.0 / 15.0).abs() > 1e-6);
        assert!(rule.iter().all(|n| n.1 > 0.0));
    }

    fn value(v: f64) -> Value {
        Value { value: v, ln_value: v.ln(), abs_err: 0.0, rel_err: 0.0, kind: crate::engine::BoundKind::Rigorous }
    }

    /// E[Phi(a + b Z)] = Phi(a / sqrt(1 + b^2)) (a standard identity of the normal law) for a smooth and a steep
    /// integrand, both decreasing in z, and E[1] = 1.
    #[test]
    fn normal_identities_within_their_estimates() {
        let cases = [(-1.3f64, -0.7f64), (0.4, -40.0), (-6.0, -300.0), (2.0, -5.0)];
        let specs: Vec<Spec> = cases
            .iter()
            .map(|_| Spec::new(Shape::Decreasing, (0.0, 1.0)))
            .chain([Spec::new(Shape::Free, (0.0, 1.0))])
            .collect();
        let breaks: Vec<f64> = cases.iter().map(|&(a, b)| -a / b).collect();
        let opts = Options { tol: Tol { rel: 1e-10, abs: 1e-15 }, max_nodes: 5000, parallel: false };
        let f =
            |z: f64| -> Vec<Value> { cases.iter().map(|&(a, b)| value(cdf(a + b * z))).chain([value(1.0)]).collect() };
        let out = integrate(&specs, &breaks, &opts, f, &|| false);
        assert!(out.converged);
        for (i, &(a, b)) in cases.iter().enumerate() {
            let want = cdf(a / (1.0 + b * b).sqrt());
            let got = out.integrals[i];
            let err = (got.value - want).abs();
            assert!(err <= got.quad_err + 1e-16, "case {i}: {} vs {want}, estimate {}", got.value, got.quad_err);
            assert!(err <= 1e-9 * want, "case {i}: {} vs {want}", got.value);
        }
        assert!((out.integrals[4].value - 1.0).abs() < 1e-12);
    }
}
