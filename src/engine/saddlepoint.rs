//! The saddlepoint approximation: Lugannani-Rice tail formula with the continuity correction for lattice
//! variables (Daniels, "Tail probability approximations", International Statistical Review 55 (1987) 37-48,
//! the first correction: K'(s) = k and u = (1 - e^-s) sqrt(K''(s))), and the point formula
//! exp(K(s) - s k) / sqrt(2 pi K''(s)) with its first correction term 1 + lambda4/8 - 5 lambda3^2/24.
//!
//! Why the first correction: Daniels' second one (K'(s) = k - 1/2, u = 2 sinh(s/2) sqrt(K''(s))) was tried and
//! missed the 0.5% target for portfolios with small means (0.75% at mean 0.9 in the accuracy test).
//!
//! Everything is computed in log space: -w^2/2 = K(s) - s x comes from the same cancellation-free sum as the
//! exact engine (`cgf::Scale`), and the Mills ratio minus 1/w from its asymptotic series, so values like 1e-250
//! keep a small relative error. The saddlepoint equation is solved by the safeguarded Newton iteration of `cgf`.
//!
//! The bound is `estimated`: the size of the next-order term of the expansion (Daniels 1987). Alongside,
//! the rigorous Chernoff bound P(S >= k) <= exp(K(s) - s k) (any s >= 0; likewise below) is returned.
//!
//! Losses in units (`Model::weighted`): the same formulas in lattice steps, with K(t) the sum of
//! ln(1 - p_i + p_i e^(t u_i)), of m_g ln(1 - p_g + p_g e^(t u_g)) over groups and of lambda (e^t - 1) (`cgf`),
//! and the same (first) continuity
//! correction for the lattice of span 1 in steps, kept for the reason above and so that one formula serves
//! both. A total of a few large units is lumpy: its law has gaps and steps on scales far above one lattice
//! step, which no smooth expansion sees, and the next-order term then misses the error (it covered 65% of the
//! upper tails of tests/units_methods.rs). Two changes in units, both measured there (docs/accuracy.md):
//! - the tails' relative error estimate adds LATTICE_SPREAD sqrt(|lambda4| + lambda3^2) at the saddlepoint, the
//!   size of the first-order (n^-1/2) term a non-smooth sum leaves, and is capped by the envelope the truth
//!   cannot leave: the tail lies in [0, C] (C the Chernoff bound), so it is within max(p, C - p) of p;
//! - a point probability gets that envelope as its bound (P(S = k) <= exp(K(s) - s k) for every s): in a
//!   lumpy law a point can have no mass at all (a gap) where the smoothed density is large, so no relative
//!   estimate covers it.

use super::numerics::cgf::{self, CgfValue};
use super::numerics::normal_law::{mills_minus_inverse, LN_SQRT_2PI};
use super::{exact, BoundKind, Estimate, MethodId, Prepared, Side, TailMethod};

pub struct Saddlepoint;

/// Multiple of sqrt(|lambda4| + lambda3^2) (standardised cumulants at the saddlepoint) added to the relative
/// error estimate of a tail in units. Measured on the 3,000 seeded books of tests/units_methods.rs: 2.7 is the
/// smallest multiple that covers 99.7% of their tails; 3 leaves a margin (a held-out seed: docs/accuracy.md).
pub const LATTICE_SPREAD: f64 = 3.0;

/// The estimate of a tail's relative error in units (see the module note): the next-order term plus the
/// lumpiness term; infinite (so that the envelope decides) where the cumulants are not finite.
fn lattice_rel(rel: f64, l3: f64, l4: f64) -> f64 {
    let g = (l4.abs() + l3 * l3).sqrt();
    if g.is_finite() {
        rel + LATTICE_SPREAD * g
    } else {
        f64::INFINITY
    }
}

/// The rigorous envelope of a probability p whose truth lies in [0, c]: the largest distance to p.
fn envelope(p: f64, c: f64) -> f64 {
    p.max(c - p)
}

