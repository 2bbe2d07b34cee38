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

/// The tilted Poisson rate lambda e^t, formed so that it does not overflow when e^t alone would (a tiny rate
/// tilted far: t beyond 709 with lambda e^t still moderate).
pub fn tilted_rate(lambda: f64, t: f64) -> f64 {
    if t < 700.0 {
        lambda * t.exp()
    } else {
        (lambda.ln() + t).exp()
    }
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
    let (a, b) = tilt_weights(p, c);
    let d = a + b;
    (b / d, a / d)
}

/// The unnormalised tilted weights (a, b) of 0 and 1, proportional to (1 - p, p e^t): ((1 - p) e^-t, p) for
/// t > 0 and (1 - p, p e^t) otherwise, so that neither overflows; q = b / (a + b) and 1 - q = a / (a + b) as
/// [`tilt_qr`] forms them. Their ratio b / a is within [`ODDS_LN`] (in logarithm) of the exact odds.
#[inline]
pub fn tilt_weights(p: f64, c: &TiltConsts) -> (f64, f64) {
    if c.t > 0.0 {
        ((1.0 - p) * c.emt, p)
    } else {
        (1.0 - p, p * c.et)
    }
}

/// Bound on |ln((b^ / a^) / (b / a))| for the computed weights of [`tilt_weights`] while both are normal: the
/// roundings of 1 - p and of one product (U each) and e^(+-t) at 1 ulp (2 U), on one side of the ratio or split
/// between both, so |ln| <= -2 ln(1 - U) - ln(1 - 2 U) = 4 U + O(U^2); the factor covers the O(U^2).
pub const ODDS_LN: f64 = 4.0 * super::float::U * (1.0 + 1e-9);

/// Relative error bound of each of q, 1 - q from `tilt` (libm at 1 ulp plus the roundings of the formula).
pub const TILT_REL: f64 = 8.0 * super::float::U;

/// ln M(t) summed with the dominant part taken out: K(t) = phi + t B.
#[derive(Debug, Clone, Copy, Default)]
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
    if !model.units.is_empty() {
        // Losses in units: exposure i is tilted by exp(t u_i X_i), so ln M_i = phi_i + t u_i b_i. The caller
        // keeps t u_i exact (`exact::lattice::round_tilt`).
        for (&p, &u) in model.bernoulli.iter().zip(&model.units) {
            let x = tilt(p, &TiltConsts::new(t * u as f64));
            phi.add(x.phi);
            abs += x.phi.abs();
            b += if x.b { u as f64 } else { 0.0 };
        }
        let err = 8.0 * super::float::U * abs;
        return finish_scale(model, &c, phi, err, b);
    }
    for &p in &model.bernoulli {
        let x = tilt(p, &c);
        phi.add(x.phi);
        abs += x.phi.abs();
        b += x.b as u8 as f64;
    }
    // Each phi is within ~6 ulps of itself (see `tilt`).
    let err = 8.0 * super::float::U * abs;
    finish_scale(model, &c, phi, err, b)
}

/// Factors per block of [`scale_by_products`], in lanes of 4 independent products.
const PRODUCT_BLOCK: usize = 16;

/// [`scale`] with one logarithm per 16 exposures instead of one per exposure: the logarithm of a product of
/// the factors M_i e^(-b_i t) in (0, 2]. It is the hot loop of the saddlepoint method, where it is ~5 times
/// faster, and it is accurate to O(n U) absolutely instead of O(U sum |phi_i|): the bound reported covers it.
/// Each factor carries at most 4 roundings relative to itself (e^t's 1 ulp included: both of its terms are
/// non-negative) and each product one more, so ln of a block's product is within 5 PRODUCT_BLOCK U of the
/// exact sum of the logarithms, plus the logarithm's own ulp; the bound takes 6 PRODUCT_BLOCK U + 2 U |ln|.
/// A block whose product leaves the normal range (tiny factors, or e^t overflowing on a factor that is not selected) is redone with
/// a logarithm per exposure.
pub fn scale_by_products(model: &Model, t: f64) -> Scale {
    if model.weighted() {
        return scale(model, t);
    }
    let c = TiltConsts::new(t);
    let (mut phi, mut err, mut b) = (Sum::default(), 0.0, model.shift as f64);
    pass::<false, true>(&model.bernoulli, &c, &mut [[0.0; 4]; 4], &mut phi, &mut err, &mut b);
    finish_scale(model, &c, phi, err, b)
}

