//! Products of windows: direct convolution for narrow windows, FFT convolution for wide ones, each with its
//! rigorous error propagation. `product` is the small planner that picks one by estimated cost, and
//! `product_all` merges many windows smallest-first (a Huffman-like order keeps every merge balanced, which is
//! the divide-and-conquer scheme of Biscarri, Zhao and Brunner, 2018).

use super::fft;
use super::window::Window;
use crate::engine::numerics::float::{compose, gamma};
use std::cmp::Reverse;
use std::collections::BinaryHeap;

/// Direct convolution costs la * lb multiply-adds, the FFT about N log2 N times a factor; the direct product is
/// taken while it costs at most this factor times N log2 N. 3 was the break-even of speed; 10 also trades the
/// FFT's absolute error for the direct product's relative one at the lowest FFT levels of a large book, where
/// thousands of FFTs made most of the bound (docs/fft_bound.md, "Direct products"): at 10^6 exposures the bound
/// falls from 1.50e-9 to 7.6e-10 for about 10% more time (benches/README.md).
const FFT_COST_FACTOR: f64 = 10.0;

/// Convolution of a and b restricted to the counts where Bernstein's inequality leaves more than
/// exp(-TRUNC_LN) of the product's mass on each side (`Window::keep_range`).
pub fn product(a: &Window, b: &Window) -> Window {
    let max = match (a.max, b.max) {
        (Some(x), Some(y)) => Some(x + y),
        _ => None,
    };
    let (klo, khi) = Window::keep_range(a.mean + b.mean, a.var + b.var, a.lo + b.lo, max);
    product_within(a, b, klo, khi)
}

/// Convolution of a and b restricted to the output counts [klo, khi] (absolute counts), which the caller
/// has chosen so that the exact product holds at most exp(-TRUNC_LN) of mass below klo and as much above khi:
/// each cut side adds that much absolute error.
pub fn product_within(a: &Window, b: &Window, klo: u64, khi: u64) -> Window {
    let mean = a.mean + b.mean;
    let var = a.var + b.var;
    let max = match (a.max, b.max) {
        (Some(x), Some(y)) => Some(x + y),
        _ => None,
    };
    let klo = klo.max(a.lo + b.lo);
    let khi = khi.min(a.hi() + b.hi()).max(klo);
    let (la, lb) = (a.w.len(), b.w.len());
    let n = (la + lb - 1).next_power_of_two();
    let direct_cost = (la.min(lb) as f64) * ((khi - klo + 1) as f64);
    let fft_cost = FFT_COST_FACTOR * n as f64 * (n as f64).log2().max(1.0);
    let (rel, abs, inf) = Window::after_product(a, b);
    let l2 = Window::after_product_l2(a, b);
    let mut out = if la.min(lb) <= 16 || direct_cost <= fft_cost {
        let w = direct(&a.w, &b.w, (klo - a.lo - b.lo) as usize, (khi - a.lo - b.lo) as usize);
        let g = gamma(direct_roundings(la.min(lb)));
        let mut win = Window {
            lo: klo,
            w,
            rel: compose(rel, g),
            abs: abs * (1.0 + g),
            inf: inf * (1.0 + g),
            l2: l2 * (1.0 + g),
            mean,
            var,
            max,
        };
        win.add_underflow_slack(direct_cost);
        win
    } else {
        let full = fft::convolve(&a.w, &b.w);
        let start = (klo - a.lo - b.lo) as usize;
        let end = (khi - a.lo - b.lo) as usize + 1;
        let kept = end - start;
        let w: Vec<f64> = full.values[start..end].iter().map(|&x| x.max(0.0)).collect();
        // Every entry's error is at most the 2-norm of all of them; their sum at most sqrt(kept) times it.
        let mut win = Window { lo: klo, w, rel, abs, inf, l2, mean, var, max };
        win.add_abs_l2(full.l2_error * (kept as f64).sqrt(), full.l2_error, full.l2_error);
        win
    };
    // Whatever `keep_range` cut away is bounded by Bernstein: account for it.
    let lo_cut = klo > a.lo + b.lo;
    let hi_cut = khi < a.hi() + b.hi();
    let cut = (1.0 + out.rel) * (lo_cut as u8 + hi_cut as u8) as f64 * (-super::window::TRUNC_LN).exp();
    out.add_abs(cut, cut);
    out
}