/// A one-sided tail (upper if `up`) beyond the threshold x, in logs: (ln p, ln Chernoff bound at
/// the threshold k, estimated relative error). None when x is too close to the mean for the formula.
fn tail(prep: &Prepared, x: f64, up: bool) -> Option<(f64, f64, f64)> {
    let model = prep.model;
    let sd = prep.moments.sd();
    let c: CgfValue = cgf::solve(model, &prep.moments, x, 1e-12 * sd.max(1.0));
    let s = c.t;
    if s.abs() < 1e-7 {
        return None;
    }
    let sc = cgf::scale_by_products(model, s);
    // With the first correction the saddlepoint is at the threshold itself, so -w^2/2 is also the Chernoff
    // bound, once the rounding error of K is added.
    let (ln_half_w2, k_err) = sc.ln_scale(s, x);
    let ln_chernoff = ln_half_w2 + k_err + 4.0 * super::numerics::float::U * ln_half_w2.abs();
    let w = (-2.0 * ln_half_w2).max(0.0).sqrt();
    let u = -(-s.abs()).exp_m1() * c.k2.sqrt();
    if !(w > 1e-6 && u > 0.0 && u.is_finite()) {
        return None;
    }
    let inner = mills_minus_inverse(w) + 1.0 / u;
    if inner <= 0.0 {
        return None;
    }
    let ln_p = ln_half_w2 - LN_SQRT_2PI + inner.ln();
    // Next-order term of Daniels (1987): phi(w) [ (lambda4/8 - 5 lambda3^2/24)/u - lambda3/(2 u^2) - 1/u^3 + 1/w^3 ].
    let l3 = c.k3 / c.k2.powf(1.5) * if up { 1.0 } else { -1.0 };
    let l4 = c.k4 / (c.k2 * c.k2);
    let next = (l4 / 8.0 - 5.0 * l3 * l3 / 24.0) / u - l3 / (2.0 * u * u) - 1.0 / u.powi(3) + 1.0 / w.powi(3);
    // The rounding error of K moves ln p by at most k_err.
    let rel = (next / inner).abs() + k_err.exp_m1();
    let rel = if model.weighted() { lattice_rel(rel, l3, l4) } else { rel };
    Some((ln_p, ln_chernoff.min(0.0), rel))
}

/// Saddlepoint P(S = k): (ln p, estimated relative error, ln of the Chernoff bound exp(K(s) - s k) on it).
fn point(prep: &Prepared, k: u64) -> (f64, f64, f64) {
    let model = prep.model;
    let lo = model.support_min() as f64 + 0.25;
    let x = match model.support_max() {
        Some(m) => (k as f64).clamp(lo, m as f64 - 0.25),
        None => (k as f64).max(lo),
    };
    let c = cgf::solve(model, &prep.moments, x, 1e-12 * prep.moments.sd().max(1.0));
    let s = c.t;
    let (ln_scale, k_err) = cgf::scale_by_products(model, s).ln_scale(s, k as f64);
    let l3 = c.k3 / c.k2.powf(1.5);
    let l4 = c.k4 / (c.k2 * c.k2);
    let corr = l4 / 8.0 - 5.0 * l3 * l3 / 24.0;
    let ln_p = ln_scale - LN_SQRT_2PI - 0.5 * c.k2.ln() + corr.max(-0.5).ln_1p();
    // The estimate: the first correction's own size and 1 / K''(s), the order of the lattice terms the
    // formula leaves out. With corr^2 alone it covered 89.6% of the errors of the coverage test
    // (tests/approximations.rs), the point formula being off by 30% where K'' is about 3.
    let ln_chernoff = ln_scale + k_err + 4.0 * super::numerics::float::U * ln_scale.abs();
    (ln_p.min(0.0), corr.abs() + corr * corr + 1.0 / c.k2 + 1e-15 + k_err.exp_m1(), ln_chernoff.min(0.0))
}

