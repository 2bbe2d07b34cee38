//! Floating-point tools shared by the methods: unit roundoff, error-accumulation factors, compensated sums and
//! log-space arithmetic.
//!
//! The error analysis in this crate follows the standard model of Higham, "Accuracy and Stability of Numerical
//! Algorithms" (2nd ed., 2002): fl(x op y) = (x op y)(1 + d), |d| <= U. The elementary functions of the platform
//! libm (exp, ln, ln_1p, exp_m1, and sin and cos for the characteristic function's samples) are assumed
//! accurate to 1 ulp, which glibc documents for x86_64.

/// Unit roundoff of f64 (half an ulp of 1).
pub const U: f64 = f64::EPSILON / 2.0;

/// gamma_n = n U / (1 - n U): bound on the relative error of n successive roundings (Higham, Lemma 3.1).
pub fn gamma(n: f64) -> f64 {
    let nu = n * U;
    if nu >= 0.5 {
        f64::INFINITY
    } else {
        nu / (1.0 - nu)
    }
}

/// (1 + a)(1 + b) - 1 without losing the cross term.
pub fn compose(a: f64, b: f64) -> f64 {
    a + b + a * b
}

/// Neumaier's compensated summation: error about U |sum| + n U^2 sum |x_i|, whatever the order or signs.
#[derive(Debug, Clone, Copy, Default)]
pub struct Sum {
    s: f64,
    c: f64,
    abs: f64,
    n: u64,
}

impl Sum {
    pub fn add(&mut self, x: f64) {
        let t = self.s + x;
        if self.s.abs() >= x.abs() {
            self.c += (self.s - t) + x;
        } else {
            self.c += (x - t) + self.s;
        }
        self.s = t;
        self.abs += x.abs();
        self.n += 1;
    }
    pub fn value(&self) -> f64 {
        self.s + self.c
    }
    /// The sum as an unevaluated pair (hi, lo), hi + lo more accurate than `value`.
    pub fn parts(&self) -> (f64, f64) {
        two_sum(self.s, self.c)
    }
    /// Rigorous bound on |value - exact sum of the added doubles| (Higham, section 4.3).
    pub fn error_bound(&self) -> f64 {
        2.0 * U * self.value().abs() + gamma(4.0 * self.n as f64 + 4.0) * U * self.abs * 2.0
    }
}

/// Exact product as a double-double: a * b = hi + lo exactly (needs a fused multiply-add).
pub fn two_prod(a: f64, b: f64) -> (f64, f64) {
    let hi = a * b;
    let lo = a.mul_add(b, -hi);
    (hi, lo)
}

/// Exact sum as a double-double: a + b = hi + lo exactly (Knuth's TwoSum).
pub fn two_sum(a: f64, b: f64) -> (f64, f64) {
    let hi = a + b;
    let bb = hi - a;
    let lo = (a - (hi - bb)) + (b - bb);
    (hi, lo)
}

/// ln(exp(a) + exp(b)) without overflow.
pub fn log_add(a: f64, b: f64) -> f64 {
    if a == f64::NEG_INFINITY {
        return b;
    }
    if b == f64::NEG_INFINITY {
        return a;
    }
    let (hi, lo) = if a >= b { (a, b) } else { (b, a) };
    hi + (lo - hi).exp().ln_1p()
}

/// ln(1 - exp(x)) for x <= 0, accurate on both sides of ln 2 (Maechler 2012, "Accurately computing log(1 - exp(-|a|))").
pub fn log1m_exp(x: f64) -> f64 {
    if x >= 0.0 {
        return f64::NEG_INFINITY;
    }
    if x > -std::f64::consts::LN_2 {
        (-x.exp_m1()).ln()
    } else {
        (-x.exp()).ln_1p()
    }
}

/// x rounded up by a few ulps (never below x): error bounds pass through it so that the rounding of their
/// own arithmetic never makes a bound smaller.
pub fn up(x: f64) -> f64 {
    if x.is_nan() || x == f64::INFINITY {
        return x;
    }
    if x <= 0.0 {
        return x.max(0.0);
    }
    x * (1.0 + 4.0 * U) + f64::from_bits(1)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn two_prod_is_exact() {
        let (hi, lo) = two_prod(0.1, 3.0);
        // 0.1 * 3 in binary leaves a residue that a plain product rounds away.
        assert_ne!(lo, 0.0);
        assert_eq!(hi + lo, hi);
    }

    #[test]
    fn compensated_sum_recovers_small_terms() {
        let mut s = Sum::default();
        s.add(1.0);
        for _ in 0..1000 {
            s.add(1e-17);
        }
        assert!((s.value() - (1.0 + 1e-14)).abs() < 1e-16);
    }

    #[test]
    fn log1m_exp_both_branches() {
        assert!((log1m_exp(-1e-20) - (1e-20f64).ln()).abs() < 1e-12);
        assert!((log1m_exp(-50.0) + (-50.0f64).exp()).abs() < 1e-30);
    }
}
