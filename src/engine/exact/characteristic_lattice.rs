//! The tilted law of a book with loss units (or compound Poisson sources) from its characteristic function:
//! the samples of its generating function on the unit circle that matter, each a product over the exposures,
//! and one inverse FFT.
//!
//! Why. On a lattice the product tree (`lattice`) multiplies blocks of 64 exposures spanning up to 64 u steps
//! each and then FFT products as wide as the law, so its cost grows with the lattice, and its relative error
//! with the number of exposures and the products' depth. The generating function of the tilted law has a
//! closed form: with q_i the tilted probability of exposure i (`cgf::tilt_qr` at t u_i) and w on the unit circle,
//!   phi(w) = prod_i (1 + q_i (w^(u_i) - 1)) prod_g (1 + q_g (w^(u_g) - 1))^(m_g) exp(sum_s lambda_s e^(t s) (w^s - 1)),
//! (listed exposures i, groups g of m_g members, Poisson events of s steps at rate lambda_s). Unlike a count
//! (`characteristic`), a power series in z = E w - 1 does not collect the exposures, since each unit size has
//! its own w^u; so each sample costs one complex product per exposure. What keeps the cost down is that few
//! samples matter: |1 + q (w^u - 1)|^2 = 1 - 2 q (1 - q) (1 - cos u theta), so
//!   |phi(e^(i theta))| <= exp(-B(theta)),  B(theta) = sum_u A_u (1 - cos u theta),
//! with A_u the sum of q (1 - q) (m q (1 - q) for a group, lambda e^(t s) for a source) over the parts of u steps.
//! B is evaluated on a grid of M points by one FFT of the A_u folded mod M, and between grid points it moves by
//! at most (pi / M) sum_u u A_u (its derivative is sum_u u A_u sin(u theta)); a sample whose nearest grid point
//! certifies B > CUT is not evaluated (below e^-CUT). About 2 (CUT / V)^(1/2) N / (2 pi) samples near theta = 0
//! remain for a lattice of many unit sizes (V the tilted variance): a hundred or two for the books of
//! `examples/time_units`, against a window of 2^18 to 2^19 points.
//!
//! The window, the transform and the tail read from the samples are those of `characteristic` (the same
//! `Spectrum`, the same Parseval and Higham bounds); only the samples and their error bounds differ.
//! docs/characteristic.md ("On a lattice") has the proof of the per-sample bound:
//! - w^j - 1 comes from two tables (w^(j_hi 2^b) - 1 and w^(j_lo) - 1, double-double values rounded once) as
//!   d = d_h d_l + d_h + d_l, within `ed` of w^j - 1 (absolute);
//! - a factor 1 + q d is within e = U + q (2 TILT_REL + ed + 6 U) of its exact value, and its modulus is at
//!   least |1 - 2 q|, so its relative error is at most e / (|1 - 2 q| - e) (computed per sample from the
//!   factor itself for q in [3/8, 5/8], where |1 - 2 q| is no bound);
//! - every complex product errs by at most sqrt(5) U relative (Brent, Percival and Zimmermann 2007, "Error
//!   bounds on complex floating-point multiplication"), lanes are rescaled by exact powers of two so that no
//!   product underflows, and a source's exp(X) carries its exponent's error and libm's exp, sin, cos at 1 ulp.
//!   So a sample's relative error is the same small multiple of n U at every theta, about 4.5 n U: 5e-12 at
//!   10^4 exposures where the tree's bound was 8e-11.
//!
//! Taken for books of at least `characteristic::MIN_EXPOSURES` random exposures on lattices wider than
//! `lattice::KEEP_WHOLE` (narrower ones are multiplied whole, with relative errors only), when the samples to
//! evaluate stay within `MAX_WORK` factor products.

use super::characteristic::{cos_sin, Spectrum, CUT};
use super::fft::{self, dd_add};
use super::lattice::{keep_range, round_tilt, KEEP_WHOLE};
use super::window::{Window, TRUNC_LN};
use super::Tilted;
use crate::engine::interrupt;
use crate::engine::numerics::cgf::{self, TILT_REL};
use crate::engine::numerics::float::{gamma, up, U};
use crate::portfolio::Model;

