//! The leaves of the exact product: tilted Bernoulli blocks by direct recursion, and the binomial and Poisson
//! parts from their closed-form ratio recurrences.
//!
//! Why ratio recurrences and not log-gamma: ln C(m, j) from lgamma loses about |ln m!| ulps (1e-9 relative at
//! m = 10^6), while the ratio f(j+1)/f(j) is a rational expression with a few roundings. Starting at the mode
//! with 1 and normalising by the window's sum gives every entry to a relative error that grows only with its
//! distance from the mode.

use super::window::Window;
use crate::engine::numerics::cgf::{tilt_qr, tilt_weights, TiltConsts, ODDS_LN, TILT_REL};
use crate::engine::numerics::float::{compose, gamma, U};

/// Exposures per Bernoulli leaf block. Small enough that the recursion's quadratic cost is negligible, large
/// enough that the merge tree above it is shallow.
pub const BLOCK: usize = 32;

/// Tilted law of a block of Bernoulli exposures, by the recursion w'_j = w_j (1 - q) + w_{j-1} q.
/// All terms are non-negative, so every entry keeps a relative error: per exposure, the tilt's own error on q
/// and 1 - q plus two roundings (Higham 2002, Lemma 3.1 for the products of (1 + d) factors).
pub fn bernoulli_block(ps: &[f64], c: &TiltConsts) -> Window {
    let (w, mean, var, _) = recursion(ps, c);
    let per = compose(TILT_REL, gamma(2.0));
    let rel = (1.0 + per).powi(ps.len() as i32) - 1.0;
    block_window(w, rel, mean, var, ps.len())
}

/// [`bernoulli_block`] with the rounding of the tilt itself left out of `rel`, and the number of exposures
/// for which it was left out (returned second). The window approximates the exact law of the block tilted at
/// the computed odds b^ / a^ of [`tilt_weights`] (those exposures) and at the exact tilt (the others): the
/// difference between that law and the exact tilted law is counted once for the whole product, by
/// [`add_odds_error`], where it weighs |X_i - q_i| per exposure instead of a full allowance (docs/fft_bound.md,
/// "The tilt's rounding"). What is left per exposure and entry: q^ = fl(b^ / fl(a^ + b^)) and
/// 1 - q^ = fl(a^ / fl(a^ + b^)) are each within two roundings (one division, one sum, a factor
/// (1 + d1) / (1 + d2)) of b^ / (a^ + b^) and a^ / (a^ + b^), and the recursion adds two more: four factors
/// (1 + d)^(+-1) per exposure, gamma(4 m) over m exposures (Higham 2002, Lemma 3.1). An exposure whose weights
/// are not both normal (far tilts) keeps the allowance of [`bernoulli_block`]. The values are those of
/// [`bernoulli_block`], bit for bit (both run [`recursion`]).
pub fn bernoulli_block_odds(ps: &[f64], c: &TiltConsts) -> (Window, usize) {
    let (w, mean, var, irregular) = recursion(ps, c);
    let rel = compose(gamma(4.0 * ps.len() as f64), (1.0 + TILT_REL).powi(irregular as i32) - 1.0);
    (block_window(w, rel, mean, var, ps.len()), ps.len() - irregular)
}

/// The recursion of a block at the weights of [`tilt_weights`] (q = b / (a + b), 1 - q = a / (a + b), the
/// same values as [`tilt_qr`]): the entries, the tilted mean and variance, and the number of exposures whose
/// weights are not both at least 4 times the smallest normal (a, b <= 1, so q and 1 - q stay normal otherwise).
fn recursion(ps: &[f64], c: &TiltConsts) -> (Vec<f64>, f64, f64, usize) {
    let mut w = Vec::with_capacity(ps.len() + 1);
    w.push(1.0);
    let (mut mean, mut var) = (0.0, 0.0);
    let mut irregular = 0usize;
    for &p in ps {
        let (a, b) = tilt_weights(p, c);
        let d = a + b;
        let (q, r) = (b / d, a / d);
        irregular += (a.min(b) < 4.0 * f64::MIN_POSITIVE) as usize;
        mean += q;
        var += q * r;
        w.push(0.0);
        for j in (1..w.len()).rev() {
            w[j] = w[j] * r + w[j - 1] * q;
        }
        w[0] *= r;
    }
    (w, mean, var, irregular)
}

/// The window of a block of m exposures with relative error `rel` (widened by one part in 10^12 for the
/// rounding of `rel` itself) and the underflow slack of its (m + 1) m operations.
fn block_window(w: Vec<f64>, rel: f64, mean: f64, var: f64, m: usize) -> Window {
    let mut win =
        Window { lo: 0, w, rel: rel * (1.0 + 1e-12), abs: 0.0, inf: 0.0, l2: 0.0, mean, var, max: Some(m as u64) };
    win.add_underflow_slack(((m + 1) * m) as f64);
    win
}

