//! The exact method on a lattice: losses in units (the individual risk model), where exposure i adds u_i
//! lattice steps when its event happens. The tilt, the windows and the error accounting are those of the
//! count (`mod.rs`, `window`, `leaf`); what changes is structural:
//!
//! - each exposure is tilted by exp(t u_i X_i): q_i = p e^(t u_i) / (1 - p + p e^(t u_i)), and K(t) sums
//!   ln(1 - p + p e^(t u_i)) (`cgf`). The tilt t is rounded to 21 significant bits first, so that t u_i
//!   (u_i <= 1e9 < 2^30) is exact in f64 and the leaves and K(t) tilt by exactly the same exp(t S); any t
//!   gives exact values, t only steers accuracy;
//! - a Bernoulli block's recursion shifts by u_i: w'_j = w_j (1 - q) + w_(j - u) q, every term non-negative,
//!   so each entry keeps the same relative error per exposure as for a count;
//! - a binomial group of u steps each is the tilted Binomial(m, q(t u)) of the count, spread onto every u-th
//!   lattice point;
//! - a compound Poisson source is one Poisson part per event size s (`Model::scaled_poisson`): tilted by
//!   exp(t s N) it is Poisson(lambda e^(t s)), truncated by its own Bernstein window in events, and spread onto
//!   every s-th lattice point. It is unbounded, but a Poisson law is the limit of sums of rare Bernoulli
//!   events of s steps each, so Bernstein's inequality holds for the products with b = s as well;
//! - exposures are blocked in order of their units, and each product is truncated where the exact product
//!   of its factors leaves at most exp(-TRUNC_LN) on each side, by Bennett's inequality above with the largest
//!   step among its own summands, and below by the lower tail of a sum of non-negative summands, free of the
//!   step (`Part`, docs/accuracy.md "Truncation on a lattice"): a law of rare events of many units each is far
//!   shorter than Bernstein's radius with the book's largest step would say. A block's own recursion stops
//!   at its upper cut (mass only moves up in it, so the points kept are exact).
//!
//! Also here: a question about S in units as one about the lattice index (`query`).

use super::window::{self, Window};
use super::{convolve, leaf, Tilted};
use crate::engine::interrupt;
use crate::engine::numerics::cgf::{self, tilt_qr, TiltConsts, TILT_REL};
use crate::engine::numerics::float::{compose, gamma};
use crate::engine::Side;
use crate::portfolio::Model;

/// A question about S in units as one about the lattice index j, where S = offset + span j: `Ok((j, side))`,
/// or `Err(p)` when the answer is exactly p (a point off the lattice, or a lower tail below its first point).
pub fn query(model: &Model, k: u64, side: Side) -> Result<(u64, Side), f64> {
    let h = model.span();
    let below = k < model.offset;
    let d = k.saturating_sub(model.offset);
    match side {
        // S >= k iff j >= ceil((k - offset) / h); every j >= 0 when k is at or below the offset.
        Side::Upper => Ok((if below { 0 } else { d.div_ceil(h) }, side)),
        Side::Lower if below => Err(0.0),
        Side::Lower => Ok((d / h, side)),
        Side::Point if below || d % h != 0 => Err(0.0),
        Side::Point => Ok((d / h, side)),
    }
}

/// Exposures per Bernoulli block on a lattice: twice the count's `leaf::BLOCK`, since a block's recursion
/// here runs over its whole width while every product above it is an FFT of about that width (measured on the
/// books of `examples/time_units`: 64 is as fast as 32 and its bound 2.6 times smaller, 128 is slower).
const BLOCK: usize = 64;

/// Lattices up to this many steps wide are multiplied whole by direct convolution (at most about 4096^2
/// multiply-adds in all, smallest first).
pub(crate) const KEEP_WHOLE: u64 = 4096;

