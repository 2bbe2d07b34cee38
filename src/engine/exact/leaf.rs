//! The leaves of the exact product: tilted Bernoulli blocks by direct recursion, and the binomial and Poisson
//! parts from their closed-form ratio recurrences.
//!
//! Why ratio recurrences and not log-gamma: ln C(m, j) from lgamma loses about |ln m!| ulps (1e-9 relative at
//! m = 10^6), while the ratio f(j+1)/f(j) is a rational expression with a few roundings. Starting at the mode
//! with 1 and normalising by the window's sum gives every entry to a relative error that grows only with its
//! distance from the mode.

use super::window::Window;
use crate::engine::numerics::cgf::{tilt_qr, TiltConsts, TILT_REL};
use crate::engine::numerics::float::{compose, gamma, U};

/// Exposures per Bernoulli leaf block. Small enough that the recursion's quadratic cost is negligible, large
/// enough that the merge tree above it is shallow.
pub const BLOCK: usize = 32;

/// Tilted law of a block of Bernoulli exposures, by the recursion w'_j = w_j (1 - q) + w_{j-1} q.
/// All terms are non-negative, so every entry keeps a relative error: per exposure, the tilt's own error on q
/// and 1 - q plus two roundings (Higham 2002, Lemma 3.1 for the products of (1 + d) factors).
pub fn bernoulli_block(ps: &[f64], c: &TiltConsts) -> Window {
    let mut w = Vec::with_capacity(ps.len() + 1);
    w.push(1.0);
    let (mut mean, mut var) = (0.0, 0.0);
    for &p in ps {
        let (q, r) = tilt_qr(p, c);
        mean += q;
        var += q * r;
        w.push(0.0);
        for j in (1..w.len()).rev() {
            w[j] = w[j] * r + w[j - 1] * q;
        }
        w[0] *= r;
    }
    let per = compose(TILT_REL, gamma(2.0));
    let rel = (1.0 + per).powi(ps.len() as i32) - 1.0;
    let mut win =
        Window { lo: 0, w, rel: rel * (1.0 + 1e-12), abs: 0.0, inf: 0.0, mean, var, max: Some(ps.len() as u64) };
    win.add_underflow_slack(((ps.len() + 1) * ps.len()) as f64);
    win
}

/// Tilted Binomial(m, p) = Binomial(m, q) over its Bernstein window.
pub fn binomial(m: u64, p: f64, c: &TiltConsts) -> Window {
    let (q, r) = tilt_qr(p, c);
    if q == 0.0 || r == 0.0 {
        // The tilt pushed the whole part to one end of its support in f64; what is left is below 2^-1074 each.
        return degenerate(if q == 0.0 { 0 } else { m }, Some(m), m as f64);
    }
    let mf = m as f64;
    let mean = mf * q;
    let var = mf * q * r;
    let (lo, hi) = Window::keep_range(mean, var, 0, Some(m));
    let mode = (((mf + 1.0) * q).floor() as u64).clamp(lo, hi);
    let odds = q / r;
    let up = |j: u64| (mf - j as f64) / (j as f64 + 1.0) * odds; // f(j+1) / f(j)
    let down = |j: u64| j as f64 / (mf - j as f64 + 1.0) / odds; // f(j-1) / f(j)
    ratio_window(lo, hi, mode, mean, var, Some(m), up, down, compose(2.0 * TILT_REL, 0.0))
}

/// Tilted Poisson(lambda) = Poisson(lambda e^t) over its Bernstein window (Bernstein's inequality holds for the
/// Poisson law as the limit of sums of Bernoulli variables).
pub fn poisson(lambda: f64, c: &TiltConsts) -> Window {
    let mu = crate::engine::numerics::cgf::tilted_rate(lambda, c.t);
    if mu < 1e-300 {
        // exp(-mu) rounds to 1: the part is a point mass at 0 up to mu <= 1e-300.
        return degenerate(0, None, 1.0);
    }
    let (lo, hi) = Window::keep_range(mu, mu, 0, None);
    let mode = (mu.floor() as u64).clamp(lo, hi);
    ratio_window(lo, hi, mode, mu, mu, None, |j| mu / (j as f64 + 1.0), |j| j as f64 / mu, 2.0 * U)
}

fn degenerate(at: u64, max: Option<u64>, ops: f64) -> Window {
    let mut w = Window { lo: at, w: vec![1.0], rel: 0.0, abs: 1e-300, inf: 1e-300, mean: at as f64, var: 0.0, max };
    w.add_underflow_slack(ops);
    w
}

/// Fill [lo, hi] from the mode outwards with the given ratios, then normalise by the sum.
///
/// Error: each step multiplies by a ratio carrying about 4 roundings plus `common` (the error of a parameter
/// shared by every step, such as the tilted odds), so an entry d steps from the mode is within
/// gamma(4 d) + d * common of the exact unnormalised value. The exact sum over the window is 1 - tau with
/// tau <= 2 exp(-TRUNC_LN); dividing by the computed sum adds that relative error once more plus tau.
#[allow(clippy::too_many_arguments)]
fn ratio_window(
    lo: u64,
    hi: u64,
    mode: u64,
    mean: f64,
    var: f64,
    max: Option<u64>,
    up: impl Fn(u64) -> f64,
    down: impl Fn(u64) -> f64,
    common: f64,
) -> Window {
    let len = (hi - lo + 1) as usize;
    let mut w = vec![0.0; len];
    let m = (mode - lo) as usize;
    w[m] = 1.0;
    for i in m..len - 1 {
        w[i + 1] = w[i] * up(lo + i as u64);
    }
    for i in (1..=m).rev() {
        w[i - 1] = w[i] * down(lo + i as u64);
    }
    let mut sum = 0.0;
    for &x in &w {
        sum += x;
    }
    let inv = 1.0 / sum;
    for x in &mut w {
        *x *= inv;
    }
    let d = (m.max(len - 1 - m)) as f64;
    let entry = compose(gamma(4.0 * d + 2.0), d * common);
    let tau = 2.0 * (-super::window::TRUNC_LN).exp();
    // Normalisation: the computed sum is within `entry` + gamma(len) of the exact windowed sum 1 - tau.
    let rel = compose(compose(entry, entry + gamma(len as f64 + 1.0)), tau);
    let mut win = Window { lo, w, rel, abs: tau * (1.0 + rel), inf: tau * (1.0 + rel), mean, var, max };
    win.add_underflow_slack(2.0 * len as f64);
    win
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn binomial_window_matches_statrs() {
        use statrs::distribution::{Binomial, Discrete};
        let c = TiltConsts::new(0.0);
        let w = binomial(200, 0.3, &c);
        let d = Binomial::new(0.3, 200).unwrap();
        for (i, &x) in w.w.iter().enumerate() {
            let j = w.lo + i as u64;
            let e = d.pmf(j);
            if e > 1e-200 {
                assert!(((x - e) / e).abs() < 1e-11, "j={j} {x} {e}");
            }
        }
    }

    #[test]
    fn poisson_window_matches_statrs() {
        use statrs::distribution::{Discrete, Poisson};
        let c = TiltConsts::new(0.0);
        let w = poisson(37.5, &c);
        let d = Poisson::new(37.5).unwrap();
        for (i, &x) in w.w.iter().enumerate() {
            let j = w.lo + i as u64;
            let e = d.pmf(j);
            if e > 1e-200 {
                assert!(((x - e) / e).abs() < 1e-11, "j={j} {x} {e}");
            }
        }
    }
}
