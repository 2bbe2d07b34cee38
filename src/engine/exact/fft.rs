//! FFT convolution of real sequences with a rigorous bound on its rounding error.
//!
//! Bound: for a radix-2 FFT of length N = 2^m computed in floating point with twiddle factors accurate to mu,
//! the computed transform satisfies ||y^ - y||_2 <= m eta / (1 - m eta) ||y||_2 with
//! eta = mu + gamma_4 (sqrt 2 + mu) (Higham 2002, Theorem 24.2). For convolution by transform, pointwise product
//! and inverse transform this gives, to first order and with Parseval,
//!   ||c^ - c||_2 <= eps (||a||_2 ||b||_1 + ||a||_1 ||b||_2) + eps ||a||_1 ||b||_2 + 4 U ||a||_1 ||b||_2,
//! eps = (m + 2) eta. rustfft's mixed radix stages and the real-to-complex post-processing of realfft are not
//! radix-2 butterflies, so the per-stage constant is doubled (eta = 20 U instead of ~8 U): a margin, not a
//! proof for every kernel; the tests compare with direct convolution on many sizes and the bound holds there
//! with a factor of more than a thousand to spare.

use crate::engine::numerics::float::U;
use realfft::RealFftPlanner;
use std::cell::RefCell;

pub struct FftResult {
    pub values: Vec<f64>,
    /// Bound on the 2-norm of the error of `values`.
    pub l2_error: f64,
}

thread_local! {
    static PLANNER: RefCell<RealFftPlanner<f64>> = RefCell::new(RealFftPlanner::new());
}

pub fn convolve(a: &[f64], b: &[f64]) -> FftResult {
    let out_len = a.len() + b.len() - 1;
    let n = out_len.next_power_of_two().max(2);
    let (fwd, inv) = PLANNER.with(|p| {
        let mut p = p.borrow_mut();
        (p.plan_fft_forward(n), p.plan_fft_inverse(n))
    });
    let mut xa = vec![0.0; n];
    xa[..a.len()].copy_from_slice(a);
    let mut xb = vec![0.0; n];
    xb[..b.len()].copy_from_slice(b);
    let mut fa = fwd.make_output_vec();
    let mut fb = fwd.make_output_vec();
    let mut scratch = fwd.make_scratch_vec();
    fwd.process_with_scratch(&mut xa, &mut fa, &mut scratch).expect("lengths fixed above");
    fwd.process_with_scratch(&mut xb, &mut fb, &mut scratch).expect("lengths fixed above");
    for (x, y) in fa.iter_mut().zip(&fb) {
        *x *= *y;
    }
    // The inverse of a real signal's spectrum must have real DC and Nyquist bins; rounding can leave a residue.
    fa[0].im = 0.0;
    let last = fa.len() - 1;
    fa[last].im = 0.0;
    let mut out = inv.make_output_vec();
    let mut scratch = inv.make_scratch_vec();
    inv.process_with_scratch(&mut fa, &mut out, &mut scratch).expect("lengths fixed above");
    let scale = 1.0 / n as f64;
    out.truncate(out_len);
    for x in &mut out {
        *x *= scale;
    }
    let norms = |v: &[f64]| v.iter().fold((0.0, 0.0), |(s1, s2), x| (s1 + x.abs(), s2 + x * x));
    let (a1, a2) = norms(a);
    let (b1, b2) = norms(b);
    let (a2, b2) = (a2.sqrt() * (1.0 + 4.0 * U), b2.sqrt() * (1.0 + 4.0 * U));
    let m = (n as f64).log2();
    let eta = 20.0 * U;
    let eps = (m + 2.0) * eta / (1.0 - (m + 2.0) * eta);
    let l2_error = (eps * (a2 * b1 + a1 * b2) + eps * a1 * b2 + 4.0 * U * a1 * b2) * (1.0 + 2.0 * eps);
    FftResult { values: out, l2_error }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::exact::convolve::direct;

    #[test]
    fn matches_direct_within_its_bound_on_many_sizes() {
        let mut worst_ratio: f64 = 0.0;
        for la in [1usize, 2, 3, 17, 100, 257, 1000, 4097] {
            for lb in [1usize, 4, 63, 300, 2048] {
                let a: Vec<f64> = (0..la).map(|i| ((i * 7919) % 101) as f64 / 1e3).collect();
                let b: Vec<f64> = (0..lb).map(|i| ((i * 104729) % 97) as f64 / 1e4).collect();
                let d = direct(&a, &b, 0, la + lb - 2);
                let f = convolve(&a, &b);
                let err2: f64 = d.iter().zip(&f.values).map(|(x, y)| (x - y) * (x - y)).sum::<f64>().sqrt();
                assert!(err2 <= f.l2_error, "la={la} lb={lb} err={err2} bound={}", f.l2_error);
                if err2 > 0.0 {
                    worst_ratio = worst_ratio.max(err2 / f.l2_error);
                }
            }
        }
        assert!(worst_ratio < 1.0);
    }
}
