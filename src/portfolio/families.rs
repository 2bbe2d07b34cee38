//! Expansion of generated probability sequences into plain probabilities.
//!
//! Each family is a formula for p_1..p_n; expansion is the only computation here. Parameter checks live in
//! `validate`, which calls `expected_len` before anything is allocated so that an absurd n is refused cheaply.

use super::spec::FamilySpec;

/// Number of probabilities the family expands to (computed without expanding it).
pub fn expected_len(f: &FamilySpec) -> u64 {
    match f {
        FamilySpec::Constant { n, .. }
        | FamilySpec::Harmonic { n, .. }
        | FamilySpec::Ewens { n, .. }
        | FamilySpec::Geometric { n, .. }
        | FamilySpec::Linear { n, .. } => *n,
        FamilySpec::Logistic { scores, .. } => scores.len() as u64,
    }
}

/// Call `sink` with each probability of the family, in order. Values are clamped to [0, 1] only against
/// rounding (a validated family never leaves that range by more than an ulp).
pub fn expand(f: &FamilySpec, mut sink: impl FnMut(f64)) {
    let clamp = |p: f64| p.clamp(0.0, 1.0);
    match *f {
        FamilySpec::Constant { n, probability, .. } => (0..n).for_each(|_| sink(probability)),
        FamilySpec::Harmonic { n, .. } => (1..=n).for_each(|k| sink(1.0 / k as f64)),
        FamilySpec::Ewens { n, theta, .. } => (1..=n).for_each(|k| sink(clamp(theta / (theta + (k - 1) as f64)))),
        FamilySpec::Geometric { n, first, ratio, .. } => {
            // Powers by exp/ln rather than repeated multiplication: the error does not grow with k.
            let ln_ratio = ratio.ln();
            for k in 0..n {
                let p = if k == 0 {
                    first
                } else if ratio == 0.0 {
                    0.0
                } else {
                    first * (k as f64 * ln_ratio).exp()
                };
                sink(clamp(p));
            }
        }
        FamilySpec::Linear { n, first, last, .. } => {
            if n <= 1 {
                // n = 0 is an empty family (and must not reach n - 1 below).
                if n == 1 {
                    sink(first);
                }
                return;
            }
            let step = (last - first) / (n - 1) as f64;
            for k in 0..n {
                // The last value is set exactly so that "first" and "last" are both honoured to the bit.
                let p = if k == n - 1 { last } else { first + step * k as f64 };
                sink(clamp(p));
            }
        }
        FamilySpec::Logistic { ref scores, intercept, slope, .. } => {
            for &s in scores {
                let x = intercept + slope * s;
                // Two branches so that exp never overflows and tiny probabilities keep their relative accuracy.
                let p = if x >= 0.0 {
                    1.0 / (1.0 + (-x).exp())
                } else {
                    let e = x.exp();
                    e / (1.0 + e)
                };
                sink(p);
            }
        }
    }
}
/// The listed exposures' probabilities as the client numbered them: `probabilities`, then the members of
/// each family in order (p = 0 and p = 1 included).
pub fn listed_probabilities(spec: &super::spec::PortfolioSpec) -> Vec<f64> {
    let mut listed = spec.probabilities.clone();
    for f in &spec.families {
        expand(f, |p| listed.push(p));
    }
    listed
}

/// The listed exposures' factor loadings in the same order, `default` where the client gave none.
pub fn listed_loadings(spec: &super::spec::PortfolioSpec, default: f64) -> Vec<f64> {
    let mut out: Vec<f64> =
        if spec.loadings.is_empty() { vec![default; spec.probabilities.len()] } else { spec.loadings.clone() };
    for f in &spec.families {
        let r = f.loading().unwrap_or(default);
        out.extend(std::iter::repeat_n(r, expected_len(f) as usize));
    }
    out
}