/// Tilted probabilities in [MID_LO, MID_HI] have no useful lower bound |1 - 2 q| on their factor's modulus:
/// their relative error is taken per sample from the computed factor.
const MID_LO: f64 = 0.375;
const MID_HI: f64 = 0.625;
/// How far below the grid's value B may fall between grid points: the grid is made fine enough for this.
const SLACK: f64 = 20.0;
/// Most factor products (samples evaluated times factors per sample): beyond it the tree is the better tool.
const MAX_WORK: f64 = 4e8;
/// Lanes are rescaled by 2^SCALE_BITS once their modulus (as |re| + |im|) falls below 2^-SCALE_BITS, so that
/// they stay above 2^-430 (64 factors of modulus >= 1/4 - e each between checks).
const SCALE_BITS: i32 = 300;
/// Factors multiplied into a lane between two rescalings.
const RESCALE_EVERY: usize = 64;
/// sqrt(5) U, Brent, Percival and Zimmermann's bound on a complex product's relative error, plus 2^-500 for
/// the underflow of a partial product (at most 4 2^-1075) in a result of modulus at least 2^-430.
const CMUL: f64 = 2.236_068 * U + 3.1e-151;

/// The tables of w^j - 1, w = e^(2 pi i / N): `hi` at j = k 2^b, `lo` at j < 2^b, and the bound `ed` on
/// |d^(j) - (w^j - 1)| for the composed value.
struct Tables {
    b: u32,
    lo: Vec<(f64, f64)>,
    hi: Vec<(f64, f64)>,
    ed: f64,
}

/// w^j - 1 for 0 <= j < n, from the double-double cos and sin (within 2^-96 each), rounded once per part:
/// within U |w^j - 1| + 2^-94 of the exact value.
fn minus_one(j: u64, n: u64) -> (f64, f64) {
    let (jj, sign) = if j <= n / 2 { (j, 1.0) } else { (n - j, -1.0) };
    let (c, s) = cos_sin(jj, n);
    let re = dd_add(c, (-1.0, 0.0));
    (re.0 + re.1, sign * (s.0 + s.1))
}

impl Tables {
    fn new(n: u64) -> Tables {
        let m = n.trailing_zeros();
        let b = m / 2;
        let lo = (0..1u64 << b).map(|j| minus_one(j, n)).collect();
        let hi = (0..1u64 << (m - b)).map(|j| minus_one(j << b, n)).collect();
        // |d_l| <= 2 sin(pi 2^b / N) <= 2 pi 2^b / N (and <= 2 always).
        let ell = (2.0 * std::f64::consts::PI * (1u64 << b) as f64 / n as f64).min(2.0) * (1.0 + 1e-12);
        let ed = U * (14.0 * ell + 11.0) + 2f64.powi(-90);
        Tables { b, lo, hi, ed }
    }

    /// d^ for w^j - 1 (j < N): d_h d_l + d_h + d_l in this order.
    #[inline(always)]
    fn d(&self, j: u64) -> (f64, f64) {
        let (hr, hi) = self.hi[(j >> self.b) as usize];
        let (lr, li) = self.lo[(j & ((1u64 << self.b) - 1)) as usize];
        (((hr * lr - hi * li) + hr) + lr, ((hr * li + hi * lr) + hi) + li)
    }
}

#[inline(always)]
fn cmul(a: (f64, f64), b: (f64, f64)) -> (f64, f64) {
    (a.0 * b.0 - a.1 * b.1, a.0 * b.1 + a.1 * b.0)
}

/// A complex number times 2^e, kept with |re| + |im| within [2^-200, 2^201) (or zero), so that a product of
/// two never underflows below 2^-402 nor overflows.
#[derive(Clone, Copy)]
struct Scaled {
    v: (f64, f64),
    e: i64,
}

impl Scaled {
    fn one() -> Scaled {
        Scaled { v: (1.0, 0.0), e: 0 }
    }