/// One pass over the Bernoulli exposures at the tilt `c`: with CUM (and not PROD), the four lanes of [`eval`]'s
/// cumulant sums into `lanes` (lane j takes the exposures j, j + 4, j + 8, ... of the whole quads); with PROD,
/// the block products of [`scale_by_products`] into (phi, err, b), and CUM is then ignored (no caller asks for
/// both). Compiled for 4-wide vectors where the CPU has them: the lanes are then the vector's slots, and IEEE
/// operations round alike in every instruction set (Rust never fuses a * b + c on its own), so the sums are bit
/// for bit those of the portable code.
fn pass<const CUM: bool, const PROD: bool>(
    ps: &[f64],
    c: &TiltConsts,
    lanes: &mut [[f64; 4]; 4],
    phi: &mut Sum,
    err: &mut f64,
    b: &mut f64,
) {
    #[cfg(target_arch = "x86_64")]
    if std::is_x86_feature_detected!("avx") {
        // SAFETY: the CPU supports AVX (checked just above).
        return unsafe { pass_avx::<CUM, PROD>(ps, c, lanes, phi, err, b) };
    }
    pass_body::<CUM, PROD>(ps, c, lanes, phi, err, b)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx")]
unsafe fn pass_avx<const CUM: bool, const PROD: bool>(
    ps: &[f64],
    c: &TiltConsts,
    lanes: &mut [[f64; 4]; 4],
    phi: &mut Sum,
    err: &mut f64,
    b: &mut f64,
) {
    pass_body::<CUM, PROD>(ps, c, lanes, phi, err, b)
}

/// The same forms as `tilt_weights`: (ca, cb) = (1, e^-t) for t > 0 and (e^t, 1) otherwise, so that p ca and
/// (1 - p) cb are M's two terms without overflow (the products by 1 are exact).
#[inline(always)]
fn weights(c: &TiltConsts) -> (f64, f64) {
    if c.t > 0.0 {
        (1.0, c.emt)
    } else {
        (c.et, 1.0)
    }
}

#[inline(always)]
fn cumulant_quad(s: &mut [[f64; 4]; 4], p: [f64; 4], ca: f64, cb: f64) {
    let a = p.map(|p| p * ca);
    let b = p.map(|p| (1.0 - p) * cb);
    for j in 0..4 {
        let inv = 1.0 / (a[j] + b[j]);
        let (q, r) = (a[j] * inv, b[j] * inv);
        let v = q * r;
        s[0][j] += q;
        s[1][j] += v;
        s[2][j] += v * (r - q);
        s[3][j] += v * (1.0 - 6.0 * v);
    }
}

/// The factor M e^(-b t) of one exposure, and b. b (the tilted exposure more likely 1 than 0) compares
/// p e^t with 1 - p, written without overflow.
#[inline(always)]
fn factor(p: f64, ca: f64, cb: f64, c: &TiltConsts) -> (f64, f64) {
    let big = p * ca > (1.0 - p) * cb;
    let f = if big { p + (1.0 - p) * c.emt } else { (1.0 - p) + p * c.et };
    (f, if big { 1.0 } else { 0.0 })
}

#[inline(always)]
fn pass_body<const CUM: bool, const PROD: bool>(
    ps: &[f64],
    c: &TiltConsts,
    lanes: &mut [[f64; 4]; 4],
    phi: &mut Sum,
    err: &mut f64,
    b: &mut f64,
) {
    use super::float::U;
    let (ca, cb) = weights(c);
    if !PROD {
        for quad in ps.chunks_exact(4) {
            cumulant_quad(lanes, [quad[0], quad[1], quad[2], quad[3]], ca, cb);
        }
        return;
    }
    let mut blocks = ps.chunks_exact(PRODUCT_BLOCK);
    let last = blocks.remainder();
    for block in (&mut blocks).map(Some).chain([(!last.is_empty()).then_some(last)]).flatten() {
        // Factor i of the block goes to lane i mod 4.
        let (mut prod, mut ones) = ([1.0f64; 4], [0.0f64; 4]);
        if block.len() == PRODUCT_BLOCK {
            for i in 0..PRODUCT_BLOCK / 4 {
                let p: [f64; 4] = [block[4 * i], block[4 * i + 1], block[4 * i + 2], block[4 * i + 3]];
                // `factor` in the shape of vector operations: both candidates, then a select.
                let a = p.map(|p| p * ca);
                let bb = p.map(|p| (1.0 - p) * cb);
                let on = p.map(|p| p + (1.0 - p) * c.emt);
                let off = p.map(|p| (1.0 - p) + p * c.et);
                for j in 0..4 {
                    let big = a[j] > bb[j];
                    prod[j] *= if big { on[j] } else { off[j] };
                    ones[j] += if big { 1.0 } else { 0.0 };
                }
            }
        } else {
            for (i, &p) in block.iter().enumerate() {
                let (f, one) = factor(p, ca, cb, c);
                prod[i % 4] *= f;
                ones[i % 4] += one;
            }
        }
        let v = (prod[0] * prod[1]) * (prod[2] * prod[3]);
        if v.is_finite() && v > 1e-280 {
            let l = v.ln();
            phi.add(l);
            *err += 6.0 * PRODUCT_BLOCK as f64 * U + 2.0 * U * l.abs();
            *b += (ones[0] + ones[1]) + (ones[2] + ones[3]);
        } else {
            for &p in block {
                let x = tilt(p, c);
                phi.add(x.phi);
                *err += 8.0 * U * x.phi.abs();
                *b += x.b as u8 as f64;
            }
        }
    }
}

/// The binomial and Poisson parts of [`scale`], shared by both ways of summing the Bernoulli part.
fn finish_scale(model: &Model, c: &TiltConsts, mut phi: Sum, mut err: f64, mut b: f64) -> Scale {
    let mut abs = 0.0;
    for (i, g) in model.binomials.iter().enumerate() {
        // A member of u steps is tilted by exp(t u X) (u = 1 for a count).
        let u = model.group_units.get(i).map_or(1.0, |&u| u as f64);
        let x = if u == 1.0 { tilt(g.p, c) } else { tilt(g.p, &TiltConsts::new(c.t * u)) };
        let m = g.size as f64;
        phi.add(m * x.phi);
        abs += m * x.phi.abs();
        b += if x.b { m * u } else { 0.0 };
    }
    if model.poisson > 0.0 {
        // lambda (e^t - 1), without overflow where e^t alone overflows.
        let v = if c.t < 700.0 { model.poisson * c.em1 } else { tilted_rate(model.poisson, c.t) - model.poisson };
        phi.add(v);
        abs += v.abs();
    }
    abs += scaled_poisson_phi(model, c.t, &mut phi);
    // The product by a group size adds one rounding to the ~6 of each phi.
    err += 8.0 * super::float::U * abs;
    let phi_err = phi.error_bound() + err;
    let (hi, lo) = phi.parts();
    Scale { phi: hi, phi_lo: lo, phi_err, b }
}

/// K'(t) to K''''(t) in one pass. One reciprocal per exposure instead of the two divisions of [`tilt_qr`]: this
/// feeds the solver and the approximations, where one more rounding per exposure is immaterial, and it is the
/// hot loop of the saddlepoint method.
pub fn eval(model: &Model, t: f64) -> CgfValue {
    if model.weighted() {
        return eval_weighted(model, t);
    }
    let c = TiltConsts::new(t);
    let mut lanes = [[0.0; 4]; 4];
    pass::<true, false>(&model.bernoulli, &c, &mut lanes, &mut Sum::default(), &mut 0.0, &mut 0.0);
    eval_finish(model, &c, lanes)
}

/// [`eval`] from the lanes of the whole quads: the last few exposures, the groups and the Poisson part.
fn eval_finish(model: &Model, c: &TiltConsts, lanes: [[f64; 4]; 4]) -> CgfValue {
    let t = c.t;
    // Same forms as `tilt_qr`: M e^-t for t > 0, M otherwise, so neither overflows.
    let (ca, cb) = weights(c);
    let rest = &model.bernoulli[model.bernoulli.len() / 4 * 4..];
    let mut k = lanes.map(|l| (l[0] + l[1]) + (l[2] + l[3]));
    let mut add = |m: f64, p: f64| {
        let (a, b) = (p * ca, (1.0 - p) * cb);
        let inv = 1.0 / (a + b);
        let (q, r) = (a * inv, b * inv);
        let v = q * r;
        k[0] += m * q;
        k[1] += m * v;
        k[2] += m * v * (r - q);
        k[3] += m * v * (1.0 - 6.0 * v);
    };
    for &p in rest {
        add(1.0, p);
    }
    for b in &model.binomials {
        add(b.size as f64, b.p);
    }
    let lam = model.poisson;
    let extra = if lam > 0.0 { tilted_rate(lam, t) } else { 0.0 };
    let shift = model.shift as f64;
    CgfValue { t, k1: k[0] + extra + shift, k2: k[1] + extra, k3: k[2] + extra, k4: k[3] + extra }
}

/// [`eval`] for losses in units: exposure i adds u_i X_i, so its cumulants at t are u_i^r times those of
/// Bernoulli(q_i) with q_i tilted by t u_i.
fn eval_weighted(model: &Model, t: f64) -> CgfValue {
    let mut k = [0.0f64; 4];
    let mut add = |m: f64, p: f64, u: f64| {
        let c = TiltConsts::new(t * u);
        let (q, r) = tilt_qr(p, &c);
        let v = q * r;
        let (u2, u3) = (u * u, u * u * u);
        k[0] += m * u * q;
        k[1] += m * u2 * v;
        k[2] += m * u3 * v * (r - q);
        k[3] += m * u2 * u2 * v * (1.0 - 6.0 * v);
    };
    let step = |v: &[u64], i: usize| v.get(i).map_or(1.0, |&u| u as f64);
    for (i, &p) in model.bernoulli.iter().enumerate() {
        add(1.0, p, step(&model.units, i));
    }
    for (i, b) in model.binomials.iter().enumerate() {
        add(b.size as f64, b.p, step(&model.group_units, i));
    }
    scaled_poisson_cumulants(model, t, &mut k);
    let extra = if model.poisson > 0.0 { tilted_rate(model.poisson, t) } else { 0.0 };
    CgfValue { t, k1: k[0] + extra + model.shift as f64, k2: k[1] + extra, k3: k[2] + extra, k4: k[3] + extra }
}

/// The compound sources' part of K(t): each scaled part s Poisson(lambda) adds lambda (e^(t s) - 1) to phi
/// (its b is 0). Returns the part's absolute size for the error bound (each term within a few ulps: the
/// caller keeps t s exact, and exp_m1 and the product add three roundings).
fn scaled_poisson_phi(model: &Model, t: f64, phi: &mut Sum) -> f64 {
    let mut abs = 0.0;
    for &(s, lam) in &model.scaled_poisson {
        let ts = t * s as f64;
        let (v, weight) = if ts < 700.0 {
            (lam * ts.exp_m1(), 1.0)
        } else {
            // exp(ln lambda + t s): the rounding of the exponent, about U |ln lambda + t s| absolute, is a
            // relative error of the value that size; the weight scales this term's share of the 8 U bound.
            (tilted_rate(lam, ts) - lam, 1.0 + lam.ln().abs() + ts)
        };
        phi.add(v);
        abs += v.abs() * weight;
    }
    abs
}

/// The compound sources' part of K'(t)..K''''(t): s Poisson(lambda) tilted by t is s Poisson(lambda e^(t s)),
/// whose r-th cumulant is lambda e^(t s) s^r.
fn scaled_poisson_cumulants(model: &Model, t: f64, k: &mut [f64; 4]) {
    for &(s, lam) in &model.scaled_poisson {
        let s = s as f64;
        let mu = tilted_rate(lam, t * s);
        k[0] += mu * s;
        k[1] += mu * s * s;
        k[2] += mu * s * s * s;
        k[3] += mu * s * s * s * s;
    }
}

/// Variance of the tilted law, K''(t).
pub fn eval_var(model: &Model, t: f64) -> f64 {
    eval(model, t).k2
}

/// Solve K'(t) = x by Halley's method safeguarded with bisection, so it converges for every x strictly inside
/// the support's range: p near 0 or 1, x at the edge of the support, huge n. `tol` is the accepted
/// |K'(t) - x|. Returns the derivatives at the solution t (so callers need no further pass), with t clamped to
/// [-T_MAX, T_MAX] when x is beyond what f64 can tilt to. K'(0) and K''(0) are the mean and variance, taken
/// from `moments` rather than from another pass over the exposures.
///
/// Why Halley: every pass over the exposures yields K''' at little extra cost, and cubic convergence saves
/// one or two of the passes that Newton needs from the same first guess.
pub fn solve(model: &Model, moments: &Moments, x: f64, tol: f64) -> CgfValue {
    let (m0, v0) = (moments.mean, moments.variance);
    if (m0 - x).abs() <= tol || v0 <= 0.0 {
        return eval(model, 0.0);
    }
    // Bracket [lo, hi] with K'(lo) < x < K'(hi); K' is increasing.
    let (mut lo, mut hi) = if x > m0 { (0.0, f64::NAN) } else { (f64::NAN, 0.0) };
    // First guess: where the skewness term is small, the root of the quadratic Taylor expansion of K' at 0,
    // mean + var t + k3 t^2 / 2 = x; otherwise the smaller of a Newton step at 0 and the Poisson-like
    // ln(x / mean). Any of them can be far off: the bracket below makes any guess safe, a good one makes it fast.
    let shift = model.shift as f64;
    let newton0 = (x - m0) / v0;
    let poisson0 = ((x - shift).max(1e-300) / (m0 - shift).max(1e-300)).ln();
    let mut t =
        if newton0.signum() == poisson0.signum() && poisson0.abs() < newton0.abs() { poisson0 } else { newton0 };
    let skew_term = moments.third_central * newton0 / (2.0 * v0);
    if skew_term.abs() < 0.25 {
        // The root nearest 0, written without cancellation.
        t = 2.0 * newton0 / (1.0 + (1.0 + 4.0 * skew_term).sqrt());
    }
    t = t.clamp(-T_MAX, T_MAX);
    let mut last_step = f64::INFINITY;
    let mut c = eval(model, t);
    for _ in 0..400 {
        let f = c.k1 - x;
        if f.abs() <= tol {
            return c;
        }
        if f < 0.0 {
            lo = t;
        } else {
            hi = t;
        }
        if !lo.is_nan() && !hi.is_nan() && (hi - lo) <= 1e-15 * (1.0 + t.abs()) {
            return c;
        }
        let den = 2.0 * c.k2 * c.k2 - f * c.k3;
        let halley = t - 2.0 * f * c.k2 / den;
        // Far from the root the Halley denominator can vanish or change sign: Newton is the fallback there.
        let next = if den > 0.0 && halley.is_finite() {
            halley
        } else if c.k2 > 0.0 {
            t - f / c.k2
        } else {
            f64::NAN
        };
        let inside = |z: f64| z.is_finite() && (lo.is_nan() || z > lo) && (hi.is_nan() || z < hi);
        // The iteration while it at least halves its step each time (Press et al., "Numerical Recipes", rtsafe);
        // otherwise bisect, so a far start such as exp-like growth of K' cannot crawl.
        let bracketed = !lo.is_nan() && !hi.is_nan();
        let step = (next - t).abs();
        let slow = bracketed && step > 0.5 * last_step;
        last_step = if inside(next) && !slow { step } else { f64::INFINITY };
        t = if inside(next) && !slow {
            next
        } else if lo.is_nan() {
            // Still searching for the lower end of the bracket: step out geometrically.
            if t <= -T_MAX {
                return c;
            }
            (2.0 * t.min(-1.0)).max(-T_MAX)
        } else if hi.is_nan() {
            if t >= T_MAX {
                return c;
            }
            (2.0 * t.max(1.0)).min(T_MAX)
        } else {
            0.5 * (lo + hi)
        };
        c = eval(model, t);
    }
    c
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
    fn products_agree_with_logarithms_within_their_bounds() {
        let ps: Vec<f64> =
            (0..5000).map(|i| (((i * 7919) % 1000) as f64 + 0.5) / 1000.0).chain([1e-300, 1e-20]).collect();
        // Without a Poisson part for t beyond 709, where lambda (e^t - 1) itself overflows.
        let (with, without) = (Model::from_parts(&ps, &[(30, 0.4)], 1.5), Model::from_parts(&ps, &[(30, 0.4)], 0.0));
        for t in [-745.0, -30.0, -1.0, -1e-3, 0.0, 1e-6, 0.5, 3.0, 50.0, 709.0, 740.0] {
            let m = if t < 709.0 { &with } else { &without };
            let (a, b) = (scale(m, t), scale_by_products(m, t));
            assert_eq!(a.b, b.b, "t = {t}");
            let d = ((a.phi - b.phi) + (a.phi_lo - b.phi_lo)).abs();
            assert!(d <= a.phi_err + b.phi_err, "t = {t}: {d} vs {} + {}", a.phi_err, b.phi_err);
            assert!(b.phi_err <= 1e-9 * (1.0 + a.phi.abs()), "t = {t}: {}", b.phi_err);
        }
    }

    #[test]
    fn solver_reaches_edges() {
        let m = Model::from_parts(&[1e-12, 0.5, 0.999999], &[], 0.0);
        for x in [0.001, 1.0, 2.5, 2.9999] {
            let c = solve(&m, &Moments::of(&m), x, 1e-10);
            assert!((eval(&m, c.t).k1 - x).abs() < 1e-8, "x = {x}");
        }
    }
}