/// The most roundings any term of an output of [`direct`] goes through, with m = min(la, lb): its product (1),
/// the additions into its accumulator, and the two of the final combine. An output has n <= m terms; lanes 1
/// to 3 take floor(n / 4) of them and lane 0 floor(n / 4) + n mod 4, starting from 0.0 (the first addition is
/// exact), so a term sees at most floor(n / 4) + n mod 4 - 1 additions in its lane: floor(m / 4) + 5 covers
/// every n <= m. Any tree of additions over n terms (additions of an exact 0.0 aside) is at most n - 1 deep, so
/// m + 1 covers every output too, and is the smaller for m < 6. On non-negative terms each output is within
/// gamma of the lesser of the two of the exact sum of products, relative (Higham 2002, Lemma 3.1).
pub fn direct_roundings(m: usize) -> f64 {
    ((m / 4) as f64 + 5.0).min(m as f64 + 1.0)
}

/// c_j = sum_i a_i b_{j-i} for j in [from, to] (indices relative to the start of a and b).
/// Every term is non-negative, so each output keeps a relative error of gamma([`direct_roundings`]).
pub fn direct(a: &[f64], b: &[f64], from: usize, to: usize) -> Vec<f64> {
    let (a, b) = if a.len() <= b.len() { (a, b) } else { (b, a) };
    let mut out = vec![0.0; to - from + 1];
    for (o, j) in out.iter_mut().zip(from..=to) {
        let i_lo = j.saturating_sub(b.len() - 1);
        let i_hi = j.min(a.len() - 1);
        // Four independent accumulators break the chain of dependent additions (about 3x faster here), and
        // shorten each term's chain of roundings to about a quarter (`direct_roundings`).
        let mut s = [0.0f64; 4];
        if i_lo <= i_hi {
            let xs = &a[i_lo..=i_hi];
            let ys = &b[j - i_hi..=j - i_lo];
            let n = xs.len();
            let mut i = 0;
            while i + 4 <= n {
                for l in 0..4 {
                    s[l] += xs[i + l] * ys[n - 1 - i - l];
                }
                i += 4;
            }
            while i < n {
                s[0] += xs[i] * ys[n - 1 - i];
                i += 1;
            }
        }
        *o = (s[0] + s[1]) + (s[2] + s[3]);
    }
    out
}

/// Multiply all windows, always merging the two shortest first.
pub fn product_all(mut parts: Vec<Window>) -> Window {
    if parts.is_empty() {
        return Window::point();
    }
    let mut heap: BinaryHeap<Reverse<(usize, usize)>> = BinaryHeap::new();
    let mut slots: Vec<Option<Window>> = Vec::with_capacity(parts.len() * 2);
    for w in parts.drain(..) {
        heap.push(Reverse((w.w.len(), slots.len())));
        slots.push(Some(w));
    }
    while heap.len() > 1 {
        if crate::engine::interrupt::requested() {
            // Stopped: any window will do, the result is thrown away.
            return Window::point();
        }
        let Reverse((_, i)) = heap.pop().unwrap();
        let Reverse((_, j)) = heap.pop().unwrap();
        let a = slots[i].take().unwrap();
        let b = slots[j].take().unwrap();
        let c = product(&a, &b);
        heap.push(Reverse((c.w.len(), slots.len())));
        slots.push(Some(c));
    }
    let Reverse((_, i)) = heap.pop().unwrap();
    slots[i].take().unwrap()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn naive(a: &[f64], b: &[f64]) -> Vec<f64> {
        let mut c = vec![0.0; a.len() + b.len() - 1];
        for (i, x) in a.iter().enumerate() {
            for (j, y) in b.iter().enumerate() {
                c[i + j] += x * y;
            }
        }
        c
    }

    #[test]
    fn direct_matches_naive_on_many_sizes() {
        for la in [1usize, 2, 3, 7, 31, 64] {
            for lb in [1usize, 5, 17, 100] {
                let a: Vec<f64> = (0..la).map(|i| 1.0 / (1.0 + i as f64)).collect();
                let b: Vec<f64> = (0..lb).map(|i| (i as f64 * 0.3).sin().abs()).collect();
                let c = naive(&a, &b);
                let d = direct(&a, &b, 0, la + lb - 2);
                for (x, y) in c.iter().zip(&d) {
                    assert!((x - y).abs() <= 1e-15 * x.abs().max(1.0));
                }
                let (from, to) = (1.min(la + lb - 2), (la + lb - 2) / 2);
                if to >= from {
                    let part = direct(&a, &b, from, to);
                    assert_eq!(part, d[from..=to].to_vec());
                }
            }
        }
    }
}
