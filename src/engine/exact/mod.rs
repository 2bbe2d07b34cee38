//! The exact method: P(S >= k), P(S <= k) and P(S = k) to floating-point accuracy, with a rigorous bound,
//! far tails included.
//!
//! How. For each threshold the law is tilted by exp(t S) (the Esscher transform; Keich 2005 uses the same
//! device for sums of discrete variables) with t solving K'(t) = k, so that the tilted law is centred on the
//! threshold. Then
//!   P(S = j) = exp(K(t) - t j) P_t(S = j),
//! and a tail sum beyond k weights P_t by exp(-t (j - k)) <= 1. Every quantity computed in the tilted world is
//! of order 1 / sd, so an absolute error there is a relative error of the answer, whether it is 1e-3 or 1e-4000;
//! the logarithm is returned as well, since such values underflow f64.
//!
//! From 321 exposures, a book of counts takes the tilted law from its characteristic function
//! (`characteristic`, docs/characteristic.md): power sums of the probabilities, a few hundred samples of the tilted
//! generating function, one inverse FFT, in O(n M + N log N) with M about 14 terms at 10^6 exposures, and an
//! error bound that does not grow with n (2e-14 to 4e-14 relative at z = 5 sd from 10^3 to 10^6). Where its series
//! does not converge fast enough (probabilities near 1/2 or above, far tilts), and for smaller books, the tree.
//! Books in units (`lattice`) of as many exposures on lattices wider than 4,096 steps take it from their
//! characteristic function as well (`characteristic_lattice`): about a hundred samples, each a product over the
//! exposures, certified by a grid bound on |phi| for the rest. Otherwise the tree:
//!
//! The tilted law is the product of its parts (`leaf`): Bernoulli exposures in blocks by direct recursion,
//! binomial and Poisson parts from closed-form ratio recurrences. The parts are multiplied smallest-first
//! (`convolve`), each product by direct convolution or FFT, whichever is cheaper, and each truncated to the
//! counts where its tilted law holds more than exp(-75) of mass by Bernstein's inequality (`window`). So the
//! cost is about n log(n) for the leaves and O(sd log sd) for the widest products, and memory is O(n).
//!
//! The error bound adds, rigorously under the floating-point model stated in `float`: the rounding of every
//! tilted probability and every product (relative, since all terms are non-negative), the FFT's bound
//! (absolute, `fft`), the truncated mass (absolute), the rounding of K(t) and of the final tail sum.

pub mod characteristic;
pub mod characteristic_lattice;
pub mod convolve;
pub mod fft;
pub mod lattice;
pub mod leaf;
pub mod leave_one_out;
pub mod small;
pub mod window;

use crate::engine::interrupt;
use crate::engine::numerics::cgf::{self, TiltConsts};
use crate::engine::numerics::float::{gamma, log1m_exp, up, Sum, U};
use crate::engine::numerics::moments::Moments;
use crate::engine::vocabulary::{BoundKind::Rigorous, Estimate, MethodId, Prepared, Side, TailMethod, Value};
use crate::portfolio::Model;
use std::time::Instant;
use window::Window;

/// Statistics of one evaluation, for the response and for benchmarks.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Work {
    /// Number of tilted laws built (one per cluster of nearby thresholds).
    pub tilts: usize,
    /// Widest window held.
    pub max_window: usize,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Dir {
    /// Sum over j >= target (tilt t >= 0).
    Up,
    /// Sum over j <= target (tilt t <= 0).
    Down,
}

#[derive(Debug, Clone, Copy)]
struct Job {
    idx: usize,
    target: u64,
    dir: Dir,
    point: bool,
    complement: bool,
}

/// The tilted law of the whole portfolio at t, with K(t).
pub struct Tilted {
    pub t: f64,
    pub window: Window,
    pub scale: cgf::Scale,
    pub var: f64,
    /// The samples the window came from, when built by the characteristic function: tails are read from them
    /// (`characteristic::Spectrum::tail`) without the inverse FFT's error.
    pub spectrum: Option<Box<characteristic::Spectrum>>,
}

/// Build the tilted law at t over its Bernstein window (support shifted by the certain exposures): by the
/// characteristic function (`characteristic`) for books of counts from `characteristic::MIN_EXPOSURES`
/// exposures where its series converges, by the product tree otherwise.
pub fn tilted(model: &Model, t: f64) -> Tilted {
    if model.weighted() {
        return lattice::tilted(model, t);
    }
    if let Some(law) = characteristic::tilted(model, t) {
        return law;
    }
    tilted_tree(model, t)
}

