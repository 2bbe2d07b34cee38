//! FFT convolution of two non-negative real sequences with a proven bound on its rounding error.
//!
//! The transform is our own iterative radix-2 Cooley-Tukey FFT (decimation in time, bit-reversed input), so
//! that Higham's Theorem 24.2 (Higham 2002, "Accuracy and Stability of Numerical Algorithms", 2nd ed.) applies
//! to exactly the code that runs: for N = 2^m and twiddles with |w^ - w| <= mu,
//!   ||fl(F x) - F x||_2 <= m eta / (1 - m eta) ||F x||_2,   eta = mu + gamma_4 (sqrt 2 + mu).
//! The twiddles come from double-double Taylor series rounded once to f64, so mu = U (1 + 2^-40) and no libm
//! function is involved. Both inputs travel in one complex transform (a + i b), their spectra are separated by
//! conjugate symmetry, multiplied, and the product goes back through the same FFT on conjugated data. The
//! bound on ||c^ - c||_2 below follows every step without first-order truncation; docs/fft_bound.md is the
//! proof, and the tests compare with a double-double convolution and assert the margin it states.

use crate::engine::numerics::float::{gamma, two_prod, two_sum, U};
use std::cell::RefCell;

pub struct FftResult {
    pub values: Vec<f64>,
    /// Bound on the 2-norm of the error of `values` (every entry, before truncation to a window).
    pub l2_error: f64,
}

/// Bound on |w^ - w| for every twiddle: one rounding of a double-double value whose own error is below 2^-96
/// (see `dd_cos_sin`); 2^-40 U covers 2 * 2^-96 with room.
pub const MU: f64 = U * (1.0 + 1.0 / (1u64 << 40) as f64);

/// eta of Higham's Theorem 24.2: the error of one butterfly stage, relative to the 2-norm.
fn eta() -> f64 {
    MU + gamma(4.0) * (std::f64::consts::SQRT_2 + MU)
}

/// m eta / (1 - m eta): the relative 2-norm error of a computed transform of length 2^m (Theorem 24.2).
pub fn transform_rel(m: u32) -> f64 {
    let me = m as f64 * eta();
    if me >= 0.5 {
        f64::INFINITY
    } else {
        me / (1.0 - me)
    }
}

// ---------- twiddles ----------

/// A double-double: hi + lo with |lo| <= ulp(hi) / 2.
pub(crate) type Dd = (f64, f64);

pub(crate) fn fast_two_sum(a: f64, b: f64) -> Dd {
    let s = a + b;
    (s, b - (s - a))
}

pub(crate) fn dd_add(a: Dd, b: Dd) -> Dd {
    let (s, e) = two_sum(a.0, b.0);
    fast_two_sum(s, e + (a.1 + b.1))
}

pub(crate) fn dd_mul(a: Dd, b: Dd) -> Dd {
    let (p, e) = two_prod(a.0, b.0);
    fast_two_sum(p, e + (a.0 * b.1 + a.1 * b.0))
}

pub(crate) fn dd_div(a: Dd, d: f64) -> Dd {
    let q = a.0 / d;
    let (p, e) = two_prod(q, d);
    fast_two_sum(q, ((a.0 - p) - e + a.1) / d)
}

/// pi as a double-double: the nearest double and the nearest double to the rest (|pi - hi - lo| < 2^-106).
pub(crate) const PI_DD: Dd = (std::f64::consts::PI, 1.224_646_799_147_353_2e-16);