impl TailMethod for Saddlepoint {
    fn estimate(&self, prep: &Prepared, queries: &[(u64, Side)]) -> Vec<Estimate> {
        let mean = prep.moments.mean;
        queries
            .iter()
            .map(|&(k, side)| {
                let start = std::time::Instant::now();
                if let Some(p) = exact::trivial(prep.model, k, side) {
                    return Estimate::new(MethodId::Saddlepoint, p, p.ln(), 0.0, BoundKind::Estimated, start);
                }
                if side == Side::Point {
                    let (ln_p, rel, ln_ch) = point(prep, k);
                    let p = ln_p.exp();
                    let (err, rel) = if prep.model.weighted() {
                        let err = envelope(p, ln_ch.exp());
                        (err, if p > 0.0 { err / p } else { f64::INFINITY })
                    } else {
                        (p * rel, rel)
                    };
                    let mut e =
                        Estimate::new(MethodId::Saddlepoint, p, ln_p, err.min(1.0), BoundKind::Estimated, start);
                    e.relative_error_bound = Some(super::numerics::float::up(rel));
                    return e;
                }
                // The tail on the far side of the mean, then its complement if the other side was asked for.
                let (upper_k, want_upper) = match side {
                    Side::Upper => (k, true),
                    _ => (k + 1, false),
                };
                let far_is_upper = upper_k as f64 - 0.5 > mean;
                let r = if far_is_upper {
                    tail(prep, upper_k as f64, true)
                } else {
                    tail(prep, upper_k as f64 - 1.0, false)
                };
                let Some((ln_t, ln_ch, rel)) = r else {
                    // At the mean the formula is 0/0: the Edgeworth expansion is the right limit there.
                    return super::edgeworth::Edgeworth
                        .estimate(prep, &[(k, side)])
                        .remove(0)
                        .renamed(MethodId::Saddlepoint);
                };
                // The tail is at most the Chernoff bound C: a formula above it (near the support's edge, where
                // Lugannani-Rice is not accurate and can exceed 1) is replaced by C, whose error is at most C.
                let (ln_t, rel) = if ln_t > ln_ch { (ln_ch, 1.0) } else { (ln_t, rel) };
                let direct = far_is_upper == want_upper;
                let (ln_p, p) = if direct {
                    (ln_t, ln_t.exp())
                } else {
                    let v = super::numerics::float::log1m_exp(ln_t);
                    (v, v.exp())
                };
                let t = ln_t.exp();
                let (err, rel) = if prep.model.weighted() {
                    let err = (t * rel).min(envelope(t, ln_ch.exp()));
                    (err, if t > 0.0 { err / t } else { rel })
                } else {
                    (t * rel, rel)
                };
                let mut e = Estimate::new(MethodId::Saddlepoint, p, ln_p, err.min(1.0), BoundKind::Estimated, start);
                if direct {
                    e.chernoff_ln_bound = Some(ln_ch);
                    e.relative_error_bound = Some(super::numerics::float::up(rel));
                }
                e
            })
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::portfolio::Model;

    /// Far tails of a Poisson law against the naive sum of its pmf terms (from the recurrence
    /// f(j + 1) = f(j) lambda / (j + 1) in log space): Lugannani-Rice keeps a small relative error where
    /// the probability is 1e-12 and below, and the Chernoff bound lies above the truth.
    #[test]
    fn lugannani_rice_keeps_its_relative_accuracy_in_far_poisson_tails() {
        let lam = 20.0;
        let model = Model::from_parts(&[], &[], lam);
        let prep = Prepared::new(&model);
        let naive_ln_tail = |k: u64| {
            let mut ln_f = -lam + k as f64 * f64::ln(lam) - (1..=k).map(|j| (j as f64).ln()).sum::<f64>();
            let mut s = 0.0f64;
            let mut j = k;
            // Terms relative to the first one, until they stop counting.
            let mut rel = 1.0f64;
            while rel > 1e-20 {
                s += rel;
                rel *= lam / (j + 1) as f64;
                j += 1;
            }
            ln_f += s.ln();
            ln_f
        };
        for k in [60u64, 90, 140] {
            let e = Saddlepoint.estimate(&prep, &[(k, Side::Upper)]).remove(0);
            let truth = naive_ln_tail(k);
            assert!(truth < -28.0, "k={k}: a far tail, ln {truth}");
            assert!((e.ln_probability - truth).abs() < 5e-3, "k={k}: ln {} vs {truth}", e.ln_probability);
            assert!(e.chernoff_ln_bound.unwrap() >= truth, "k={k}");
        }
    }
}
