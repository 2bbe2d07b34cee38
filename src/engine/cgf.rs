//! The cumulant generating function K(t) = ln E[exp(t S)] and its derivatives, and the solver of the
//! saddlepoint equation K'(t) = x.
//!
//! Shared by the exact engine (which tilts the law by exp(t S) so that a far tail becomes the centre of the
//! tilted law) and by the saddlepoint approximation. Every formula is written so that no exponential overflows
//! for any t in [-T_MAX, T_MAX] and probabilities near 0 or 1 keep their relative accuracy.

use super::float::Sum;
use super::moments::Moments;
use crate::portfolio::Model;

/// Largest |t| the solver uses. exp(-745) is the smallest double: beyond this the tilted law of any exposure is
/// already degenerate in f64.
pub const T_MAX: f64 = 740.0;

/// The first four derivatives of K at one t. K itself comes from [`scale`], which is a pass of its own because
/// it needs a logarithm per exposure.
#[derive(Debug, Clone, Copy, Default)]
pub struct CgfValue {
    pub t: f64,
    pub k1: f64,
    pub k2: f64,
    pub k3: f64,
    pub k4: f64,
}

/// Quantities of t computed once per tilt and shared by every exposure.
#[derive(Debug, Clone, Copy)]
pub struct TiltConsts {
    pub t: f64,
    /// e^t.
    pub et: f64,
    /// e^-t.
    pub emt: f64,
    /// e^t - 1.
    pub em1: f64,
    /// e^-t - 1.
    pub emm1: f64,
}

impl TiltConsts {
    pub fn new(t: f64) -> Self {
        TiltConsts { t, et: t.exp(), emt: (-t).exp(), em1: t.exp_m1(), emm1: (-t).exp_m1() }
    }
}

/// The tilted law of one exposure with probability p.
#[derive(Debug, Clone, Copy)]
pub struct Tilt {
    /// q = p e^t / M, the tilted event probability.
    pub q: f64,
    /// 1 - q, computed without subtraction.
    pub r: f64,
    /// The value b in {0, 1} the tilted exposure most likely takes (1 when q > 1/2).
    pub b: bool,
    /// phi = ln M - b t = ln E[exp(t (X - b))] <= 0 ... or small: ln M with the dominant t b taken out.
    pub phi: f64,
}

/// Tilted law of one exposure: q, 1 - q and phi = ln M(t) - b t, where M = 1 - p + p e^t.
///
/// Error analysis (why these forms): the denominators are sums of two non-negative terms, so q and 1 - q each
/// carry at most about 6 roundings relative to themselves (1 - q is never formed by subtraction, so it stays
/// accurate when q is close to 1). Taking b t out of ln M leaves phi of the size of the answer's own logarithm
/// rather than of t times the count; phi comes from ln_1p where its argument is near 1 and from ln where it is
/// not, which keeps a relative error of a few ulps in every case. That is what makes ln P = sum phi + t (B - k)
/// accurate relative to ln P itself, even when t k is in the thousands.
#[inline]
pub fn tilt(p: f64, c: &TiltConsts) -> Tilt {
    let (q, r) = tilt_qr(p, c);
    let b = q > r;
    let phi = if !b {
        // ln M, with M = (1 - p) + p e^t in [1 - p, 2].
        let m = (1.0 - p) + p * c.et;
        if m >= 0.5 {
            (p * c.em1).ln_1p()
        } else {
            m.ln()
        }
    } else {
        // ln(M e^-t), with M e^-t = p + (1 - p) e^-t.
        let d = p + (1.0 - p) * c.emt;
        if d >= 0.5 && d.is_finite() {
            ((1.0 - p) * c.emm1).ln_1p()
        } else {
            d.ln()
        }
    };
    Tilt { q, r, b, phi }
}

/// Only (q, 1 - q) of [`tilt`], for the hot loops that do not need phi.
#[inline]
pub fn tilt_qr(p: f64, c: &TiltConsts) -> (f64, f64) {
    if c.t > 0.0 {
        let d = p + (1.0 - p) * c.emt; // M e^-t
        (p / d, (1.0 - p) * c.emt / d)
    } else {
        let d = (1.0 - p) + p * c.et; // M
        (p * c.et / d, (1.0 - p) / d)
    }
}