/// cos and sin of 2 pi j / n as double-doubles, for n a power of two and 0 <= j <= n / 8 (angles up to pi/4).
///
/// The angle pi (2 j) / n is formed exactly up to the rounding of lo(pi) * 2j (relative 2^-53 of 2^-53); the
/// Taylor series are alternating with decreasing terms for x <= pi/4, so stopping after x^29 / 29! and x^28 /
/// 28! leaves less than x^31 / 31! < 2^-120; each of the 15 double-double steps adds a relative error below
/// 2^-102. The total is far below the 2^-96 that `MU` allows (checked against mpmath in the tests).
pub(crate) fn dd_cos_sin(j: u64, n: u64) -> (Dd, Dd) {
    let (h, l) = two_prod(PI_DD.0, (2 * j) as f64);
    let x = fast_two_sum(h, l + PI_DD.1 * (2 * j) as f64);
    let inv = 1.0 / n as f64; // a power of two: exact
    let x = (x.0 * inv, x.1 * inv);
    let x2 = dd_mul(x, x);
    let (mut s, mut st) = (x, x);
    let (mut c, mut ct) = ((1.0, 0.0), (1.0, 0.0));
    for k in 1..=14u32 {
        let k = k as f64;
        ct = dd_div(dd_mul(ct, x2), (2.0 * k - 1.0) * (2.0 * k));
        st = dd_div(dd_mul(st, x2), (2.0 * k) * (2.0 * k + 1.0));
        let sign = if k as u32 % 2 == 1 { -1.0 } else { 1.0 };
        c = dd_add(c, (sign * ct.0, sign * ct.1));
        s = dd_add(s, (sign * st.0, sign * st.1));
    }
    (c, s)
}

/// w^j = exp(-2 pi i j / n) for 0 <= j < n / 2, rounded once to f64: the first octant from `dd_cos_sin`, the
/// others by the exact symmetries cos(pi/2 - x) = sin x and cos(pi - x) = -cos x.
fn twiddle(j: u64, n: u64) -> (f64, f64) {
    let (q, h) = (n / 8, n / 4);
    let (c, s) = if j <= q {
        let (c, s) = dd_cos_sin(j, n);
        (c.0, s.0)
    } else if j <= h {
        let (c, s) = dd_cos_sin(h - j, n);
        (s.0, c.0)
    } else if j <= h + q {
        let (c, s) = dd_cos_sin(j - h, n);
        (-s.0, c.0)
    } else {
        let (c, s) = dd_cos_sin(2 * h - j, n);
        (-c.0, s.0)
    };
    (c, -s)
}

/// Twiddles of every stage, concatenated: stage h (butterflies h apart) uses exp(-2 pi i k / 2h), k < h, at
/// offset h - 1. Built for the largest length seen so far and kept per thread; smaller lengths use a prefix.
#[derive(Default)]
struct Table {
    re: Vec<f64>,
    im: Vec<f64>,
    /// Bit reversal of every index below `len` in log2(len) bits; shifted right for shorter transforms.
    bitrev: Vec<u32>,
    /// Largest transform length the table serves.
    len: usize,
}

impl Table {
    fn ensure(&mut self, n: usize) {
        if self.len >= n {
            return;
        }
        let half = n / 2;
        let top: Vec<(f64, f64)> = (0..half as u64).map(|j| twiddle(j, n as u64)).collect();
        self.re = vec![0.0; n - 1];
        self.im = vec![0.0; n - 1];
        let mut h = 1;
        while h <= half {
            // exp(-2 pi i k / 2h) = exp(-2 pi i (k n / 2h) / n): the same rounded values as the top stage.
            let stride = half / h;
            for k in 0..h {
                let (r, i) = top[k * stride];
                self.re[h - 1 + k] = r;
                self.im[h - 1 + k] = i;
            }
            h *= 2;
        }
        let bits = n.trailing_zeros();
        self.bitrev = (0..n).map(|i| (i.reverse_bits() >> (usize::BITS - bits)) as u32).collect();
        self.len = n;
    }

    /// exp(-2 pi i k / n) for k < n / 2 (the last stage's twiddles of a transform of length n).
    fn top(&self, n: usize) -> (&[f64], &[f64]) {
        (&self.re[n / 2 - 1..n - 1], &self.im[n / 2 - 1..n - 1])
    }
}