    /// Rescale by an exact power of two.
    fn norm(mut self) -> Scaled {
        let a = self.v.0.abs() + self.v.1.abs();
        if a == 0.0 || !a.is_finite() {
            return self;
        }
        let k = a.log2().floor() as i64;
        if !(-200..=200).contains(&k) {
            let f = 2f64.powi(-k as i32);
            self.v = (self.v.0 * f, self.v.1 * f);
            self.e += k;
        }
        self
    }

    fn mul(self, o: Scaled) -> Scaled {
        Scaled { v: cmul(self.v, o.v), e: self.e + o.e }.norm()
    }

    fn pow(self, mut m: u64) -> Scaled {
        let (mut acc, mut b) = (Scaled::one(), self);
        while m > 0 {
            if m & 1 == 1 {
                acc = acc.mul(b);
            }
            b = b.mul(b);
            m >>= 1;
        }
        acc
    }

    /// As a double pair; 0 where it underflows entirely.
    fn value(self) -> (f64, f64) {
        let e = self.e.clamp(-3000, 3000) as i32;
        // Two steps so that 2^e itself never under- or overflows.
        let (h, l) = (e / 2, e - e / 2);
        let (a, b) = (2f64.powi(h), 2f64.powi(l));
        (self.v.0 * a * b, self.v.1 * a * b)
    }
}

/// The tilted book, split for the sample loop.
struct Book {
    /// Listed exposures with |1 - 2 q| >= 1/4: steps and tilted probabilities.
    us: Vec<u64>,
    qs: Vec<f64>,
    /// Groups with |1 - 2 q| >= 1/4: (steps, q, members).
    groups: Vec<(u64, f64, u64)>,
    /// Exposures and groups with q in [MID_LO, MID_HI]: (steps, q, members).
    mid: Vec<(u64, f64, u64)>,
    /// Poisson parts: (steps, tilted rate lambda e^(t s)).
    sources: Vec<(u64, f64)>,
    /// sum over the factors above of ln(1 + e / (|1 - 2 q| - e)) (members counted), rounded upwards.
    good_rel: f64,
    /// Complex products per sample, an upper bound.
    mults: f64,
    /// Bound on |X^ - X| for the sources' exponent, given the tables' `ed`: sum lambda' (8.1 U + ed) + the sum's
    /// roundings, as (coefficient of ed, the rest).
    src_ed: f64,
    src_rest: f64,
}

/// Per-factor absolute error of 1 + q d^ (docs/characteristic.md, "On a lattice").
fn factor_err(q: f64, ed: f64) -> f64 {
    (U + q * (2.01 * TILT_REL + ed + 6.02 * U)) * (1.0 + 1e-12)
}

/// The tilted law at t by the characteristic function on the lattice, or None where this construction is not
/// the better tool (a small book, a narrow lattice, many samples to evaluate) or cannot bound its error.
pub fn tilted(model: &Model, t: f64) -> Option<Tilted> {
    if model.random_exposures_bounded() < super::characteristic::MIN_EXPOSURES {
        return None;
    }
    let bounded = model.poisson <= 0.0 && model.scaled_poisson.is_empty();
    if model.lattice_width().saturating_add(model.shift) <= KEEP_WHOLE && bounded {
        return None;
    }
    build(model, t)
}