/// The tilted law at t by the product tree of leaves (`leaf`, `convolve`), for books of counts.
pub fn tilted_tree(model: &Model, t: f64) -> Tilted {
    let c = TiltConsts::new(t);
    let mut parts: Vec<Window> =
        Vec::with_capacity(model.bernoulli.len().div_ceil(leaf::BLOCK) + model.binomials.len() + 1);
    // Exposures whose tilt's rounding is counted on their odds, once for the whole product.
    let mut odds = 0usize;
    for (i, ch) in model.bernoulli.chunks(leaf::BLOCK).enumerate() {
        // A stopped computation's result is thrown away: a point mass keeps what follows well defined.
        if i % 1024 == 0 && interrupt::requested() {
            return Tilted { t, var: 0.0, window: Window::point(), scale: cgf::Scale::default(), spectrum: None };
        }
        let (part, at_odds) = leaf::bernoulli_block_odds(ch, &c);
        parts.push(part);
        odds += at_odds;
    }
    for (i, b) in model.binomials.iter().enumerate() {
        if i % 1024 == 0 && interrupt::requested() {
            return Tilted { t, var: 0.0, window: Window::point(), scale: cgf::Scale::default(), spectrum: None };
        }
        parts.push(leaf::binomial(b.size, b.p, &c));
    }
    if model.poisson > 0.0 {
        parts.push(leaf::poisson(model.poisson, &c));
    }
    let mut window = convolve::product_all(parts);
    leaf::add_odds_error(&mut window, odds);
    window.lo += model.shift;
    window.mean += model.shift as f64;
    window.max = window.max.map(|m| m + model.shift);
    Tilted { t, var: window.var, window, scale: cgf::scale(model, t), spectrum: None }
}

/// The exact method as a [`TailMethod`].
pub struct Exact;

impl TailMethod for Exact {
    fn estimate(&self, prep: &Prepared, queries: &[(u64, Side)]) -> Vec<Estimate> {
        let start = Instant::now();
        let (vals, _) = evaluate(prep.model, &prep.moments, queries);
        let per = start.elapsed().as_secs_f64() * 1e6 / queries.len().max(1) as f64;
        vals.into_iter().map(|v| Estimate::of_value(MethodId::Exact, v, per)).collect()
    }
}

/// The answer when the threshold is outside the support or the law is degenerate: exactly 0 or 1.
pub fn trivial(model: &Model, k: u64, side: Side) -> Option<f64> {
    let min = model.support_min();
    let max = model.support_max();
    let above_max = max.is_some_and(|m| k > m);
    match side {
        Side::Upper if k <= min => Some(1.0),
        Side::Upper if above_max => Some(0.0),
        Side::Lower if k < min => Some(0.0),
        Side::Lower if max.is_some_and(|m| k >= m) => Some(1.0),
        Side::Point if k < min || above_max => Some(0.0),
        Side::Point if model.is_degenerate() => Some(1.0),
        _ => None,
    }
}

/// Exact values for each (threshold, side), in the order given.
pub fn evaluate(model: &Model, moments: &Moments, queries: &[(u64, Side)]) -> (Vec<Value>, Work) {
    evaluate_reach(model, moments, queries, 1.5)
}

/// [`evaluate`] with thresholds within `reach` tilted standard deviations of a cluster's first sharing one
/// tilted law (1.5 in `evaluate`). Any tilt gives exact values with rigorous bounds; a wider reach builds fewer
/// laws for many nearby thresholds (the factor model's nodes) at the price of relative accuracy at the ends of a
/// cluster: a tail k tilted sd from the tilt's centre carries the window's absolute error divided by a tilted
/// mass of about exp(-k^2 / 2), 3e-4 at the ends of a cluster of 8 sd, so relative bounds of about 1e-12 at n = 10^5.
pub fn evaluate_reach(model: &Model, moments: &Moments, queries: &[(u64, Side)], reach: f64) -> (Vec<Value>, Work) {
    evaluate_with(model, moments, queries, reach, true)
}

/// [`evaluate`] by tilted laws only, even for a small book: for benchmarks and cross-checks of `small`.
pub fn evaluate_tilted(model: &Model, moments: &Moments, queries: &[(u64, Side)]) -> (Vec<Value>, Work) {
    evaluate_with(model, moments, queries, 1.5, false)
}

