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
//! `lattice::KEEP_WHOLE` (narrower ones are multiplied whole, with relative errors only), when a cost model
//! (`PRODUCT_NS` and the rest, measured) says it is cheaper than the product tree: a book whose events are
//! too few for the spectrum to concentrate (sum q (1 - q) below about CUT) needs most of the N / 2 samples, and
//! the tree is then faster (10^3 exposures of the books above: 145 ms against 9 ms).
//!
//! Also here: every exposure's contribution (sensitivity and tail without it) from one law's samples divided by
//! the exposure's factor ([`contributions`]).

use super::characteristic::{cos_sin, Samples, CUT};
use super::fft::{self, dd_add};
use super::lattice::{keep_range, round_tilt, KEEP_WHOLE};
use super::window::Window;
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
/// Most factor products (samples evaluated times factors per sample), whatever the cost model says.
const MAX_WORK: f64 = 4e8;
/// The cost model that chooses between this construction and the product tree (`examples/time_units` on the
/// books of 10^3 to 10^5 exposures in units log-uniform in 1..1000, release build, 2026-12-03): ns per factor
/// product of a sample, per N log2 N of the window's transform, per lattice step of the tree (its cost
/// follows the lattice's width, 68 to 75 ns per step measured), and for [`contributions`] per division of a
/// sample by an exposure's factor and per weight (a sample's geometric sum for one unit size).
const PRODUCT_NS: f64 = 1.2;
const FFT_NS: f64 = 1.0;
const TREE_NS: f64 = 70.0;
const DIVIDE_NS: f64 = 10.0;
const WEIGHT_NS: f64 = 1500.0;

/// When [`build_with`] goes on once it knows how many samples it must evaluate.
#[derive(Clone, Copy)]
enum Pick {
    /// Always (tests and benchmarks).
    Always,
    /// When it costs less than the product tree by the cost model.
    Cheaper,
    /// For [`contributions`]: when the law, the divisions and the weights cost less than a law per class of
    /// exposures and at most four laws by the tree.
    Contributions { classes: f64, sizes: f64, listed: f64 },
}
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
    build_with(model, t, 0, Pick::Cheaper)
}

/// [`tilted`] without the size conditions (for tests and benchmarks).
pub fn build(model: &Model, t: f64) -> Option<Tilted> {
    build_with(model, t, 0, Pick::Always)
}

/// The tilted probability of an exposure of p and u steps at t, as `cgf::tilt_qr` forms it at t u (one
/// exponential): (q, 1 - q), each within TILT_REL.
#[inline]
fn tilted_qr(p: f64, u: u64, t: f64) -> (f64, f64) {
    let tu = t * u as f64;
    let (a, b) = if tu > 0.0 { ((1.0 - p) * (-tu).exp(), p) } else { (1.0 - p, p * tu.exp()) };
    let d = a + b;
    (b / d, a / d)
}

