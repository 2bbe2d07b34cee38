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
//! - truncations place Bernstein's radius for summands of up to b = max u_i steps, compound sizes included
//!   (`window::with_step`).
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

/// Lattices up to this many steps wide are multiplied whole by direct convolution (at most about 4096^2
/// multiply-adds in all, smallest first).
const KEEP_WHOLE: u64 = 4096;

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
pub fn tilted(model: &Model, t: f64) -> Tilted {
    let t = round_tilt(t);
    let stopped = |t| Tilted { t, var: 0.0, window: Window::point(), scale: cgf::Scale::default() };
    let step = |v: &[u64], i: usize| v.get(i).copied().unwrap_or(1);
    let mut parts: Vec<Window> =
        Vec::with_capacity(model.bernoulli.len().div_ceil(leaf::BLOCK) + model.binomials.len() + 1);
    for (i, ch) in model.bernoulli.chunks(leaf::BLOCK).enumerate() {
        if i % 1024 == 0 && interrupt::requested() {
            return stopped(t);
        }
        let at = i * leaf::BLOCK;
        let us: Vec<u64> = (at..at + ch.len()).map(|j| step(&model.units, j)).collect();
        parts.push(bernoulli_block(ch, &us, t));
    }
    for (i, b) in model.binomials.iter().enumerate() {
        if i % 1024 == 0 && interrupt::requested() {
            return stopped(t);
        }
        let u = step(&model.group_units, i);
        parts.push(spread(leaf::binomial(b.size, b.p, &TiltConsts::new(t * u as f64)), u));
    }
    if model.poisson > 0.0 {
        parts.push(leaf::poisson(model.poisson, &TiltConsts::new(t)));
    }
    for &(s, lam) in &model.scaled_poisson {
        // A compound source's events of s steps: Poisson(lambda e^(t s)) on every s-th lattice point.
        parts.push(spread(leaf::poisson(lam, &TiltConsts::new(t * s as f64)), s));
    }
    // A lattice with gaps can leave the tilted law little mass at the threshold itself (a total reached only
    // by rare combinations), where the FFT's or a truncation's absolute error would weigh as a relative one.
    // Narrow lattices are therefore multiplied whole and directly (relative errors only), which costs little;
    // wide ones, whose many unit sizes fill the lattice, by the planner as usual.
    let bounded = model.poisson <= 0.0 && model.scaled_poisson.is_empty();
    let mut window = if model.lattice_width() + model.shift <= KEEP_WHOLE && bounded {
        direct_all(parts)
    } else {
        window::with_step(model.max_step(), || convolve::product_all(parts))
    };
    window.lo += model.shift;
    window.mean += model.shift as f64;
    window.max = window.max.map(|m| m + model.shift);
    Tilted { t, var: window.var, window, scale: cgf::scale(model, t) }
}

/// Tilted law of a block of Bernoulli exposures of `us` steps each, by w'_j = w_j (1 - q) + w_(j - u) q over
/// the block's whole support 0..=sum u (unreachable points stay exactly 0). The error per exposure is that of
/// [`leaf::bernoulli_block`]: the tilt's error on q and 1 - q plus two roundings, all terms non-negative.
pub fn bernoulli_block(ps: &[f64], us: &[u64], t: f64) -> Window {
    let width: u64 = us.iter().sum();
    let mut w = vec![0.0; width as usize + 1];
    w[0] = 1.0;
    let (mut mean, mut var, mut top) = (0.0, 0.0, 0usize);
    for (&p, &u) in ps.iter().zip(us) {
        let (q, r) = tilt_qr(p, &TiltConsts::new(t * u as f64));
        let (uf, u) = (u as f64, u as usize);
        mean += uf * q;
        var += uf * uf * q * r;
        top += u;
        for j in (u..=top).rev() {
            w[j] = w[j] * r + w[j - u] * q;
        }
        for x in &mut w[..u.min(top + 1)] {
            *x *= r;
        }
    }
    let per = compose(TILT_REL, gamma(2.0));
    let rel = (1.0 + per).powi(ps.len() as i32) - 1.0;
    let mut win =
        Window { lo: 0, w, rel: rel * (1.0 + 1e-12), abs: 0.0, inf: 0.0, l2: 0.0, mean, var, max: Some(width) };
    win.add_underflow_slack(((width + 1) as usize * ps.len()) as f64);
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