fn evaluate_with(
    model: &Model,
    moments: &Moments,
    queries: &[(u64, Side)],
    reach: f64,
    recursion: bool,
) -> (Vec<Value>, Work) {
    let mut out = vec![Value::certain(0.0); queries.len()];
    let mut jobs = Vec::new();
    let mean = moments.mean;
    for (idx, &(k, side)) in queries.iter().enumerate() {
        if let Some(p) = trivial(model, k, side) {
            out[idx] = Value::certain(p);
            continue;
        }
        let kf = k as f64;
        let job = match side {
            Side::Upper if kf > mean => Job { idx, target: k, dir: Dir::Up, point: false, complement: false },
            Side::Upper => Job { idx, target: k - 1, dir: Dir::Down, point: false, complement: true },
            Side::Lower if kf < mean => Job { idx, target: k, dir: Dir::Down, point: false, complement: false },
            Side::Lower => Job { idx, target: k + 1, dir: Dir::Up, point: false, complement: true },
            Side::Point => Job {
                idx,
                target: k,
                dir: if kf >= mean { Dir::Up } else { Dir::Down },
                point: true,
                complement: false,
            },
        };
        jobs.push(job);
    }
    let mut work = Work::default();
    // Small books: one recursion answers every threshold (`small`), unless a value is too small for it.
    if recursion && !jobs.is_empty() && small::takes(model) {
        let open: Vec<(u64, Side)> = jobs.iter().map(|j| queries[j.idx]).collect();
        if let Some(vals) = small::evaluate(model, &open) {
            for (job, v) in jobs.iter().zip(vals) {
                out[job.idx] = v;
            }
            work.max_window = model.random_exposures_bounded() as usize + 1;
            return (out, work);
        }
    }
    for dir in [Dir::Up, Dir::Down] {
        let mut js: Vec<Job> = jobs.iter().copied().filter(|j| j.dir == dir).collect();
        js.sort_by_key(|j| j.target);
        let mut i = 0;
        while i < js.len() {
            if interrupt::requested() {
                break;
            }
            let first = js[i].target;
            let t0 = solve_tilt(model, moments, first as f64, dir);
            let sd0 = cgf::eval_var(model, t0).sqrt();
            // Thresholds within 1.5 tilted sd (by default) share one tilted law: the tail sum there is still >= 5%
            // of the tilted mass, so the absolute errors of the FFT stay relative errors of the same order.
            let end = first as f64 + (reach * sd0).max(1.0);
            let mut j = i;
            while j < js.len() && (js[j].target as f64) <= end {
                j += 1;
            }
            let last = js[j - 1].target;
            let t = if last == first { t0 } else { solve_tilt(model, moments, 0.5 * (first + last) as f64, dir) };
            let law = tilted(model, t);
            work.tilts += 1;
            work.max_window = work.max_window.max(law.window.w.len());
            for job in &js[i..j] {
                out[job.idx] = tail_from(&law, job);
            }
            i = j;
        }
    }
    (out, work)
}

pub(crate) fn solve_tilt(model: &Model, moments: &Moments, x: f64, dir: Dir) -> f64 {
    let mean = moments.mean;
    let lo = model.support_min() as f64 + 0.5;
    let x = match model.support_max() {
        Some(m) if (m as f64) - 0.5 > lo => x.clamp(lo, m as f64 - 0.5),
        _ => x.max(lo.min(mean)),
    };
    // Any t gives exact results; t only steers accuracy, so a coarse solution is enough.
    let sd = moments.sd().max(1.0);
    let t = cap_tilt(model, cgf::solve(model, moments, x, 0.05 * sd.min(10.0)).t, x);
    match dir {
        Dir::Up => t.max(0.0),
        Dir::Down => t.min(0.0),
    }
}

/// t capped where a Poisson part's tilted rate would exceed 4 max(x, 1) events (a compound source's, 4 max(x, 1)
/// / s): any t gives exact values with rigorous bounds, and a larger one only widens that part's window beyond
/// the threshold, or overflows e^t (the solver can return such a t for a book whose only unbounded part is a
/// vanishing rate, as the property tests found: rate 1e-300, t = 1.9e6). A NaN stays NaN (the callers check).
fn cap_tilt(model: &Model, t: f64, x: f64) -> f64 {
    let room = 4.0 * x.max(1.0);
    let mut t = t;
    if model.poisson > 0.0 {
        t = t.min((room / model.poisson).ln());
    }
    for &(s, lam) in &model.scaled_poisson {
        let s = s as f64;
        t = t.min((room / s / lam).ln() / s);
    }
    t
}