/// t rounded to 21 significant bits, so that t u is exact for every u < 2^30 (see the module note).
pub fn round_tilt(t: f64) -> f64 {
    if t == 0.0 || !t.is_finite() {
        return t;
    }
    let e = t.abs().log2().floor() as i32;
    let scale = 2f64.powi(20 - e);
    (t * scale).round() / scale
}

/// The tilted law of a model with loss units, at t (rounded by [`round_tilt`]).
/// Below `characteristic::MIN_EXPOSURES` random exposures, on narrow lattices and where the samples would cost
/// more than the tree, by the product tree ([`tilted_tree`]); otherwise from the characteristic function
/// (`characteristic_lattice`).
pub fn tilted(model: &Model, t: f64) -> Tilted {
    let t = round_tilt(t);
    if let Some(law) = super::characteristic_lattice::tilted(model, t) {
        return law;
    }
    tilted_tree(model, t)
}

/// The tilted law of a model with loss units at t (rounded by [`round_tilt`]) by the product tree.
pub fn tilted_tree(model: &Model, t: f64) -> Tilted {
    let t = round_tilt(t);
    let stopped = |t| Tilted { t, var: 0.0, window: Window::point(), scale: cgf::Scale::default(), spectrum: None };
    let step = |v: &[u64], i: usize| v.get(i).copied().unwrap_or(1);
    // Exposures in blocks of similar units (sorted by units, ties in their given order): a block of small
    // units spans few steps and its truncation is placed for its own largest step (`Part`).
    let mut order: Vec<usize> = (0..model.bernoulli.len()).collect();
    order.sort_by_key(|&i| step(&model.units, i));
    let mut parts: Vec<Part> = Vec::with_capacity(model.bernoulli.len().div_ceil(BLOCK) + model.binomials.len() + 1);
    for (i, ch) in order.chunks(BLOCK).enumerate() {
        if i % 1024 == 0 && interrupt::requested() {
            return stopped(t);
        }
        let ps: Vec<f64> = ch.iter().map(|&j| model.bernoulli[j]).collect();
        let us: Vec<u64> = ch.iter().map(|&j| step(&model.units, j)).collect();
        parts.push(block_part(&ps, &us, t));
    }
    for (i, b) in model.binomials.iter().enumerate() {
        if i % 1024 == 0 && interrupt::requested() {
            return stopped(t);
        }
        let u = step(&model.group_units, i);
        let (q, _) = tilt_qr(b.p, &TiltConsts::new(t * u as f64));
        let uf = u as f64;
        let w = spread(leaf::binomial(b.size, b.p, &TiltConsts::new(t * uf)), u);
        parts.push(Part { w, step: uf, m2: b.size as f64 * uf * uf * q });
    }
    if model.poisson > 0.0 {
        let w = leaf::poisson(model.poisson, &TiltConsts::new(t));
        // For a Poisson part the second moment that bounds the lower tail is its variance (`Part`).
        parts.push(Part { m2: w.var, w, step: 1.0 });
    }
    for &(s, lam) in &model.scaled_poisson {
        // A compound source's events of s steps: Poisson(lambda e^(t s)) on every s-th lattice point.
        let w = spread(leaf::poisson(lam, &TiltConsts::new(t * s as f64)), s);
        parts.push(Part { m2: w.var, w, step: s as f64 });
    }
    // A lattice with gaps can leave the tilted law little mass at the threshold itself (a total reached only
    // by rare combinations), where the FFT's or a truncation's absolute error would weigh as a relative one.
    // Narrow lattices are therefore multiplied whole and directly (relative errors only), which costs little;
    // wide ones, whose many unit sizes fill the lattice, by the planner as usual.
    let bounded = model.poisson <= 0.0 && model.scaled_poisson.is_empty();
    let mut window = if model.lattice_width() + model.shift <= KEEP_WHOLE && bounded {
        direct_all(parts.into_iter().map(|p| p.w).collect())
    } else {
        product_all(parts)
    };
    window.lo += model.shift;
    window.mean += model.shift as f64;
    window.max = window.max.map(|m| m + model.shift);
    Tilted { t, var: window.var, window, scale: cgf::scale(model, t), spectrum: None }
}