/// [`tilted`] without the size conditions (for tests and benchmarks).
pub fn build(model: &Model, t: f64) -> Option<Tilted> {
    let t = round_tilt(t);
    if !t.is_finite() || t.abs() > 700.0 {
        return None;
    }
    let step = |v: &[u64], i: usize| v.get(i).copied().unwrap_or(1);
    // Tilted probabilities as `cgf::tilt_qr` forms them at t u (one exponential per exposure).
    let qr = |p: f64, u: u64| {
        let tu = t * u as f64;
        let (a, b) = if tu > 0.0 { ((1.0 - p) * (-tu).exp(), p) } else { (1.0 - p, p * tu.exp()) };
        let d = a + b;
        (b / d, a / d)
    };
    let (mut mean, mut var, mut m2, mut top) = (0.0f64, 0.0f64, 0.0f64, 1u64);
    let mut width: u64 = 0;
    let mut bk = Book {
        us: Vec::with_capacity(model.bernoulli.len()),
        qs: Vec::with_capacity(model.bernoulli.len()),
        groups: Vec::new(),
        mid: Vec::new(),
        sources: Vec::new(),
        good_rel: 0.0,
        mults: 8.0,
        src_ed: 0.0,
        src_rest: 0.0,
    };
    // Weights for the bound on |phi|: A per exposure (q (1 - q)), kept with the steps for the grid.
    let mut a_terms: Vec<(u64, f64)> = Vec::with_capacity(model.bernoulli.len() + model.binomials.len() + 1);
    // Relative error per unit of ed, and the rest, of the good factors: sum (U + q c) / (|1 - 2q| - e) is
    // affine in ed up to the denominator, bounded once the tables are known (below).
    let mut good: Vec<(f64, f64)> = Vec::new();
    for (i, &p) in model.bernoulli.iter().enumerate() {
        let u = step(&model.units, i);
        let (q, r) = qr(p, u);
        let uf = u as f64;
        mean += uf * q;
        var += uf * uf * q * r;
        m2 += uf * uf * q;
        top = top.max(u);
        width = width.saturating_add(u);
        if q.is_nan() {
            return None;
        }
        a_terms.push((u, q * r));
        if (MID_LO..=MID_HI).contains(&q) {
            bk.mid.push((u, q, 1));
        } else {
            bk.us.push(u);
            bk.qs.push(q);
            good.push((q, 1.0));
        }
        bk.mults += 1.0;
    }
    for (i, g) in model.binomials.iter().enumerate() {
        let u = step(&model.group_units, i);
        let (q, r) = qr(g.p, u);
        let (uf, mf) = (u as f64, g.size as f64);
        mean += mf * uf * q;
        var += mf * uf * uf * q * r;
        m2 += mf * uf * uf * q;
        top = top.max(u);
        width = width.saturating_add(g.size.saturating_mul(u));
        if q.is_nan() {
            return None;
        }
        if (MID_LO..=MID_HI).contains(&q) {
            bk.mid.push((u, q, g.size));
        } else {
            bk.groups.push((u, q, g.size));
            good.push((q, mf));
        }
        a_terms.push((u, mf * q * r));
        bk.mults += mf + 1.0;
    }
    let mut lam_tot = 0.0f64;
    let sources =
        (model.poisson > 0.0).then_some((1u64, model.poisson)).into_iter().chain(model.scaled_poisson.iter().copied());
    for (s, lam) in sources {
        // t s is exact (t has 21 significant bits, s < 2^30); exp at 1 ulp and one product: 3.01 U relative.
        let l = lam * (t * s as f64).exp();
        if !l.is_finite() {
            return None;
        }
        let sf = s as f64;
        mean += l * sf;
        var += l * sf * sf;
        m2 += l * sf * sf;
        top = top.max(s);
        lam_tot += l;
        bk.sources.push((s, l));
        a_terms.push((s, l));
        bk.mults += 1.0;
    }
    let max = if bk.sources.is_empty() { Some(width) } else { None };
    if !mean.is_finite() || !var.is_finite() || var <= 0.0 {
        return None;
    }
    let (klo, khi) = keep_range(mean, var, m2, top as f64, 0, max);
    let len_keep = (khi - klo + 1) as usize;
    if len_keep > 1 << 27 {
        return None;
    }
    let n = len_keep.next_power_of_two().max(8);
    let nf = n as f64;
    let tab = Tables::new(n as u64);
    let ed = tab.ed;
    // The good factors' relative errors, now that ed is known: e / (|1 - 2 q| - e), ln(1 + x) <= x.
    let mut rel = 0.0f64;
    for &(q, mf) in &good {
        let e = factor_err(q, ed);
        let den = (1.0 - 2.0 * q).abs() * (1.0 - 2.0 * U) - 2.01 * TILT_REL - e;
        rel += mf * e / den;
    }
    bk.good_rel = up(rel * (1.0 + gamma(good.len() as f64 + 2.0)));
    // The sources' exponent X = sum lambda' d_s: lambda' within 3.01 U, d within ed, a product per part
    // (2.01 U of |lambda' d|, |d| <= 2), the sum over k parts (gamma(k) of sum |terms|, each <= 2.01 lambda').
    let k = bk.sources.len() as f64;
    bk.src_ed = lam_tot * 1.01;
    bk.src_rest = lam_tot * (3.01 * U * 2.01 + 2.01 * U * 2.01 + gamma(k + 1.0) * 2.9) * 1.01;
    if interrupt::requested() {
        return Some(Tilted { t, var: 0.0, window: Window::point(), scale: cgf::Scale::default(), spectrum: None });
    }
    let cand = candidates(&a_terms, n as u64, (MAX_WORK / bk.mults) as u64)?;
    let scale = cgf::scale(model, t);
    let (mut re, mut im) = (vec![0.0f64; n], vec![0.0f64; n]);
    re[0] = 1.0;
    let (mut err2, mut norm2) = (0.0f64, 1.0f64);
    let (mut kept, mut kept_err, mut kept_r) = (vec![(1.0, 0.0)], vec![0.0], vec![0u64]);
    let mut kept_mult = 1u64;
    for &r in &cand {
        if interrupt::requested() {
            return Some(Tilted { t, var: 0.0, window: Window::point(), scale: cgf::Scale::default(), spectrum: None });
        }
        let phase = (r as u128 * klo as u128 % n as u128) as u64;
        let (value, err) = sample(&bk, &tab, r, n as u64, phase)?;
        let (pr, pi) = value;
        re[r as usize] = pr;
        im[r as usize] = pi;
        let mult = if 2 * r as usize == n { 1u64 } else { 2 };
        if 2 * r as usize != n {
            re[n - r as usize] = pr;
            im[n - r as usize] = -pi;
        }
        let mf = mult as f64;
        norm2 += mf * (pr * pr + pi * pi);
        err2 += mf * err * err;
        kept.push(value);
        kept_err.push(err);
        kept_r.push(r);
        kept_mult += mult;
    }
    let skipped = (n as u64).saturating_sub(kept_mult) as f64;
    err2 += skipped * (-2.0 * CUT).exp();
    fft::transform(&mut re, &mut im);
    let m = n.trailing_zeros();
    let g = gamma(nf + 2.0);
    let norm_psi = (norm2 * (1.0 + g)).sqrt() * (1.0 + 2.0 * U);
    let norm_err = (err2 * (1.0 + g)).sqrt() * (1.0 + 2.0 * U);
    let rn = nf.sqrt();
    let underflow = 4.0 * nf * (m as f64 + 2.0) * rn * f64::from_bits(1) / nf;
    let l2_err = up((fft::transform_rel(m) * norm_psi + norm_err) / rn * (1.0 + 4.0 * U)) + underflow;
    let inv = 1.0 / nf;
    let w: Vec<f64> = re[..len_keep].iter().map(|&x| (x * inv).max(0.0)).collect();
    let mut window = Window { lo: klo, w, rel: 0.0, abs: 0.0, inf: 0.0, l2: 0.0, mean, var, max };
    window.add_abs_l2(up((len_keep as f64).sqrt() * l2_err), l2_err, l2_err);
    // Aliasing and the mass outside the window: at most e^-TRUNC_LN on each side of [klo, khi] (`keep_range`),
    // so at most 2 e^-TRUNC_LN folded in and as much left out.
    let tau = 4.0 * (-TRUNC_LN).exp() * (1.0 + 1e-12);
    window.add_abs(tau, tau);
    window.add_underflow_slack(len_keep as f64);
    let shift = model.shift;
    window.lo += shift;
    window.mean += shift as f64;
    window.max = window.max.map(|mx| mx + shift);
    let spectrum = Spectrum { n: n as u64, lo: klo + shift, len: len_keep as u64, r: kept_r, psi: kept, err: kept_err };
    Some(Tilted { t, var, window, scale, spectrum: Some(Box::new(spectrum)) })
}