/// [`build`] with the window's lower end `margin` steps further down: the law of S minus any one exposure of
/// at most `margin` steps then has at most e^-TRUNC_LN below the window as well (S_-i < L implies
/// S < L + u_i), so its samples (those of S divided by the exposure's factor) serve it too.
fn build_with(model: &Model, t: f64, margin: u64, pick: Pick) -> Option<Tilted> {
    let t = round_tilt(t);
    if !t.is_finite() || t.abs() > 700.0 {
        return None;
    }
    let step = |v: &[u64], i: usize| v.get(i).copied().unwrap_or(1);
    let qr = |p: f64, u: u64| tilted_qr(p, u, t);
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
    let klo = klo.saturating_sub(margin);
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
    let c = cand.len() as f64;
    let cost = PRODUCT_NS * c * bk.mults + FFT_NS * nf * nf.log2();
    let tree = TREE_NS * model.lattice_width() as f64;
    let take = match pick {
        Pick::Always => true,
        Pick::Cheaper => cost <= tree,
        Pick::Contributions { classes, sizes, listed } => {
            // Within four exact evaluations' work (what the work budget counted for it: one evaluation costs
            // about the tree's time) and cheaper than a law per class.
            let all = cost + DIVIDE_NS * c * listed + WEIGHT_NS * c * sizes;
            all <= 4.0 * tree && all <= classes * cost.min(tree)
        }
    };
    if !take {
        return None;
    }
    let scale = cgf::scale(model, t);
    let mut samples = Samples::new(n);
    for &r in &cand {
        if interrupt::requested() {
            return Some(Tilted { t, var: 0.0, window: Window::point(), scale: cgf::Scale::default(), spectrum: None });
        }
        let phase = (r as u128 * klo as u128 % n as u128) as u64;
        let (value, err) = sample(&bk, &tab, r, n as u64, phase)?;
        samples.push(r, value, err);
    }
    // Aliasing and the mass outside the window: at most e^-TRUNC_LN on each side of [klo, khi] (`keep_range`).
    Some(samples.into_law(klo, len_keep, (mean, var, max), model.shift, t, scale))
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

/// Most distinct unit sizes among the listed exposures for [`contributions`]: each needs its own weights for
/// the range sum (a few hundred double-double operations per sample).
const MAX_UNIT_SIZES: usize = 4096;

/// Whether [`contributions`] takes a book at the lattice index x (a cheap test for the work budget: it may
/// still return None, where a factor cannot be bounded away from 0 or the samples would be too many).
pub fn contributions_apply(model: &Model, moments: &crate::engine::numerics::moments::Moments, x: u64) -> bool {
    let bounded = model.poisson <= 0.0 && model.scaled_poisson.is_empty();
    let wide = model.lattice_width().saturating_add(model.shift) > KEEP_WHOLE || !bounded;
    if model.random_exposures_bounded() < super::characteristic::MIN_EXPOSURES || !wide {
        return false;
    }
    // False for a NaN mean as well.
    let above = x as f64 > moments.mean;
    if !above || model.support_max().is_some_and(|m| x > m) {
        return false;
    }
    let mut sizes: Vec<u64> = model.units.clone();
    sizes.sort_unstable();
    sizes.dedup();
    sizes.len() <= MAX_UNIT_SIZES
}

/// Every listed exposure's sensitivity dP(S >= x)/dp_i = P(x - u_i <= S_-i < x) and tail without it
/// P(S_-i >= x), for a lattice index x above the mean, from the samples of S's tilted law divided by the
/// exposure's factor: phi_-i(w) = phi(w) / (1 + q_i (w^(u_i) - 1)). Dividing in the frequency domain is
/// stable where deconvolving the pmf is not: the factor's modulus is at least |1 - 2 q_i| (and is taken from
/// the computed factor near q = 1/2, None where it cannot be bounded away from 0).
///
/// Errors (docs/characteristic.md, "Leaving one exposure out"): for a sample psi^ within e_psi and a factor
/// f^ within e_f (`factor_err`), |psi^ / f^ - psi / f| <= e_psi / |f^| + (|psi^| + e_psi) e_f / (|f^| (|f^| - e_f)),
/// plus 7.01 U of the computed quotient (a complex product, |f^|^2 and a division per part). The samples not
/// kept are below e^(-CUT + 1/2) for S_-i (its B is S's less q_i (1 - q_i) (1 - cos) <= 1/2). The tilted sums
/// are read with `Spectrum::weights` and `Spectrum::apply`, the range sum from x - u_i over u_i points, and
/// scaled by K_-i(t) = K(t) - ln M_i(t) (phi_i from `cgf::tilt` within 8 U, as `cgf::scale` counts it).
/// None where the construction does not apply ([`contributions_apply`]); the caller then builds a law per
/// class of exposures.
pub fn contributions(
    model: &Model,
    moments: &crate::engine::numerics::moments::Moments,
    x: u64,
) -> Option<Vec<super::leave_one_out::Contribution>> {
    contributions_with(model, moments, x, false)
}

/// [`contributions`], and with `always` whatever the cost model says (for tests and benchmarks).
pub fn contributions_with(
    model: &Model,
    moments: &crate::engine::numerics::moments::Moments,
    x: u64,
    always: bool,
) -> Option<Vec<super::leave_one_out::Contribution>> {
    use super::leave_one_out::Contribution;
    use crate::engine::numerics::cgf::{tilt, TiltConsts};
    use crate::engine::numerics::float::two_sum;
    if !contributions_apply(model, moments, x) {
        return None;
    }
    let top = model.max_step();
    let t = round_tilt(super::solve_tilt(model, moments, x as f64, super::Dir::Up));
    let mut sizes: Vec<u64> = model.units.clone();
    sizes.sort_unstable();
    sizes.dedup();
    let pick = if always {
        Pick::Always
    } else {
        Pick::Contributions {
            classes: super::leave_one_out::classes_in_units(model) as f64,
            sizes: sizes.len().max(1) as f64,
            listed: model.bernoulli.len() as f64,
        }
    };
    let law = build_with(model, t, top, pick)?;
    let spec = law.spectrum.as_deref()?;
    let tab = Tables::new(spec.n);
    let mask = spec.n - 1;
    let tail_w = spec.weights(x, true, None, t)?;
    let mut range_w: std::collections::HashMap<u64, super::characteristic::Weights> = std::collections::HashMap::new();
    let step = |i: usize| model.units.get(i).copied().unwrap_or(1);
    let skip = 0.5f64.exp() * (1.0 + 1e-12);
    let mut out = Vec::with_capacity(model.bernoulli.len());
    let mut divided: Vec<((f64, f64), f64)> = Vec::with_capacity(spec.r.len());
    for (i, &p) in model.bernoulli.iter().enumerate() {
        if i % 256 == 0 && interrupt::requested() {
            return None;
        }
        let u = step(i);
        let (q, _) = tilted_qr(p, u, t);
        let e = factor_err(q, tab.ed);
        divided.clear();
        for (&r, (&(pr, pi), &pe)) in spec.r.iter().zip(spec.psi.iter().zip(&spec.err)) {
            let (dr, di) = tab.d(u.wrapping_mul(r) & mask);
            let f = (1.0 + q * dr, q * di);
            let m2 = f.0 * f.0 + f.1 * f.1;
            let af = m2.sqrt() * (1.0 - 3.0 * U);
            let lb = af - e;
            if lb.is_nan() || lb <= 0.0 {
                return None;
            }
            let v = ((pr * f.0 + pi * f.1) / m2, (pi * f.0 - pr * f.1) / m2);
            let apsi = (pr * pr + pi * pi).sqrt() * (1.0 + 3.0 * U);
            let av = (v.0 * v.0 + v.1 * v.1).sqrt() * (1.0 + 3.0 * U);
            let err = up((pe / af + (apsi + pe) * e / (af * lb) + 7.01 * U * av) * (1.0 + 1e-9));
            divided.push((v, err));
        }
        // K_-i(t) = K(t) - ln M_i(t): ln M_i = phi_i + t u b_i.
        let ti = tilt(p, &TiltConsts::new(t * u as f64));
        let (h, l) = two_sum(law.scale.phi, -ti.phi);
        let scale = cgf::Scale {
            phi: h,
            phi_lo: law.scale.phi_lo + l,
            phi_err: up(law.scale.phi_err + 8.0 * U * ti.phi.abs() + 4.0 * U * U * (h.abs() + 4.0)),
            b: law.scale.b - if ti.b { u as f64 } else { 0.0 },
        };
        let tail_without = {
            let (sum, rel, abs) = spec.apply(&tail_w, divided.iter().copied(), skip)?;
            super::finish_scaled(&scale, t, x, sum, 0.0, 0, rel, abs, 1.0)
        };
        if !range_w.contains_key(&u) {
            if range_w.len() >= MAX_UNIT_SIZES {
                return None;
            }
            range_w.insert(u, spec.weights(x.checked_sub(u)?, true, Some(u), t)?);
        }
        let sensitivity = {
            let (sum, rel, abs) = spec.apply(&range_w[&u], divided.iter().copied(), skip)?;
            super::finish_scaled(&scale, t, x - u, sum, 0.0, 0, rel, abs, 1.0)
        };
        out.push(Contribution { sensitivity, tail_without });
    }
    Some(out)
}