/// A factor of the tilted law with what places its truncations: `step`, the largest number of lattice steps
/// one of its summands adds (so X_i - E X_i <= step), and `m2`, the sum over its summands of E[X_i^2] (each
/// X_i >= 0), which is at least the variance. Both are properties of the exact tilted law, not of the window.
///
/// Upper side: Bennett's inequality (Bennett 1962; Boucheron, Lugosi and Massart, "Concentration
/// Inequalities", 2013, Thm 2.9), P(S - ES >= r) <= exp(-(v / b^2) h(b r / v)) with h(x) = (1 + x) ln(1 + x) - x,
/// for independent summands with X_i - E X_i <= b and variances summing to v. Bernstein's bound is its
/// relaxation h(x) >= x^2 / (2 (1 + x / 3)), much looser when a few large steps carry the variance (r >> v / b),
/// as in a book of few events of many units each.
///
/// Lower side: for X_i >= 0, e^(-y) <= 1 - y + y^2 / 2 (y >= 0) gives E e^(-s X_i) <= exp(-s E X_i + s^2 E X_i^2 / 2),
/// so P(S - ES <= -r) <= exp(-r^2 / (2 m2)) by Chernoff's bound at s = r / m2 (Maurer 2003, "A bound on the
/// deviation probability for sums of non-negative random variables"; the derivation here is complete),
/// free of the step: the lower side of a law of rare events of many units is short. For a Poisson part of
/// rate lambda and step s, E e^(-y s N) = exp(lambda (e^(-y s) - 1)) gives the same with m2 = lambda s^2,
/// its variance; Bennett's form holds for it with b = s exactly (its log-moment generating function is
/// lambda (e^(y s) - 1 - y s)).
struct Part {
    w: Window,
    step: f64,
    m2: f64,
}

/// The Bernoulli block of exposures `ps` of `us` steps as a [`Part`]. Its recursion stops at the block's own
/// upper cut ([`keep_range`] on its summands): mass only moves up in it, so the points kept are exact as if
/// the whole width had been computed, and what lies above the cut is at most exp(-TRUNC_LN), charged there.
fn block_part(ps: &[f64], us: &[u64], t: f64) -> Part {
    let (mut m2, mut mean, mut var) = (0.0, 0.0, 0.0);
    for (&p, &u) in ps.iter().zip(us) {
        let (q, r) = tilt_qr(p, &TiltConsts::new(t * u as f64));
        let uf = u as f64;
        m2 += (u * u) as f64 * q;
        mean += uf * q;
        var += uf * uf * q * r;
    }
    let step = us.iter().copied().max().unwrap_or(1) as f64;
    let width: u64 = us.iter().sum();
    let (_, cap) = keep_range(mean, var, m2, step, 0, Some(width));
    Part { w: bernoulli_block(ps, us, t, cap), step, m2 }
}

/// Radius r with exp(-(v / b^2) h(b r / v)) <= exp(-TRUNC_LN) (Bennett, see [`Part`]), never above
/// Bernstein's. Newton's method on the convex increasing h from Bernstein's point (which satisfies the
/// inequality, h lying above Bernstein's quadratic) descends towards the root from above; the result, widened
/// by 1e-6, is accepted only if h there exceeds the target by 1e-9 relative as computed. For x >= 1e-3, h(x)
/// is computed to a relative error below 1e-11 (two products, a difference losing at most x / h(x) <= 2000 of
/// the ulps of (1 + x) ln(1 + x), and ln_1p to 1 ulp), and h(x (1 + d)) >= h(x) (1 + d) since h(x) / x is
/// increasing: so the accepted r satisfies the inequality in exact arithmetic. Otherwise Bernstein's radius.
fn bennett_radius(v: f64, b: f64) -> f64 {
    let bernstein = Window::bernstein_radius_step(v, b);
    if v <= 0.0 || b <= 0.0 || !v.is_finite() {
        return bernstein;
    }
    let c = window::TRUNC_LN * b * b / v;
    let h = |x: f64| (1.0 + x) * x.ln_1p() - x;
    let mut x = bernstein * b / v;
    for _ in 0..60 {
        let next = x - (h(x) - c) / x.ln_1p();
        if !next.is_finite() || next >= x {
            break;
        }
        x = next;
    }
    let x = x * (1.0 + 1e-6);
    if x >= 1e-3 && h(x) >= c * (1.0 + 1e-9) {
        (x * v / b).min(bernstein)
    } else {
        bernstein
    }
}