/// The samples r in 1..=N/2 that may exceed e^-CUT in modulus, in increasing order, from B on a grid of M
/// points (module note): the A's folded mod M, one forward FFT (Higham's bound on every output by the 2-norm),
/// B^ = sum A - Re y_k, and a sample is skipped when its nearest grid point has
/// (B^ - errB) (1 - 18 U) - (pi / M) sum u A > CUT; None beyond `most` samples. The computed A's are within 17 U of the exact ones
/// (q and 1 - q within TILT_REL each, one product), which the factor (1 - 18 U) covers.
fn candidates(a_terms: &[(u64, f64)], n: u64, most: u64) -> Option<Vec<u64>> {
    let (mut atot, mut d1) = (0.0f64, 0.0f64);
    for &(u, a) in a_terms {
        atot += a;
        d1 += a * u as f64;
    }
    let k = a_terms.len() as f64;
    let atot = up(atot * (1.0 + gamma(k + 1.0)));
    let d1 = up(d1 * (1.0 + gamma(k + 2.0)) * (1.0 + 18.0 * U));
    if !d1.is_finite() {
        return None;
    }
    let want = (std::f64::consts::PI * d1 / SLACK).ceil().max(8.0);
    let mm = if want >= n as f64 { n } else { (want as u64).next_power_of_two().min(n) };
    let (mut re, mut im) = (vec![0.0f64; mm as usize], vec![0.0f64; mm as usize]);
    for &(u, a) in a_terms {
        re[(u & (mm - 1)) as usize] += a;
    }
    let norm_fold = (re.iter().map(|x| x * x).sum::<f64>() * (1.0 + gamma(mm as f64 + 2.0))).sqrt() * (1.0 + 2.0 * U);
    fft::transform(&mut re, &mut im);
    let lm = mm.trailing_zeros();
    // The FFT's error on every output (2-norm over all outputs, Parseval: ||y|| = sqrt(M) ||x||), the folded
    // sums' roundings (gamma(k) of atot on every output) and the subtraction (U of |B^| <= 2 atot).
    let err_b = up(fft::transform_rel(lm) * (mm as f64).sqrt() * norm_fold * (1.0 + 1e-9)
        + gamma(k + 1.0) * atot
        + 2.01 * U * atot);
    let ratio = n / mm;
    let slack = if mm == n { 0.0 } else { std::f64::consts::PI / mm as f64 * d1 * (1.0 + 1e-9) };
    let mut out = Vec::new();
    let half = n / 2;
    let mut next = 1u64;
    for kk in 0..=mm / 2 {
        let b_lb = ((atot - re[kk as usize]) - err_b) * (1.0 - 18.0 * U) - slack;
        if b_lb > CUT {
            continue;
        }
        // The samples whose nearest grid point is kk: |r - kk ratio| <= ratio / 2.
        let centre = kk * ratio;
        let from = centre.saturating_sub(ratio / 2).max(next);
        let to = (centre + ratio / 2).min(half);
        if out.len() as u64 + (to + 1).saturating_sub(from) > most {
            return None;
        }
        for r in from..=to {
            out.push(r);
        }
        next = next.max(to + 1);
    }
    Some(out)
}