thread_local! {
    static TABLE: RefCell<Table> = RefCell::new(Table::default());
    /// Work space of `convolve`, kept between calls (four vectors of the transform length).
    static BUF: RefCell<Vec<f64>> = const { RefCell::new(Vec::new()) };
}

/// One radix-2 butterfly (x, y) -> (x + w y, x - w y) with the textbook complex product (4 multiplications,
/// 2 additions, no fused multiply-add): the model behind Higham's Lemma 3.5 and Theorem 24.2.
#[inline(always)]
fn butterfly(xr: &mut f64, xi: &mut f64, yr: &mut f64, yi: &mut f64, wr: f64, wi: f64) {
    let tr = wr * *yr - wi * *yi;
    let ti = wr * *yi + wi * *yr;
    let (ar, ai) = (*xr, *xi);
    *xr = ar + tr;
    *xi = ai + ti;
    *yr = ar - tr;
    *yi = ai - ti;
}

/// In-place forward DFT y_k = sum_j x_j exp(-2 pi i j k / n) of length n = 2^m >= 4, on input already in
/// bit-reversed order, radix 2. Two consecutive stages run in one pass over memory (the radix-4 access
/// pattern), but every butterfly is the radix-2 butterfly with the same twiddle and the same operations, so
/// the result is bit for bit that of the plain radix-2 algorithm Theorem 24.2 analyses.
fn fft_bitrev_input(re: &mut [f64], im: &mut [f64], tw: &Table) {
    #[cfg(target_arch = "x86_64")]
    if std::is_x86_feature_detected!("avx") {
        // SAFETY: the CPU supports AVX (checked just above).
        unsafe { fft_avx(re, im, tw) };
        return;
    }
    fft_body(re, im, tw);
}

/// The same code compiled for 4-wide vectors. IEEE additions and multiplications round the same way in every
/// instruction set and Rust never fuses a * b + c on its own, so the results are bit for bit those of
/// `fft_body`.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx")]
unsafe fn fft_avx(re: &mut [f64], im: &mut [f64], tw: &Table) {
    fft_body(re, im, tw);
}