/// P(S >= k) read from a tilted law built at t >= 0 (`tilted`, `tilted_tree`, `characteristic::build`): for
/// benchmarks and cross-checks of the ways of building it.
pub fn upper_tail_of(law: &Tilted, k: u64) -> Value {
    tail_from(law, &Job { idx: 0, target: k, dir: Dir::Up, point: false, complement: false })
}

fn tail_from(law: &Tilted, job: &Job) -> Value {
    let w = &law.window;
    let (lo, hi) = (w.lo, w.hi());
    let x = job.target;
    let t = law.t;
    // Weights exp(-t (j - x)) <= 1 on the summed side, by repeated products from j = x outwards; a weight d
    // steps out carries at most 2 d roundings, hence the mean distance dbar in the bound.
    let rho = (-t.abs()).exp();
    if let Some(spec) = law.spectrum.as_deref() {
        if let Some((sum, rel, abs)) = spec.tail(x, job.dir == Dir::Up, job.point, t) {
            return complement_of(finish(law, x, sum, 0.0, 0, rel, abs), job.complement);
        }
    }
    let (sum, dsum, terms) = if job.point {
        if (lo..=hi).contains(&x) {
            let v = w.w[(x - lo) as usize];
            (v, 0.0, 1)
        } else {
            (0.0, 0.0, 0)
        }
    } else {
        walk(w, x, job.dir, rho, |_| 1.0)
    };
    // The absolute part of the window's error, e, enters the sum as sum_j e_j rho^|j - x| over the summed side:
    // at most ||e||_1, and at most max |e_j| times the sum of the weights, 1 / (1 - e^-|t|) (one term for P(S = x)).
    let weights = if job.point {
        1.0
    } else if t != 0.0 {
        up(1.0 / -(-t.abs()).exp_m1()) * (1.0 + 1e-12)
    } else {
        f64::INFINITY
    };
    // And at most ||e||_2 times the 2-norm of the weights, (1 / (1 - e^-2|t|))^(1/2) (Cauchy-Schwarz).
    let weights2 = if job.point {
        1.0
    } else if t != 0.0 {
        up(up(1.0 / -(-2.0 * t.abs()).exp_m1()).sqrt()) * (1.0 + 1e-12)
    } else {
        f64::INFINITY
    };
    let abs = w.abs.min(w.inf * weights).min(w.l2 * weights2);
    complement_of(finish(law, x, sum, dsum, terms, w.rel, abs), job.complement)
}

/// The tail itself, or 1 minus it for the other side.
fn complement_of(tail: Value, complement: bool) -> Value {
    if !complement {
        return tail;
    }
    // 1 - P where P < 1/2-ish: the absolute error carries over and the logarithm comes from log1m_exp.
    let p = (1.0 - tail.value).max(0.0);
    let ln_p = log1m_exp(tail.ln_value);
    let abs_err = up(tail.abs_err + U * p);
    Value {
        value: p,
        ln_value: ln_p,
        rel_err: if p > 0.0 { up(abs_err / p) } else { f64::INFINITY },
        abs_err,
        kind: Rigorous,
    }
}