/// The lattice points [lo, hi] a product keeps: outside them the exact product of the parts holds at most
/// exp(-TRUNC_LN) on each side ([`Part`]). Margins as in `Window::keep_range`: 1e-9 relative and one step
/// absorb the rounding of the mean and the variance.
pub(crate) fn keep_range(mean: f64, v: f64, m2: f64, step: f64, min: u64, max: Option<u64>) -> (u64, u64) {
    let up = bennett_radius(v, step) * (1.0 + 1e-9) + 1.0;
    let down =
        Window::bernstein_radius_step(v, step).min((2.0 * window::TRUNC_LN * m2.max(v)).sqrt()) * (1.0 + 1e-9) + 1.0;
    let lo = (mean - down).floor().max(min as f64) as u64;
    let hi_f = (mean + up).ceil();
    let hi = match max {
        Some(m) => hi_f.min(m as f64) as u64,
        None => hi_f.max(lo as f64) as u64,
    };
    (lo.min(hi), hi)
}

/// Multiply all parts, always the two shortest windows first (as `convolve::product_all`), each product
/// truncated by [`keep_range`].
fn product_all(parts: Vec<Part>) -> Window {
    use std::cmp::Reverse;
    use std::collections::BinaryHeap;
    let mut heap = BinaryHeap::new();
    let mut slots: Vec<Option<Part>> = Vec::with_capacity(parts.len() * 2);
    for p in parts {
        heap.push(Reverse((p.w.w.len(), slots.len())));
        slots.push(Some(p));
    }
    while heap.len() > 1 {
        if interrupt::requested() {
            return Window::point();
        }
        let Reverse((_, i)) = heap.pop().unwrap();
        let Reverse((_, j)) = heap.pop().unwrap();
        let (a, b) = (slots[i].take().unwrap(), slots[j].take().unwrap());
        let max = match (a.w.max, b.w.max) {
            (Some(x), Some(y)) => Some(x + y),
            _ => None,
        };
        let (m2, step) = (a.m2 + b.m2, a.step.max(b.step));
        let (lo, hi) = keep_range(a.w.mean + b.w.mean, a.w.var + b.w.var, m2, step, a.w.lo + b.w.lo, max);
        let hi = hi.min(a.w.hi() + b.w.hi());
        let lo = lo.min(hi);
        let w = convolve::product_within(&a.w, &b.w, lo, hi);
        heap.push(Reverse((w.w.len(), slots.len())));
        slots.push(Some(Part { w, step, m2 }));
    }
    heap.pop().and_then(|Reverse((_, i))| slots[i].take()).map_or_else(Window::point, |p| p.w)
}