#[inline(always)]
fn fft_body(re: &mut [f64], im: &mut [f64], tw: &Table) {
    let n = re.len();
    debug_assert!(n >= 4 && n.is_power_of_two() && im.len() == n && tw.len >= n);
    // Stages h = 1 and h = 2 together: their twiddles are 1 and -i, whose products are exact and skipped.
    for (r, i) in re.chunks_exact_mut(4).zip(im.chunks_exact_mut(4)) {
        let (r0, r1, r2, r3) = (r[0] + r[1], r[0] - r[1], r[2] + r[3], r[2] - r[3]);
        let (i0, i1, i2, i3) = (i[0] + i[1], i[0] - i[1], i[2] + i[3], i[2] - i[3]);
        // (r2, i2) * 1 and (r3, i3) * (-i) = (i3, -r3).
        r[0] = r0 + r2;
        i[0] = i0 + i2;
        r[2] = r0 - r2;
        i[2] = i0 - i2;
        r[1] = r1 + i3;
        i[1] = i1 - r3;
        r[3] = r1 - i3;
        i[3] = i1 + r3;
    }
    let mut h = 4;
    while 2 * h < n {
        // Stages h and 2h in one pass over blocks of 4h.
        let (w1r, w1i) = (&tw.re[h - 1..2 * h - 1], &tw.im[h - 1..2 * h - 1]);
        let (w2r, w2i) = (&tw.re[2 * h - 1..4 * h - 1], &tw.im[2 * h - 1..4 * h - 1]);
        for (r, i) in re.chunks_exact_mut(4 * h).zip(im.chunks_exact_mut(4 * h)) {
            let (r01, r23) = r.split_at_mut(2 * h);
            let (r0, r1) = r01.split_at_mut(h);
            let (r2, r3) = r23.split_at_mut(h);
            let (i01, i23) = i.split_at_mut(2 * h);
            let (i0, i1) = i01.split_at_mut(h);
            let (i2, i3) = i23.split_at_mut(h);
            let (r1, r2, r3, i1, i2, i3) =
                (&mut r1[..h], &mut r2[..h], &mut r3[..h], &mut i1[..h], &mut i2[..h], &mut i3[..h]);
            let (w1r, w1i, w2r, w2i) = (&w1r[..h], &w1i[..h], &w2r[..2 * h], &w2i[..2 * h]);
            for k in 0..h {
                let (mut xr0, mut xi0, mut xr1, mut xi1) = (r0[k], i0[k], r1[k], i1[k]);
                let (mut xr2, mut xi2, mut xr3, mut xi3) = (r2[k], i2[k], r3[k], i3[k]);
                butterfly(&mut xr0, &mut xi0, &mut xr1, &mut xi1, w1r[k], w1i[k]);
                butterfly(&mut xr2, &mut xi2, &mut xr3, &mut xi3, w1r[k], w1i[k]);
                butterfly(&mut xr0, &mut xi0, &mut xr2, &mut xi2, w2r[k], w2i[k]);
                butterfly(&mut xr1, &mut xi1, &mut xr3, &mut xi3, w2r[k + h], w2i[k + h]);
                r0[k] = xr0;
                i0[k] = xi0;
                r1[k] = xr1;
                i1[k] = xi1;
                r2[k] = xr2;
                i2[k] = xi2;
                r3[k] = xr3;
                i3[k] = xi3;
            }
        }
        h *= 4;
    }
    if h < n {
        // One stage left (m odd).
        let (wr, wi) = (&tw.re[h - 1..2 * h - 1], &tw.im[h - 1..2 * h - 1]);
        for (r, i) in re.chunks_exact_mut(2 * h).zip(im.chunks_exact_mut(2 * h)) {
            let (r0, r1) = r.split_at_mut(h);
            let (i0, i1) = i.split_at_mut(h);
            let (r1, i1, wr, wi) = (&mut r1[..h], &mut i1[..h], &wr[..h], &wi[..h]);
            for k in 0..h {
                let (mut xr, mut xi, mut yr, mut yi) = (r0[k], i0[k], r1[k], i1[k]);
                butterfly(&mut xr, &mut xi, &mut yr, &mut yi, wr[k], wi[k]);
                r0[k] = xr;
                i0[k] = xi;
                r1[k] = yr;
                i1[k] = yi;
            }
        }
    }
}

/// Forward DFT y_k = sum_j x_j exp(-2 pi i j k / n) of (re, im) in natural order, in place, for n = 2^m >= 4:
/// the same butterflies and twiddles as [`convolve`], so Theorem 24.2 holds with [`transform_rel`]`(m)`
/// (the bit-reversal permutation is exact). Used by the characteristic-function construction.
pub(crate) fn transform(re: &mut [f64], im: &mut [f64]) {
    let n = re.len();
    assert!(n >= 4 && n.is_power_of_two() && im.len() == n);
    TABLE.with(|t| t.borrow_mut().ensure(n));
    TABLE.with(|t| fft_in_place(re, im, &t.borrow()));
}

/// Forward DFT of (re, im) in natural order, in place.
fn fft_in_place(re: &mut [f64], im: &mut [f64], tw: &Table) {
    let n = re.len();
    let bits = n.trailing_zeros();
    for i in 0..n {
        let j = i.reverse_bits() >> (usize::BITS - bits);
        if j > i {
            re.swap(i, j);
            im.swap(i, j);
        }
    }
    fft_bitrev_input(re, im, tw);
}