/// The weighted sum over the window from x outwards in `dir`: sum_j w_j rho^|j - x| h(j), with the
/// distance-weighted sum sum_j v_j |j - x| (for the rounding bound) and the roundings of the summation
/// that [`finish`] counts (its `terms`). The weights rho^d <= 1 are formed by repeated products from x, so a
/// weight d steps out carries at most 2 d roundings; the walk stops where the weight underflows to 0. The terms
/// are non-negative and summed by Neumaier's compensated summation, within 2 U + 2 gamma(4 n + 4) U of their
/// exact sum (`float::Sum::error_bound`), which gamma(3) covers for any n below 10^15: so 2 is returned as
/// the count (0 when nothing was added). A plain sum of n terms would need gamma(n + 1), 4.4e-13 for the
/// 4,000 terms of a tail at 10^6 exposures, more than the rest of the bound there.
fn walk(w: &Window, x: u64, dir: Dir, rho: f64, h: impl Fn(u64) -> f64) -> (f64, f64, usize) {
    let (lo, hi) = (w.lo, w.hi());
    let (mut sum, mut dsum, mut terms) = (Sum::default(), 0.0f64, 0usize);
    let mut add = |j: u64, wt: f64, d: f64| {
        let v = w.w[(j - lo) as usize] * wt * h(j);
        sum.add(v);
        dsum += v * d;
        terms += 1;
    };
    match dir {
        Dir::Up => {
            let start = x.max(lo);
            let mut wt = if start > x { rho.powf((start - x) as f64) } else { 1.0 };
            let mut d = (start - x) as f64;
            let mut j = start;
            while j <= hi && wt > 0.0 {
                add(j, wt, d);
                wt *= rho;
                d += 1.0;
                j += 1;
            }
        }
        Dir::Down => {
            if x >= lo {
                let end = x.min(hi);
                let mut wt = if end < x { rho.powf((x - end) as f64) } else { 1.0 };
                let mut d = (x - end) as f64;
                let mut j = end;
                while wt != 0.0 {
                    add(j, wt, d);
                    if j == lo {
                        break;
                    }
                    wt *= rho;
                    d += 1.0;
                    j -= 1;
                }
            }
        }
    }
    debug_assert!(terms < 1 << 50);
    (sum.value(), dsum, terms.min(2))
}

/// ln P = K(t) - t x + ln T, and its error bound.
pub(crate) fn finish(law: &Tilted, x: u64, sum: f64, dsum: f64, terms: usize, rel: f64, abs: f64) -> Value {
    finish_capped(law, x, sum, dsum, terms, rel, abs, 1.0)
}

/// [`finish`] for a value that may exceed 1 (an expectation): `cap` is the largest value the truth can take.
#[allow(clippy::too_many_arguments)]
fn finish_capped(law: &Tilted, x: u64, sum: f64, dsum: f64, terms: usize, rel: f64, abs: f64, cap: f64) -> Value {
    finish_scaled(&law.scale, law.t, x, sum, dsum, terms, rel, abs, cap)
}

/// [`finish_capped`] with the scale K(t) given apart from a law (a law with one exposure left out).
#[allow(clippy::too_many_arguments)]
pub(crate) fn finish_scaled(
    scale: &cgf::Scale,
    t: f64,
    x: u64,
    sum: f64,
    dsum: f64,
    terms: usize,
    rel: f64,
    abs: f64,
    cap: f64,
) -> Value {
    let (ln_scale, ln_scale_lo, scale_err) = scale.ln_scale_dd(t, x as f64);
    if sum <= 0.0 {
        // Nothing in the window: the truth is at most the window's absolute error, scaled back.
        let bound = abs.max(f64::MIN_POSITIVE);
        let ln_bound = ln_scale + bound.ln();
        return Value {
            value: 0.0,
            ln_value: f64::NEG_INFINITY,
            rel_err: f64::INFINITY,
            abs_err: up(ln_bound.exp()),
            kind: Rigorous,
        };
    }
    let dbar = dsum / sum;
    let sum_rel = gamma(terms as f64 + 1.0) + gamma(2.0 * dbar + 2.0);
    // |T^ - T| <= rel T + abs + sum_rel T^, with T <= (T^ + abs) / (1 - rel).
    let t_upper = (sum + abs) / (1.0 - rel);
    let e_t = rel * t_upper + abs + sum_rel * sum;
    let delta_t = if e_t < sum { -(-e_t / sum).ln_1p() } else { f64::INFINITY };
    let ln_t = sum.ln();
    let ln_p = ln_scale + (ln_scale_lo + ln_t);
    // The probability from exp(hi) * (1 + lo) * T: no ulp of a large logarithm is lost in the exponential.
    let direct = ln_scale.exp() * (1.0 + ln_scale_lo) * sum;
    let use_direct = ln_scale > -700.0 && direct.is_normal();
    // Rounding of ln_scale (its own bound), of ln T, of the exponential and products (a few ulps), and of the
    // returned logarithm where the probability comes from it.
    let delta_ln = scale_err + 2.0 * U * ln_t.abs() + if use_direct { 6.0 * U } else { 2.0 * U * ln_p.abs() + 2.0 * U };
    let rel_err = up(((delta_t + delta_ln) * (1.0 + 1e-6)).exp_m1() * 1.01);
    let p = if use_direct { direct.min(cap) } else { ln_p.min(cap.ln()).exp() };
    let ln_p = ln_p.min(cap.ln());
    let abs_err = if rel_err.is_finite() { up(p * rel_err) } else { 1.0 };
    Value { value: p, ln_value: ln_p, rel_err, abs_err, kind: Rigorous }
}