/// Relate a product that holds `m` Bernoulli exposures tilted at their computed odds ([`bernoulli_block_odds`])
/// to the exact tilted law. Per configuration X of those exposures the two laws differ by the factor
/// exp(sum_i (X_i - q_i) (g1_i - g0_i) - xi_i) with |g1_i - g0_i| <= ODDS_LN and 0 <= xi_i <= eta^2 <= 20 U^2,
/// and sum_i |X_i - q_i| <= min(m, j + mu) at count j (mu the tilted mean): so every entry up to the window's
/// top count hi is within exp(ODDS_LN min(m, hi + mu) + 20 m U^2) of the exact one (a relative error), and
/// every other count within exp(ODDS_LN m + 20 m U^2) (which scales the absolute part; see docs/fft_bound.md).
/// Call before the certain exposures' shift.
pub fn add_odds_error(w: &mut Window, m: usize) {
    if m == 0 {
        return;
    }
    let m = m as f64;
    let xi = 20.0 * U * U * m;
    // The computed mean is within a few ulps per term of the exact tilted mean (all terms non-negative).
    let mu = w.mean.max(0.0) * (1.0 + 1e-6) + 1.0;
    let within = (ODDS_LN * (w.hi() as f64 + mu).min(m) + xi).exp_m1() * (1.0 + 1e-9);
    let anywhere = (ODDS_LN * m + xi).exp_m1() * (1.0 + 1e-9);
    // A dropped or absolute error e_j of the law at the computed odds is an error of the exact law within a
    // factor exp(ODDS_LN m + xi); a truncated entry's error was counted as f~_j (1 + rel), hence the 1 / (1 - rel).
    let grow = (1.0 + anywhere) / (1.0 - w.rel) * (1.0 + 1e-12);
    w.abs *= grow;
    w.inf *= grow;
    w.l2 *= grow;
    w.rel = compose(w.rel, within);
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
    if !mu.is_finite() || mu > 1e15 {
        // A tilt no caller should ask for (`exact::solve_tilt` caps it): a point with the whole mass as its error,
        // so that every answer built on it carries a bound of 1 rather than a window of 10^8 points or more.
        let mut w = degenerate(0, None, 1.0);
        w.add_abs(1.0, 1.0);
        return w;
    }
    let (lo, hi) = Window::keep_range(mu, mu, 0, None);
    let mode = (mu.floor() as u64).clamp(lo, hi);
    ratio_window(lo, hi, mode, mu, mu, None, |j| mu / (j as f64 + 1.0), |j| j as f64 / mu, 2.0 * U)
}

fn degenerate(at: u64, max: Option<u64>, ops: f64) -> Window {
    let mut w =
        Window { lo: at, w: vec![1.0], rel: 0.0, abs: 1e-300, inf: 1e-300, l2: 1e-300, mean: at as f64, var: 0.0, max };
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
    let mut win =
        Window { lo, w, rel, abs: tau * (1.0 + rel), inf: tau * (1.0 + rel), l2: tau * (1.0 + rel), mean, var, max };
    win.add_underflow_slack(2.0 * len as f64);
    win
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The block at the computed odds holds the same values as the plain block, bit for bit, and its bound
    /// (without the odds, counted once per product) is below the plain block's at every tilt tried; the plain
    /// block is checked against exact rationals in tests/exact_rational.rs.
    #[test]
    fn odds_block_has_the_same_values_and_a_smaller_bound() {
        let ps: Vec<f64> = (0..BLOCK).map(|i| 0.001 + 0.03 * i as f64).collect();
        for t in [-30.0, -2.0, -0.1, 0.0, 0.05, 1.0, 40.0] {
            let c = TiltConsts::new(t);
            let old = bernoulli_block(&ps, &c);
            let (new, regular) = bernoulli_block_odds(&ps, &c);
            assert_eq!(old.w, new.w, "t = {t}");
            assert_eq!(regular, ps.len(), "t = {t}");
            assert!(new.rel < old.rel, "t = {t}: {} vs {}", new.rel, old.rel);
        }
        // Far enough that e^-t underflows: the weights are not normal and the old allowance is kept.
        let (far, regular) = bernoulli_block_odds(&ps, &TiltConsts::new(720.0));
        assert!(regular < ps.len());
        assert!(far.rel >= (1.0 + TILT_REL).powi((ps.len() - regular) as i32) - 1.0);
    }

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