/// Tilted law of a block of Bernoulli exposures of `us` steps each, by w'_j = w_j (1 - q) + w_(j - u) q over
/// the lattice points 0..=cap (unreachable points stay exactly 0). The error per exposure is that of
/// [`leaf::bernoulli_block`]: the tilt's error on q and 1 - q plus two roundings, all terms non-negative. The
/// recursion only moves mass upwards, so the points up to `cap` are those of the recursion over the block's
/// whole width; when `cap` is below that width the caller guarantees that the exact tilted law of the block
/// holds at most exp(-TRUNC_LN) above it, and that mass (with its relative error) is charged as absolute error.
pub fn bernoulli_block(ps: &[f64], us: &[u64], t: f64, cap: u64) -> Window {
    let width: u64 = us.iter().sum();
    let cap = cap.min(width);
    let mut w = vec![0.0; cap as usize + 1];
    w[0] = 1.0;
    let (mut mean, mut var, mut top) = (0.0, 0.0, 0usize);
    for (&p, &u) in ps.iter().zip(us) {
        let (q, r) = tilt_qr(p, &TiltConsts::new(t * u as f64));
        let (uf, u) = (u as f64, u as usize);
        mean += uf * q;
        var += uf * uf * q * r;
        top = (top + u).min(cap as usize);
        // Downwards in stretches of at most u points, each read from the u points below it, which are not
        // updated yet: the same operations as one point at a time from the top, in loops that vectorise.
        let mut hi = top + 1;
        while hi > u {
            let lo = (hi - u).max(u);
            let (src, dst) = w.split_at_mut(lo);
            for (d, &s) in dst[..hi - lo].iter_mut().zip(&src[lo - u..hi - u]) {
                *d = *d * r + s * q;
            }
            hi = lo;
        }
        for x in &mut w[..u.min(top + 1)] {
            *x *= r;
        }
    }
    let per = compose(TILT_REL, gamma(2.0));
    let rel = (1.0 + per).powi(ps.len() as i32) - 1.0;
    let mut win =
        Window { lo: 0, w, rel: rel * (1.0 + 1e-12), abs: 0.0, inf: 0.0, l2: 0.0, mean, var, max: Some(width) };
    win.add_underflow_slack(((cap + 1) as usize * ps.len()) as f64);
    if cap < width {
        let cut = (1.0 + win.rel) * (-window::TRUNC_LN).exp();
        win.add_abs(cut, cut);
    }
    win
}

/// The product of whole windows (no truncation), smallest first, each by direct convolution: every term is
/// non-negative, so the errors stay relative (gamma(min(la, lb)) per product, as in `convolve::product`).
fn direct_all(mut parts: Vec<Window>) -> Window {
    parts.sort_by_key(|w| std::cmp::Reverse(w.w.len()));
    let mut acc = parts.pop().unwrap_or_else(Window::point);
    while let Some(b) = parts.pop() {
        if interrupt::requested() {
            return Window::point();
        }
        let (la, lb) = (acc.w.len(), b.w.len());
        let w = convolve::direct(&acc.w, &b.w, 0, la + lb - 2);
        let (rel, abs, inf) = Window::after_product(&acc, &b);
        let l2 = Window::after_product_l2(&acc, &b);
        let g = gamma(la.min(lb) as f64 + 1.0);
        let max = match (acc.max, b.max) {
            (Some(x), Some(y)) => Some(x + y),
            _ => None,
        };
        acc = Window {
            lo: acc.lo + b.lo,
            w,
            rel: compose(rel, g),
            abs: abs * (1.0 + g),
            inf: inf * (1.0 + g),
            l2: l2 * (1.0 + g),
            mean: acc.mean + b.mean,
            var: acc.var + b.var,
            max,
        };
        acc.add_underflow_slack((la * lb) as f64);
    }
    acc
}