/// 1-norm and an upper bound on the 2-norm of a vector (the bound's own arithmetic rounded upwards).
fn norms(v: &[f64]) -> (f64, f64) {
    let (s1, s2) = v.iter().fold((0.0f64, 0.0f64), |(s1, s2), x| (s1 + x.abs(), s2 + x * x));
    let g = gamma(v.len() as f64 + 2.0);
    (s1 * (1.0 + g), (s2 * (1.0 + g)).sqrt() * (1.0 + 2.0 * U) + f64::from_bits(1))
}

/// The full linear convolution c = a * b (length la + lb - 1) and a bound on ||c^ - c||_2.
pub fn convolve(a: &[f64], b: &[f64]) -> FftResult {
    let out_len = a.len() + b.len() - 1;
    let n = out_len.next_power_of_two().max(8);
    let m = n.trailing_zeros();
    let half = n / 2;
    let mut values = vec![0.0; out_len];
    TABLE.with(|t| t.borrow_mut().ensure(n));
    TABLE.with(|t| {
        BUF.with(|buf| {
            let tw = t.borrow();
            let shift = tw.len.trailing_zeros() - m;
            let rev = |i: usize| (tw.bitrev[i] >> shift) as usize;
            let rev_half = |i: usize| (tw.bitrev[i] >> (shift + 1)) as usize;
            let mut buf = buf.borrow_mut();
            buf.clear();
            buf.resize(3 * n, 0.0);
            let (zr, rest) = buf.split_at_mut(n);
            let (zi, rest) = rest.split_at_mut(n);
            let (yr, yi) = rest.split_at_mut(half);
            // z = a + i b, written straight into bit-reversed order (the permutation is exact).
            for (i, &x) in a.iter().enumerate() {
                zr[rev(i)] = x;
            }
            for (i, &x) in b.iter().enumerate() {
                zi[rev(i)] = x;
            }
            fft_bitrev_input(zr, zi, &tw);
            // Z = A + i B with A, B the spectra of a and b: A_k = (Z_k + conj Z_-k) / 2 and
            // B_k = (Z_k - conj Z_-k) / 2i; C = A B is the spectrum of c, Hermitian, and so is its computed value
            // (the formulas for k and -k round identically).
            let spectrum = |k: usize| {
                let j = (n - k) & (n - 1);
                let (xr, xi, vr, vi) = (zr[k], zi[k], zr[j], zi[j]);
                let (ar, ai) = ((xr + vr) * 0.5, (xi - vi) * 0.5);
                let (br, bi) = ((xi + vi) * 0.5, (vr - xr) * 0.5);
                (ar * br - ai * bi, ar * bi + ai * br)
            };
            // c is real: y_m = c_2m + i c_2m+1 has the half-length spectrum Y_k = E_k + i O_k with
            // E_k = (C_k + C_k+n/2) / 2 and O_k = (C_k - C_k+n/2) e^(2 pi i k / n) / 2. The inverse is
            // conj(F conj(Y)) / (n/2): conj(Y) goes in, bit-reversed for the next transform.
            let (wr, wi) = tw.top(n);
            for k in 0..half {
                let (pr, pi) = spectrum(k);
                let (qr, qi) = spectrum(k + half);
                let (sr, si) = (pr + qr, pi + qi);
                let (dr, di) = (pr - qr, pi - qi);
                // conj(w^k) d, the textbook complex product.
                let (ur, ui) = (wr[k] * dr + wi[k] * di, wr[k] * di - wi[k] * dr);
                let r = rev_half(k);
                yr[r] = (sr - ui) * 0.5;
                yi[r] = -((si + ur) * 0.5);
            }
            fft_bitrev_input(yr, yi, &tw);
            let scale = 2.0 / n as f64; // a power of two: exact
            for (i, v) in values.iter_mut().enumerate() {
                *v = if i % 2 == 0 { yr[i / 2] * scale } else { -yi[i / 2] * scale };
            }
        })
    });
    FftResult { values, l2_error: l2_bound(a, b, n, m) }
}

