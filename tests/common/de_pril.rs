//! Exact references for losses in units, in rational arithmetic (num-rational's BigRational; f64 inputs are
//! dyadic rationals and convert without loss): De Pril's recursion for the individual life model (N. De Pril,
//! "On the exact computation of the aggregate claims distribution in the individual life model", ASTIN
//! Bulletin 16, 1986, Theorem 1) and brute-force enumeration. Shared by tests/units.rs,
//! tests/units_routes.rs and tests/compound.rs (each includes it by path).
#![allow(dead_code)]

use num_rational::BigRational;
use num_traits::{One, Zero};

pub fn rat(x: f64) -> BigRational {
    BigRational::from_float(x).expect("finite")
}

/// One exposure class of De Pril's recursion: `count` exposures of `units` each with probability p < 1.
pub struct Class {
    pub units: u64,
    pub p: f64,
    pub count: u64,
}

/// De Pril (1986): with h(i, k) = i (-1)^(k+1) sum_j n_ij (q_j / (1 - q_j))^k,
///   P(S = 0) = prod (1 - q_j)^n_ij,  P(S = s) = (1/s) sum_(i=1..s) sum_(k=1..s/i) h(i, k) P(S = s - i k),
/// over the classes of random exposures; `shift` certain units move the whole law.
pub fn de_pril(classes: &[Class], shift: u64) -> Vec<BigRational> {
    let top: u64 = classes.iter().map(|c| c.units * c.count).sum();
    let n = top as usize;
    let mut p0 = BigRational::one();
    for c in classes {
        let q = BigRational::one() - rat(c.p);
        for _ in 0..c.count {
            p0 *= &q;
        }
    }
    // h(i, k) for every unit size i and k <= top / i.
    let max_i = classes.iter().map(|c| c.units).max().unwrap_or(1) as usize;
    let mut h = vec![Vec::new(); max_i + 1];
    for (i, hi) in h.iter_mut().enumerate().skip(1) {
        *hi = vec![BigRational::zero(); n / i + 1];
        for c in classes.iter().filter(|c| c.units as usize == i) {
            let odds = rat(c.p) / (BigRational::one() - rat(c.p));
            let mut pw = BigRational::one();
            for (k, h) in hi.iter_mut().enumerate().skip(1) {
                pw *= &odds;
                let term = &pw * BigRational::from_integer((c.count as i64 * i as i64).into());
                if k % 2 == 1 {
                    *h += term;
                } else {
                    *h -= term;
                }
            }
        }
    }
    let mut f = vec![BigRational::zero(); n + 1];
    f[0] = p0;
    for s in 1..=n {
        let mut acc = BigRational::zero();
        for (i, hi) in h.iter().enumerate().skip(1).take(s) {
            for k in 1..=(s / i) {
                if !hi[k].is_zero() {
                    acc += &hi[k] * &f[s - i * k];
                }
            }
        }
        f[s] = acc / BigRational::from_integer((s as i64).into());
    }
    let mut out = vec![BigRational::zero(); shift as usize];
    out.extend(f);
    out
}

/// Every outcome of a tiny book of (units, p), enumerated.
pub fn brute_force(book: &[(u64, f64)]) -> Vec<BigRational> {
    let top: u64 = book.iter().map(|b| b.0).sum();
    let mut f = vec![BigRational::zero(); top as usize + 1];
    for mask in 0u32..(1 << book.len()) {
        let (mut s, mut pr) = (0usize, BigRational::one());
        for (i, &(u, p)) in book.iter().enumerate() {
            if mask >> i & 1 == 1 {
                s += u as usize;
                pr *= rat(p);
            } else {
                pr *= BigRational::one() - rat(p);
            }
        }
        f[s] += pr;
    }
    f
}