/// Relative error bound of each of q, 1 - q from `tilt` (libm at 1 ulp plus the roundings of the formula).
pub const TILT_REL: f64 = 8.0 * super::float::U;

/// ln M(t) summed with the dominant part taken out: K(t) = phi + t B.
#[derive(Debug, Clone, Copy)]
pub struct Scale {
    pub phi: f64,
    /// Low part of phi as a double-double (phi + phi_lo is the compensated sum).
    pub phi_lo: f64,
    /// Bound on |phi - exact|.
    pub phi_err: f64,
    /// B = shift + sum of b over exposures (an integer).
    pub b: f64,
}

impl Scale {
    /// ln(exp(K(t) - t x)) = phi + t (B - x), with t (B - x) formed exactly; returns (value, error bound).
    pub fn ln_scale(&self, t: f64, x: f64) -> (f64, f64) {
        let (v, lo, err) = self.ln_scale_dd(t, x);
        (v + lo, err)
    }

    /// The same as a double-double (hi, lo) with its error bound, so that exp of it keeps full precision
    /// even at ln values in the hundreds (where one ulp of the double is already 1e-13 relative).
    pub fn ln_scale_dd(&self, t: f64, x: f64) -> (f64, f64, f64) {
        use super::float::{two_prod, two_sum, U};
        let (hi, lo) = two_prod(t, self.b - x);
        let (a, e) = two_sum(self.phi, hi);
        let rest = e + self.phi_lo + lo;
        let (v, l) = two_sum(a, rest);
        (v, l, self.phi_err + 2.0 * U * U * (self.phi.abs() + hi.abs()) + U * rest.abs())
    }
}

pub fn scale(model: &Model, t: f64) -> Scale {
    let c = TiltConsts::new(t);
    let (mut phi, mut abs, mut b) = (Sum::default(), 0.0, model.shift as f64);
    for &p in &model.bernoulli {
        let x = tilt(p, &c);
        phi.add(x.phi);
        abs += x.phi.abs();
        b += x.b as u8 as f64;
    }
    for g in &model.binomials {
        let x = tilt(g.p, &c);
        let m = g.size as f64;
        phi.add(m * x.phi);
        abs += m * x.phi.abs();
        b += if x.b { m } else { 0.0 };
    }
    if model.poisson > 0.0 {
        let v = model.poisson * c.em1;
        phi.add(v);
        abs += v.abs();
    }
    // Each phi is within ~6 ulps of itself (see `tilt`); the product by a group size adds one more.
    let phi_err = phi.error_bound() + 8.0 * super::float::U * abs;
    let (hi, lo) = phi.parts();
    Scale { phi: hi, phi_lo: lo, phi_err, b }
}

pub fn eval(model: &Model, t: f64) -> CgfValue {
    let c = TiltConsts::new(t);
    let (mut k1, mut k2, mut k3, mut k4) = (0.0, 0.0, 0.0, 0.0);
    let mut add = |m: f64, p: f64| {
        let (q, r) = tilt_qr(p, &c);
        let v = q * r;
        k1 += m * q;
        k2 += m * v;
        k3 += m * v * (r - q);
        k4 += m * v * (1.0 - 6.0 * v);
    };
    for &p in &model.bernoulli {
        add(1.0, p);
    }
    for b in &model.binomials {
        add(b.size as f64, b.p);
    }
    let lam = model.poisson;
    let extra = if lam > 0.0 { lam * c.et } else { 0.0 };
    let shift = model.shift as f64;
    CgfValue { t, k1: k1 + extra + shift, k2: k2 + extra, k3: k3 + extra, k4: k4 + extra }
}

/// Variance of the tilted law, K''(t).
pub fn eval_var(model: &Model, t: f64) -> f64 {
    k1_k2(model, t).1
}

/// Mean of the tilted law, K'(t), and its variance K''(t), in one pass.
fn k1_k2(model: &Model, t: f64) -> (f64, f64) {
    let c = TiltConsts::new(t);
    let (mut k1, mut k2) = (model.shift as f64, 0.0);
    for &p in &model.bernoulli {
        let (q, r) = tilt_qr(p, &c);
        k1 += q;
        k2 += q * r;
    }
    for b in &model.binomials {
        let (q, r) = tilt_qr(b.p, &c);
        k1 += b.size as f64 * q;
        k2 += b.size as f64 * q * r;
    }
    if model.poisson > 0.0 {
        let le = model.poisson * c.et;
        k1 += le;
        k2 += le;
    }
    (k1, k2)
}

