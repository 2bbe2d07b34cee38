//! Quantiles of the count: the smallest k with P(S <= k) >= level, with P(S <= k) and P(S <= k - 1) so that
//! a client sees the bracket, and for an approximate method the range of counts consistent with its bound.
//!
//! How. P(S <= k) is monotone in k, so each answer is an integer search: a first guess from the normal law
//! with the Cornish-Fisher skewness term (a normal mixture under dependence), then galloping outwards in
//! doubling steps until the level is bracketed, then bisection. Every probe is one evaluation of the chosen
//! method (for `exact`, one tilted law), and probes are cached across the three searches of one level (the
//! count itself and the two ends of the range that the error bound allows).

use super::law::{Law, LawValue};
use super::normal_law;
use super::select::Tolerance;
use super::{MethodId, Side};
use std::collections::HashMap;

#[derive(Debug, Clone, PartialEq)]
pub struct Quantile {
    pub level: f64,
    pub method: MethodId,
    /// Smallest k with P(S <= k) >= level by the method's value.
    pub count: u64,
    pub cdf_at_count: LawValue,
    /// P(S <= k - 1) (0 when k is the support's minimum).
    pub cdf_below: LawValue,
    /// Smallest and largest count that the error bound leaves possible (None: unbounded above).
    pub count_range: (u64, Option<u64>),
}

struct Cdf<'a> {
    law: &'a Law,
    method: MethodId,
    tol: Option<Tolerance>,
    cache: HashMap<u64, LawValue>,
    min: u64,
    max: Option<u64>,
    /// Largest count probed when the support is unbounded: every level below 1 in f64 (1 - 2^-53 at most)
    /// has its quantile far below mean + 60 sd + 100, and an approximate bound that has not reached the
    /// level by then is reported as unbounded rather than chased further.
    top: u64,
}

impl Cdf<'_> {
    fn at(&mut self, k: u64) -> LawValue {
        if k < self.min {
            return LawValue { value: 0.0, ..LawValue::default() };
        }
        if self.max.is_some_and(|m| k >= m) {
            return LawValue { value: 1.0, ln_value: 0.0, ..LawValue::default() };
        }
        if let Some(v) = self.cache.get(&k) {
            return *v;
        }
        let v = if self.method == MethodId::Exact {
            self.law.exact(&[(k, Side::Lower)])[0]
        } else {
            let e = self.law.estimates(self.method, &[(k, Side::Lower)], self.tol).remove(0);
            LawValue {
                value: e.probability,
                ln_value: e.ln_probability,
                abs_err: e.error_bound,
                rel_err: e.relative_error_bound.unwrap_or(f64::INFINITY),
                kind: e.bound_kind,
            }
        };
        self.cache.insert(k, v);
        v
    }

    /// Smallest k >= min with pred(F(k)), None if no count qualifies (only possible for bounds that never
    /// reach the level).
    fn search(&mut self, guess: u64, pred: impl Fn(&LawValue) -> bool) -> Option<u64> {
        let top = self.max.unwrap_or(self.top);
        let guess = guess.clamp(self.min, top);
        let (mut lo, mut hi); // pred false at lo (or lo < min), true at hi
        if pred(&self.at(guess)) {
            hi = guess;
            let mut step = 1u64;
            loop {
                if hi == self.min {
                    return Some(hi);
                }
                let k = hi.saturating_sub(step).max(self.min);
                if pred(&self.at(k)) {
                    hi = k;
                    step = step.saturating_mul(2);
                } else {
                    lo = k;
                    break;
                }
            }
        } else {
            lo = guess;
            let mut step = 1u64;
            loop {
                if lo >= top {
                    return None;
                }
                let k = lo.saturating_add(step).min(top);
                if pred(&self.at(k)) {
                    hi = k;
                    break;
                }
                lo = k;
                step = step.saturating_mul(2);
            }
        }
        while hi - lo > 1 {
            let mid = lo + (hi - lo) / 2;
            if pred(&self.at(mid)) {
                hi = mid;
            } else {
                lo = mid;
            }
        }
        Some(hi)
    }
}

/// First guess: the smallest k whose continuity-corrected normal (Cornish-Fisher) cdf reaches the level,
/// mixed over the factor under dependence.
fn guess(law: &Law, level: f64) -> u64 {
    let comps = law.component_moments();
    let skew = law.moments().skewness();
    let z = super::dependence::normal_quantile(level);
    let cf = z + (z * z - 1.0) * skew / 6.0;
    if comps.len() == 1 {
        let (_, mean, sd) = comps[0];
        return (mean + sd * cf - 0.5).ceil().max(0.0) as u64;
    }
    let f = |k: f64| -> f64 {
        comps
            .iter()
            .map(|&(w, m, s)| w * if s > 0.0 { normal_law::cdf((k + 0.5 - m) / s) } else { (k >= m) as u8 as f64 })
            .sum()
    };
    let (mut lo, mut hi) = (0.0f64, comps.iter().map(|c| c.1 + 40.0 * c.2 + 1.0).fold(1.0, f64::max));
    for _ in 0..200 {
        let mid = 0.5 * (lo + hi);
        if f(mid.floor()) >= level {
            hi = mid;
        } else {
            lo = mid;
        }
    }
    hi.floor() as u64
}

pub fn quantiles(law: &Law, levels: &[f64], method: MethodId, tol: Option<Tolerance>) -> Vec<Quantile> {
    let (min, max) = law.support();
    let m = law.moments();
    let top = (m.mean + 60.0 * m.sd() + 100.0).min(1e15) as u64;
    let mut cdf = Cdf { law, method, tol, cache: HashMap::new(), min, max, top };
    levels
        .iter()
        .map(|&level| {
            let g = guess(law, level);
            let count = cdf.search(g, |v| v.value >= level).unwrap_or(max.unwrap_or(u64::MAX));
            let lo = cdf.search(count, |v| v.value + v.abs_err >= level).unwrap_or(count);
            let hi = cdf.search(count, |v| v.value - v.abs_err >= level).filter(|&h| max.is_some() || h < top);
            let cdf_at_count = cdf.at(count);
            let cdf_below = if count == 0 { LawValue { value: 0.0, ..LawValue::default() } } else { cdf.at(count - 1) };
            Quantile { level, method, count, cdf_at_count, cdf_below, count_range: (lo, hi.or(max)) }
        })
        .collect()
}