/// E[min((S - a)+, l)], the expected number of events in the count layer (a, a + l], exactly and with a
/// rigorous bound; `limit` None means no cap, E[(S - a)+]. With loss units, `a`, `limit` and the value are in
/// units and the sum runs over the lattice points S = offset + span j (the stop-loss premium of the layer).
///
/// How. The layer's expectation is sum over the points s > a of min(s - a, l) P(S = s). Above the mean it is
/// a far-tail sum like any other: tilt to the first lattice index x with s(x) > a and weight the tilted law by
/// min(s(j) - a, l) exp(-t (j - x)). With c = s(x) - a (1 for a count, at most the span h above the offset)
/// that weight is (c + h d) e^(-t d) at d = j - x >= 0, at most c when t c / h >= 1 and h e^(t c / h - 1) / t
/// otherwise (and at most l), so the window's absolute L1 error (truncated points included) enters multiplied
/// by that. Below the mean with a cap, the untilted law with weights <= l does. Below the mean without a cap,
/// E[(S - a)+] = E[S] - a + E[(a - S)+], the last term a lower-tail sum of the same kind; E[S] is the
/// compensated mean, exact to a few ulps (counted in the bound).
pub fn layer_expectation(model: &Model, moments: &Moments, a: u64, limit: Option<u64>) -> Value {
    let l = limit.map(|l| l as f64).unwrap_or(f64::INFINITY);
    let (h, offset) = (model.span(), model.offset);
    if l == 0.0 || model.support_max().is_some_and(|m| model.units_of(m) <= a) {
        return Value::certain(0.0);
    }
    if model.is_degenerate() {
        let s = model.units_of(model.shift) as f64;
        return Value::certain((s - a as f64).max(0.0).min(l));
    }
    // The first lattice index above a.
    let x = if a < offset { 0 } else { (a - offset) / h + 1 };
    if (x as f64) > moments.mean || l.is_finite() {
        let t = if (x as f64) > moments.mean { solve_tilt(model, moments, x as f64, Dir::Up) } else { 0.0 };
        let law = tilted(model, t);
        // The tilt the law was built at (on a lattice t is rounded so that t u is exact).
        let t = law.t;
        let mut sup = weight_sup(t, (model.units_of(x) - a) as f64, h as f64).min(l);
        if let (true, Some(m)) = (model.weighted(), model.support_max()) {
            // Every weight is also at most the largest excess s(max) - a (e^(-t d) <= 1), which binds for a
            // tilt near 0 where the bound above grows like 1 / t. (It would tighten a count's bound too; kept
            // to units so that answers about counts stay as they were.)
            sup = sup.min((model.units_of(m) - a) as f64);
        }
        let rho = (-t).exp();
        let w = &law.window;
        let (sum, dsum, terms) = walk(w, x, Dir::Up, rho, |j| ((model.units_of(j) - a) as f64).min(l));
        // One more rounding per term for the product by h.
        return finish_capped(&law, x, sum, dsum, terms, compose_rel(w.rel), w.abs * sup, f64::INFINITY);
    }
    // Below the mean, uncapped: E[S] - a + E[(a - S)+].
    let below = lower_deficit(model, moments, a);
    let mean_err = 4.0 * U * moments.mean.abs() + gamma(model.bernoulli.len() as f64 + 8.0) * moments.mean.abs();
    if model.weighted() {
        // In units: E[S] = offset + h E[j], its error h times that of E[j] plus two roundings.
        let mean = offset as f64 + h as f64 * moments.mean;
        let p = mean - a as f64 + below.value;
        let abs_err = up(below.abs_err + h as f64 * mean_err + 4.0 * U * mean.abs() + 2.0 * U * p.abs());
        return Value { value: p, ln_value: p.ln(), rel_err: up(abs_err / p), abs_err, kind: Rigorous };
    }
    let base = moments.mean - a as f64;
    let p = base + below.value;
    let abs_err = up(below.abs_err + mean_err + 2.0 * U * p.abs());
    Value { value: p, ln_value: p.ln(), rel_err: up(abs_err / p), abs_err, kind: Rigorous }
}

