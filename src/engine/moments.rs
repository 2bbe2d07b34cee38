//! Moments of the count: mean, variance, third central and absolute central moments, support.
//!
//! These are the one-pass summaries that the approximations need and that every response reports. Sums are
//! compensated so that n = 10^7 exposures lose no more than a few ulps.

use super::float::Sum;
use crate::portfolio::Model;

#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Moments {
    pub mean: f64,
    pub variance: f64,
    /// E[(S - ES)^3].
    pub third_central: f64,
    /// Sum over independent parts of E|X - EX|^3 (Berry-Esseen numerator).
    pub third_abs_sum: f64,
    /// Sum of p_i^2 over Bernoulli and binomial exposures (Poisson approximation error).
    pub sum_p_squared: f64,
}

impl Moments {
    pub fn of(model: &Model) -> Moments {
        let (mut mean, mut var, mut m3, mut a3, mut p2) =
            (Sum::default(), Sum::default(), Sum::default(), Sum::default(), Sum::default());
        let mut add = |m: f64, p: f64| {
            let q = 1.0 - p;
            let v = p * q;
            mean.add(m * p);
            var.add(m * v);
            m3.add(m * v * (q - p));
            a3.add(m * v * (p * p + q * q));
            p2.add(m * p * p);
        };
        for &p in &model.bernoulli {
            add(1.0, p);
        }
        for b in &model.binomials {
            add(b.size as f64, b.p);
        }
        let lam = model.poisson;
        Moments {
            mean: mean.value() + model.shift as f64 + lam,
            variance: var.value() + lam,
            third_central: m3.value() + lam,
            // Poisson(lambda) as the limit of many tiny Bernoullis: sum p(1-p)(p^2+(1-p)^2) -> lambda.
            third_abs_sum: a3.value() + lam,
            sum_p_squared: p2.value(),
        }
    }

    pub fn sd(&self) -> f64 {
        self.variance.sqrt()
    }

    pub fn skewness(&self) -> f64 {
        if self.variance > 0.0 {
            self.third_central / self.variance.powf(1.5)
        } else {
            0.0
        }
    }

    /// Lyapunov ratio sum E|X - EX|^3 / sd^3: small means the normal law is trustworthy.
    pub fn lyapunov_ratio(&self) -> f64 {
        if self.variance > 0.0 {
            self.third_abs_sum / self.variance.powf(1.5)
        } else {
            f64::INFINITY
        }
    }
}