/// A window of a count put on every u-th lattice point: the law of u times the count.
pub fn spread(c: Window, u: u64) -> Window {
    if u == 1 {
        return c;
    }
    let len = (c.w.len() - 1) * u as usize + 1;
    let mut w = vec![0.0; len];
    for (i, &x) in c.w.iter().enumerate() {
        w[i * u as usize] = x;
    }
    let uf = u as f64;
    Window {
        lo: c.lo * u,
        w,
        rel: c.rel,
        abs: c.abs,
        inf: c.inf,
        l2: c.l2,
        mean: c.mean * uf,
        var: c.var * uf * uf,
        max: c.max.map(|m| m * u),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rounded_tilts_multiply_exactly() {
        for t in [1e-9, 0.3, -2.5, 740.0, -0.001234567] {
            let r = round_tilt(t);
            assert!(((r - t) / t).abs() < 1e-6);
            for u in [1u64, 3, 999_999_937, 1_000_000_000] {
                let p = r * u as f64;
                // Exact: the product's error term from two_prod is 0.
                assert_eq!(crate::engine::numerics::float::two_prod(r, u as f64).1, 0.0, "t = {t}, u = {u}");
                assert!(p.is_finite());
            }
        }
    }

    /// ln of sum_k exp(terms(k)) over the k from `from` upwards (or downwards to 0), the terms decreasing in
    /// the direction summed: a log-sum-exp over enough terms that the rest is below 1e-30 of the sum.
    fn ln_tail(ln_pmf: impl Fn(u64) -> f64, from: u64, up: bool) -> f64 {
        let top = ln_pmf(from);
        let (mut sum, mut k) = (0.0f64, from);
        loop {
            let term = (ln_pmf(k) - top).exp();
            sum += term;
            if term < 1e-30 * sum || (!up && k == 0) {
                break;
            }
            k = if up { k + 1 } else { k - 1 };
        }
        top + sum.ln()
    }

    /// Bennett's radius on a Poisson part of s steps per event, the case where it is attained up to a
    /// polynomial factor: the exact upper tail (summed from the pmf in logs; statrs' ln_gamma) at the radius is
    /// below exp(-TRUNC_LN), and at 0.8 of it above (so the radius is not loose); Bernstein's is wider whenever
    /// the events are rare.
    #[test]
    fn bennett_radius_bounds_poisson_tails_tightly() {
        use statrs::function::gamma::ln_gamma;
        for (lam, s) in [(0.5f64, 1000u64), (3.0, 700), (8.0, 900), (40.0, 300), (1e4, 10), (2.5e5, 1)] {
            let sf = s as f64;
            let ln_pmf = |k: u64| -lam + k as f64 * lam.ln() - ln_gamma(k as f64 + 1.0);
            let r = bennett_radius(lam * sf * sf, sf);
            let bernstein = Window::bernstein_radius_step(lam * sf * sf, sf);
            assert!(r <= bernstein, "lambda = {lam}");
            // P(s N >= s lambda + r) = P(N >= ceil(lambda + r / s)).
            let at = |r: f64| ln_tail(ln_pmf, (lam + r / sf).ceil() as u64, true);
            assert!(at(r) <= -window::TRUNC_LN, "lambda = {lam}, s = {s}: ln tail {} at r = {r}", at(r));
            assert!(at(0.8 * r) > -window::TRUNC_LN, "lambda = {lam}, s = {s}: r = {r} is loose");
            if lam <= 3.0 {
                assert!(r < 0.75 * bernstein, "lambda = {lam}: {r} vs Bernstein's {bernstein}");
            }
        }
    }

    /// The lower side of `keep_range` on binomial parts of u steps (m Bernoulli(q) exposures, the exact lower
    /// tail summed from the binomial pmf in logs): below exp(-TRUNC_LN) beyond the kept range, and the kept
    /// range below the mean never longer than Bernstein's radius with the step.
    #[test]
    fn lower_truncation_bounds_binomial_tails() {
        use statrs::function::gamma::ln_gamma;
        for (m, q, u) in [(20_000u64, 0.03f64, 900u64), (4000, 0.2, 50), (100_000, 0.01, 1000), (3000, 0.5, 7)] {
            let (mf, uf) = (m as f64, u as f64);
            let ln_pmf = |k: u64| {
                let k = k as f64;
                ln_gamma(mf + 1.0) - ln_gamma(k + 1.0) - ln_gamma(mf - k + 1.0) + k * q.ln() + (mf - k) * (-q).ln_1p()
            };
            let (mean, v, m2) = (mf * q * uf, mf * q * (1.0 - q) * uf * uf, mf * q * uf * uf);
            let (lo, _) = keep_range(mean, v, m2, uf, 0, Some(m * u));
            assert!(lo > 0, "m = {m}: nothing cut");
            // Points below lo in steps: counts k with k u < lo, i.e. k <= (lo - 1) / u.
            let ln_below = ln_tail(ln_pmf, (lo - 1) / u, false);
            assert!(ln_below <= -window::TRUNC_LN, "m = {m}, q = {q}: ln P(below) = {ln_below}");
            let bernstein = Window::bernstein_radius_step(v, uf);
            assert!(mean - (lo as f64) <= bernstein * (1.0 + 1e-9) + 2.0, "m = {m}");
        }
    }

    /// The block recursion stopped at its upper cut, against the same recursion over the block's whole width
    /// (the textbook recursion, every term non-negative): the kept points are bit for bit the same, the mass
    /// left above the cut is below exp(-TRUNC_LN), and the cut is charged as absolute error.
    #[test]
    fn capped_blocks_keep_their_points_and_cut_little() {
        let mut x = 0x2545_f491_4f6c_dd1du64;
        let mut next = || {
            x ^= x << 13;
            x ^= x >> 7;
            x ^= x << 17;
            (x >> 11) as f64 / (1u64 << 53) as f64
        };
        let mut cut_seen = 0;
        for case in 0..40 {
            // Blocks as `tilted` makes them: exposures of similar units (within 5% of a log-uniform u0).
            let n = 48 + case % 17;
            let ps: Vec<f64> = (0..n).map(|_| 0.05 * next()).collect();
            let u0 = 1000f64.powf(next());
            let mut us: Vec<u64> = (0..n).map(|_| (u0 * (1.0 + 0.05 * next())).floor().max(1.0) as u64).collect();
            us.sort_unstable();
            let t = round_tilt([0.0, 5e-4, 1e-3, -1e-3][case % 4]);
            let part = block_part(&ps, &us, t);
            let width: u64 = us.iter().sum();
            let whole = bernoulli_block(&ps, &us, t, width);
            let cap = part.w.hi();
            assert_eq!(part.w.w[..], whole.w[..=cap as usize], "case {case}");
            let above: f64 = whole.w[cap as usize + 1..].iter().sum();
            assert!(above <= (-window::TRUNC_LN).exp(), "case {case}: {above:e} above {cap} of {width}");
            if cap < width {
                cut_seen += 1;
                assert!(part.w.abs >= (-window::TRUNC_LN).exp() && part.w.abs > whole.abs, "case {case}");
            } else {
                assert_eq!(part.w.abs, whole.abs, "case {case}");
            }
        }
        assert!(cut_seen >= 30, "only {cut_seen} blocks were cut");
    }

    #[test]
    fn queries_in_units_map_onto_the_lattice() {
        // Units 4 and 6 with one certain exposure of 3: span 2, S = 1 + 2 j with j from 1 (the 3 is 1 + 2).
        let mut m = Model::default();
        m.push_weighted(0.5, 4);
        m.push_weighted(0.5, 6);
        m.push_weighted(1.0, 3);
        m.set_lattice();
        assert_eq!((m.span(), m.offset, m.shift), (2, 1, 1));
        assert_eq!(m.units, vec![2, 3]);
        assert_eq!(query(&m, 8, Side::Upper), Ok((4, Side::Upper)));
        assert_eq!(query(&m, 7, Side::Upper), Ok((3, Side::Upper)));
        assert_eq!(query(&m, 0, Side::Upper), Ok((0, Side::Upper)));
        assert_eq!(query(&m, 0, Side::Lower), Err(0.0));
        assert_eq!(query(&m, 8, Side::Lower), Ok((3, Side::Lower)));
        assert_eq!(query(&m, 8, Side::Point), Err(0.0));
        assert_eq!(query(&m, 7, Side::Point), Ok((3, Side::Point)));
    }
}