/// The largest (c + h d) e^(-s d) over d >= 0: c when s c / h >= 1, h e^(s c / h - 1) / s otherwise (the
/// maximum at d = 1 / s - c / h), unbounded at s = 0 (the caller caps it). For a count (c = h = 1): 1 when
/// s >= 1, e^(s - 1) / s otherwise; with units the value is rounded up by one part in 10^12 to cover the
/// roundings of c / h, the product and the exponential.
fn weight_sup(s: f64, c: f64, h: f64) -> f64 {
    if s <= 0.0 {
        return f64::INFINITY;
    }
    let r = c / h;
    let v = if s * r >= 1.0 { c } else { h * (s * r - 1.0).exp() / s };
    if c == 1.0 && h == 1.0 {
        v
    } else {
        v * (1.0 + 1e-12)
    }
}

/// E[(a - S)+] = sum over the points s < a of (a - s) P(S = s), by a downward tilt to the last lattice index
/// below a (0 when a is at or below the support's first point).
fn lower_deficit(model: &Model, moments: &Moments, a: u64) -> Value {
    let (h, offset) = (model.span(), model.offset);
    if a <= model.units_of(model.support_min()) {
        return Value::certain(0.0);
    }
    let x = (a - offset - 1) / h;
    let t = if (x as f64) < moments.mean { solve_tilt(model, moments, x as f64, Dir::Down) } else { 0.0 };
    let law = tilted(model, t);
    let t = law.t;
    let w = &law.window;
    let rho = t.exp();
    // Weights (a - s(j)) e^(t (x - j)) for j <= x, t <= 0: with c = a - s(x), (c + h d) e^(-|t| d), bounded
    // as above, or the largest deficit a - s(support_min) when t = 0.
    let largest = (a - model.units_of(model.support_min())) as f64;
    let sup = if t < 0.0 && model.weighted() {
        // As above: every weight is at most the largest deficit, which binds for a tilt near 0.
        weight_sup(-t, (a - model.units_of(x)) as f64, h as f64).min(largest)
    } else if t < 0.0 {
        weight_sup(-t, (a - model.units_of(x)) as f64, h as f64)
    } else {
        largest
    };
    let (sum, dsum, terms) = walk(w, x, Dir::Down, rho, |j| (a - model.units_of(j)) as f64);
    finish_capped(&law, x, sum, dsum, terms, compose_rel(w.rel), w.abs * sup, f64::INFINITY)
}

/// The window's relative error with one more rounding (a product by an exactly represented weight).
fn compose_rel(rel: f64) -> f64 {
    crate::engine::numerics::float::compose(rel, U)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The naive O(n^2) recursion P_j <- P_j (1 - p) + P_{j-1} p over the whole support, in f64.
    fn naive(ps: &[f64]) -> Vec<f64> {
        let mut w = vec![1.0];
        for &p in ps {
            w.push(0.0);
            for j in (1..w.len()).rev() {
                w[j] = w[j] * (1.0 - p) + w[j - 1] * p;
            }
            w[0] *= 1.0 - p;
        }
        w
    }

    /// Every count and side of a heterogeneous portfolio against the naive recursion, down to 1e-250, with
    /// the rigorous bound covering the difference (the naive sums are accurate to a few ulps each).
    #[test]
    fn every_count_and_side_matches_the_naive_recursion() {
        let ps: Vec<f64> = (0..150).map(|i| 0.003 + 0.4 * ((i * 37 % 101) as f64 / 101.0).powi(3)).collect();
        let model = Model::from_parts(&ps, &[], 0.0);
        let moments = Moments::of(&model);
        let pmf = naive(&ps);
        let mut queries = Vec::new();
        for k in 0..=ps.len() as u64 {
            queries.extend([(k, Side::Upper), (k, Side::Lower), (k, Side::Point)]);
        }
        let (vals, _) = evaluate(&model, &moments, &queries);
        for (v, &(k, side)) in vals.iter().zip(&queries) {
            let k = k as usize;
            let truth: f64 = match side {
                Side::Upper => pmf[k..].iter().rev().sum(),
                Side::Lower => pmf[..=k].iter().sum(),
                Side::Point => pmf[k],
            };
            if truth < 1e-250 {
                continue;
            }
            let diff = (v.value - truth).abs();
            assert!(diff <= 1e-11 * truth, "k={k} {side:?}: {} vs {truth}", v.value);
            assert!(diff <= v.abs_err + 1e-14 * truth, "k={k} {side:?}: bound {} < {diff}", v.abs_err);
        }
    }
}