/// Solve K'(t) = x by Newton's method safeguarded with bisection, so it converges for every x strictly inside
/// the support's range: p near 0 or 1, x at the edge of the support, huge n. `tol` is the accepted
/// |K'(t) - x|. Returns t clamped to [-T_MAX, T_MAX] when x is beyond what f64 can tilt to. K'(0) and K''(0)
/// are the mean and variance, taken from `moments` rather than from another pass over the exposures.
pub fn solve(model: &Model, moments: &Moments, x: f64, tol: f64) -> f64 {
    let (m0, v0) = (moments.mean, moments.variance);
    if (m0 - x).abs() <= tol || v0 <= 0.0 {
        return 0.0;
    }
    // Bracket [lo, hi] with K'(lo) < x < K'(hi); K' is increasing.
    let (mut lo, mut hi) = if x > m0 { (0.0, f64::NAN) } else { (f64::NAN, 0.0) };
    // First guess: the smaller of a Newton step at 0 and the Poisson-like ln(x/mean) (either can be far off;
    // the bracket below makes any guess safe, a good one makes it fast).
    let shift = model.shift as f64;
    let newton0 = (x - m0) / v0;
    let poisson0 = ((x - shift).max(1e-300) / (m0 - shift).max(1e-300)).ln();
    let mut t =
        if newton0.signum() == poisson0.signum() && poisson0.abs() < newton0.abs() { poisson0 } else { newton0 };
    t = t.clamp(-T_MAX, T_MAX);
    let mut last_step = f64::INFINITY;
    for _ in 0..400 {
        let (k1, k2) = k1_k2(model, t);
        let f = k1 - x;
        if f.abs() <= tol {
            return t;
        }
        if f < 0.0 {
            lo = t;
        } else {
            hi = t;
        }
        if !lo.is_nan() && !hi.is_nan() && (hi - lo) <= 1e-15 * (1.0 + t.abs()) {
            return t;
        }
        let newton = if k2 > 0.0 { t - f / k2 } else { f64::NAN };
        let inside = |z: f64| z.is_finite() && (lo.is_nan() || z > lo) && (hi.is_nan() || z < hi);
        // Newton while it at least halves its step each time (Press et al., "Numerical Recipes", rtsafe);
        // otherwise bisect, so a far start such as exp-like growth of K' cannot crawl.
        let bracketed = !lo.is_nan() && !hi.is_nan();
        let step = (newton - t).abs();
        let slow = bracketed && step > 0.5 * last_step;
        last_step = if inside(newton) && !slow { step } else { f64::INFINITY };
        t = if inside(newton) && !slow {
            newton
        } else if lo.is_nan() {
            // Still searching for the lower end of the bracket: step out geometrically.
            if t <= -T_MAX {
                return -T_MAX;
            }
            (2.0 * t.min(-1.0)).max(-T_MAX)
        } else if hi.is_nan() {
            if t >= T_MAX {
                return T_MAX;
            }
            (2.0 * t.max(1.0)).min(T_MAX)
        } else {
            0.5 * (lo + hi)
        };
    }
    t
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn derivatives_match_binomial_closed_form() {
        // Binomial(m, p) tilted at t is Binomial(m, q): K' = m q, K'' = m q (1 - q).
        let m = Model::from_parts(&[], &[(40, 0.3)], 0.0);
        let t = 0.7f64;
        let q = 0.3 * t.exp() / (0.7 + 0.3 * t.exp());
        let c = eval(&m, t);
        let (k0, _) = scale(&m, t).ln_scale(t, 0.0);
        assert!((c.k1 - 40.0 * q).abs() < 1e-12);
        assert!((c.k2 - 40.0 * q * (1.0 - q)).abs() < 1e-12);
        assert!((k0 - 40.0 * (0.7 + 0.3 * t.exp()).ln()).abs() < 1e-12);
    }

    #[test]
    fn solver_reaches_edges() {
        let m = Model::from_parts(&[1e-12, 0.5, 0.999999], &[], 0.0);
        for x in [0.001, 1.0, 2.5, 2.9999] {
            let t = solve(&m, &Moments::of(&m), x, 1e-10);
            assert!((eval(&m, t).k1 - x).abs() < 1e-8, "x = {x}");
        }
    }
}