/// One sample psi_r = phi(w^r) w^(-r L) (`phase` = r L mod N) and a bound on its error, or None where a
/// factor's relative error cannot be bounded (a factor within its own error of 0).
fn sample(bk: &Book, tab: &Tables, r: u64, n: u64, phase: u64) -> Option<((f64, f64), f64)> {
    let mask = n - 1;
    let ed = tab.ed;
    // The good listed exposures: four lanes, rescaled by exact powers of two every RESCALE_EVERY factors
    // (each factor has modulus >= 1/4 - e, so a lane stays above 2^-540 between checks).
    let mut lanes = [(1.0f64, 0.0f64); 4];
    let mut exps = [0i64; 4];
    for (uc, qc) in bk.us.chunks(RESCALE_EVERY * 4).zip(bk.qs.chunks(RESCALE_EVERY * 4)) {
        let mut uq = uc.chunks_exact(4).zip(qc.chunks_exact(4));
        for (u4, q4) in &mut uq {
            for l in 0..4 {
                let (dr, di) = tab.d(u4[l].wrapping_mul(r) & mask);
                let f = (1.0 + q4[l] * dr, q4[l] * di);
                lanes[l] = cmul(lanes[l], f);
            }
        }
        let rest = uc.len() / 4 * 4;
        for (l, (&u, &q)) in uc[rest..].iter().zip(&qc[rest..]).enumerate() {
            let (dr, di) = tab.d(u.wrapping_mul(r) & mask);
            lanes[l] = cmul(lanes[l], (1.0 + q * dr, q * di));
        }
        for l in 0..4 {
            let a = lanes[l].0.abs() + lanes[l].1.abs();
            if a < 2f64.powi(-SCALE_BITS) && a > 0.0 {
                let f = 2f64.powi(SCALE_BITS);
                lanes[l] = (lanes[l].0 * f, lanes[l].1 * f);
                exps[l] -= SCALE_BITS as i64;
            }
        }
    }
    let mut acc = Scaled::one();
    for l in 0..4 {
        acc = acc.mul(Scaled { v: lanes[l], e: exps[l] }.norm());
    }
    let factor = |u: u64, q: f64| {
        let (dr, di) = tab.d(u.wrapping_mul(r) & mask);
        (1.0 + q * dr, q * di)
    };
    for &(u, q, m) in &bk.groups {
        acc = acc.mul(Scaled { v: factor(u, q), e: 0 }.pow(m));
    }
    // The factors near q = 1/2: relative error e / (|f^| (1 - 3 U) - e) each, from the computed factor.
    let mut rel = bk.good_rel;
    for &(u, q, m) in &bk.mid {
        let f = factor(u, q);
        let e = factor_err(q, ed);
        let den = (f.0 * f.0 + f.1 * f.1).sqrt() * (1.0 - 3.0 * U) - e;
        if den.is_nan() || den <= 0.0 {
            return None;
        }
        rel += m as f64 * e / den * (1.0 + 4.0 * U);
        acc = acc.mul(Scaled { v: f, e: 0 }.pow(m));
    }
    // The sources: exp(X), X = sum lambda' (w^s - 1).
    let mut eta_src = 0.0f64;
    if !bk.sources.is_empty() {
        let (mut xr, mut xi) = (0.0f64, 0.0f64);
        for &(s, l) in &bk.sources {
            let (dr, di) = tab.d(s.wrapping_mul(r) & mask);
            xr += l * dr;
            xi += l * di;
        }
        if xr < -700.0 || !xr.is_finite() || !xi.is_finite() {
            return None;
        }
        let ex = bk.src_ed * ed + bk.src_rest;
        let mag = xr.exp();
        acc = acc.mul(Scaled { v: (mag * xi.cos(), mag * xi.sin()), e: 0 });
        // |exp(X^) - exp(X)| <= |exp(X)| (e^ex - 1); libm's exp, cos and sin at 1 ulp and two products: 7.01 U.
        eta_src = ex.exp_m1() + 7.01 * U * ex.exp();
    }
    // w^(-r L) = conj(1 + d(phase)).
    let (pr, pi) = tab.d(phase);
    acc = acc.mul(Scaled { v: (1.0 + pr, -pi), e: 0 });
    let value = acc.value();
    // The factors' errors, the products' roundings, the sources and the phase (ed, and the rounding of 1 + d).
    let eta_f = rel.exp_m1();
    let eta_m = (bk.mults * CMUL) / (1.0 - bk.mults * CMUL);
    let eta = (1.0 + eta_f) * (1.0 + eta_m) * (1.0 + eta_src) * (1.0 + ed + 1.01 * U) - 1.0;
    if eta.is_nan() || eta >= 0.5 {
        return None;
    }
    let a = (value.0 * value.0 + value.1 * value.1).sqrt() * (1.0 + 3.0 * U);
    let err = up(eta / (1.0 - eta) * a * (1.0 + 1e-9)) + 4.0 * f64::from_bits(1);
    Some((value, err))
}