/// The bound of docs/fft_bound.md, every quantity divided by sqrt(n).
fn l2_bound(a: &[f64], b: &[f64], n: usize, m: u32) -> f64 {
    let (a1, a2) = norms(a);
    let (b1, b2) = norms(b);
    let rn = (n as f64).sqrt() * (1.0 + U);
    let ef = transform_rel(m);
    // (1) the forward transform of z = a + i b: ||E|| / sqrt n <= ef ||z||_2.
    let e = ef * (a2 * a2 + b2 * b2).sqrt() * (1.0 + 3.0 * U);
    // (2) separating A and B: the conjugate pair of E, plus one rounded addition per component.
    let ea = (1.0 + U) * e + U * a2;
    let eb = (1.0 + U) * e + U * b2;
    // (3) the pointwise product, with |A_k| <= ||a||_1, |B_k| <= ||b||_1 and Lemma 3.5 for the rounding.
    let d = ea * b1 + a1 * eb + rn * ea * eb + std::f64::consts::SQRT_2 * gamma(2.0) * (a2 + ea) * (b1 + rn * eb);
    // (4) the half-length spectrum Y of y = (c_even + i c_odd): the exact map C -> Y has norm 1/sqrt 2 on
    // Hermitian vectors (C^ - C is one), and forming Y^ rounds by at most rho (|C^_k| + |C^_k+n/2|), so
    // ||Y^ - Y|| / sqrt n <= g. (5) its inverse of length n/2, relative error eps' (Theorem 24.2 with m - 1).
    let c2 = (a2 * b1).min(a1 * b2);
    let kappa = U + (MU + std::f64::consts::SQRT_2 * gamma(2.0) * (1.0 + MU)) * (1.0 + U);
    let rho = kappa * (1.0 + U) + U;
    let g = d / std::f64::consts::SQRT_2 + std::f64::consts::SQRT_2 * rho * (c2 + d);
    let l2 = std::f64::consts::SQRT_2 * (g + transform_rel(m - 1) * (c2 / std::f64::consts::SQRT_2 + g));
    // Gradual underflow: each of the about 2 n (m + 2) operations may lose 2^-1074 absolutely, amplified by at
    // most sqrt 2 per later stage (||stage||_2 = sqrt 2), so by at most sqrt n overall.
    let underflow = 4.0 * (n as f64) * (m as f64 + 2.0) * rn * f64::from_bits(1);
    (l2 + underflow) * (1.0 + 64.0 * U)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::numerics::float::two_sum;

    /// Convolution accumulated in double-double: exact to about 2^-100 relative, since every term is
    /// non-negative.
    fn dd_convolve(a: &[f64], b: &[f64]) -> Vec<f64> {
        let mut out = vec![0.0; a.len() + b.len() - 1];
        for (j, o) in out.iter_mut().enumerate() {
            let mut acc = (0.0, 0.0);
            for (i, &x) in a.iter().enumerate() {
                if j >= i && j - i < b.len() {
                    acc = dd_add(acc, two_prod(x, b[j - i]));
                }
            }
            *o = two_sum(acc.0, acc.1).0;
        }
        out
    }

    fn pmf_like(len: usize, seed: u64) -> Vec<f64> {
        let mut s = seed;
        let mut v: Vec<f64> = (0..len)
            .map(|i| {
                s = s.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
                let u = (s >> 11) as f64 / (1u64 << 53) as f64;
                let z = (i as f64 - len as f64 / 2.0) / (len as f64 / 6.0 + 1.0);
                (-0.5 * z * z).exp() * (0.5 + u)
            })
            .collect();
        let t: f64 = v.iter().sum();
        v.iter_mut().for_each(|x| *x /= t);
        v
    }

    /// The claim of docs/fft_bound.md: the error never exceeds the bound, and the bound is within a factor
    /// 1000 of the error seen (an a-priori worst-case bound: the errors of N log N roundings mostly cancel).
    pub(crate) const CLAIMED_MAX_RATIO: f64 = 1000.0;

    #[test]
    fn matches_double_double_within_its_bound_on_many_sizes() {
        let mut worst_ratio: f64 = f64::INFINITY;
        let mut best_ratio: f64 = 0.0;
        for la in [1usize, 2, 3, 17, 64, 100, 257, 1000, 4097] {
            for lb in [1usize, 4, 63, 300, 2048] {
                let a = pmf_like(la, la as u64);
                let b = pmf_like(lb, 7 + lb as u64);
                let d = dd_convolve(&a, &b);
                let f = convolve(&a, &b);
                let err2: f64 = d.iter().zip(&f.values).map(|(x, y)| (x - y) * (x - y)).sum::<f64>().sqrt();
                assert!(err2 <= f.l2_error, "la={la} lb={lb} err={err2} bound={}", f.l2_error);
                if la + lb > 64 {
                    let ratio = f.l2_error / err2;
                    assert!(ratio <= CLAIMED_MAX_RATIO, "la={la} lb={lb} bound/err={ratio}");
                    worst_ratio = worst_ratio.min(ratio);
                    best_ratio = best_ratio.max(ratio);
                }
            }
        }
        eprintln!("fft bound / observed 2-norm error: {worst_ratio:.1} to {best_ratio:.1}");
    }

    /// Source: fixtures/reference/twiddles.json, made by fixtures/reference/make_twiddles.py (mpmath, 60
    /// digits): cos and sin of 2 pi j / n as double-double pairs. The double-double series must agree to
    /// 2^-100, and every rounded twiddle must be within MU of the exact value.
    #[test]
    fn twiddles_match_mpmath() {
        let path = concat!(env!("CARGO_MANIFEST_DIR"), "/fixtures/reference/twiddles.json");
        let v: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
        let mut count = 0;
        for p in v["points"].as_array().unwrap() {
            let n = p["n"].as_u64().unwrap();
            let j = p["j"].as_u64().unwrap();
            let get = |k: &str| (p[k][0].as_f64().unwrap(), p[k][1].as_f64().unwrap());
            let (cos_ref, sin_ref) = (get("cos"), get("sin"));
            if j <= n / 8 {
                let (c, s) = dd_cos_sin(j, n);
                let diff = |x: Dd, y: Dd| ((x.0 - y.0) + (x.1 - y.1)).abs();
                assert!(diff(c, cos_ref) <= 2f64.powi(-100), "cos n={n} j={j}");
                assert!(diff(s, sin_ref) <= 2f64.powi(-100), "sin n={n} j={j}");
            }
            let (wr, wi) = twiddle(j, n);
            let er = (wr - cos_ref.0) - cos_ref.1;
            let ei = (wi + sin_ref.0) + sin_ref.1;
            assert!((er * er + ei * ei).sqrt() <= MU, "twiddle n={n} j={j}");
            count += 1;
        }
        assert!(count > 100);
    }

    #[test]
    fn transform_matches_the_definition() {
        let n = 64;
        let re0: Vec<f64> = (0..n).map(|i| ((i * 37) % 11) as f64 - 5.0).collect();
        let im0: Vec<f64> = (0..n).map(|i| ((i * 13) % 7) as f64).collect();
        let (mut re, mut im) = (re0.clone(), im0.clone());
        let mut t = Table::default();
        t.ensure(n);
        fft_in_place(&mut re, &mut im, &t);
        for k in 0..n {
            let (mut sr, mut si) = (0.0, 0.0);
            for j in 0..n {
                let ang = -2.0 * std::f64::consts::PI * (j * k % n) as f64 / n as f64;
                sr += re0[j] * ang.cos() - im0[j] * ang.sin();
                si += re0[j] * ang.sin() + im0[j] * ang.cos();
            }
            assert!((sr - re[k]).abs() < 1e-11 && (si - im[k]).abs() < 1e-11, "k={k}");
        }
    }
}
