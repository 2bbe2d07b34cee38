//! A window of a (tilted) probability mass function together with a rigorous description of its error.
//!
//! The exact engine never holds a whole pmf over 0..n: each partial sum keeps only the counts where its tilted
//! law has non-negligible mass, chosen a priori by Bernstein's inequality, so memory and time follow the
//! standard deviation rather than n.
//!
//! Error model. A window `w` on counts lo..lo+len approximates the exact pmf f of its part in the sense that
//! w_j = f_j (1 + d_j) + e_j with |d_j| <= `rel` for every j and sum_j |e_j| <= `abs` (w is 0 outside the
//! window). Direct arithmetic on non-negative numbers keeps errors relative (`rel`); the FFT and truncation add
//! absolute L1 error (`abs`). The propagation rules are in `Window::after_product`.

use crate::engine::numerics::float::compose;

/// ln of the tail mass that one truncation may drop on each side: exp(-75) ~ 2.7e-33.
pub const TRUNC_LN: f64 = 75.0;

thread_local! {
    /// The largest lattice step one summand of the laws being multiplied may add (see [`with_step`]).
    static STEP: std::cell::Cell<f64> = const { std::cell::Cell::new(1.0) };
}

/// Run `f` with every truncation placed for summands of up to `step` lattice steps (losses in units): the
/// products of a weighted model's leaves keep Bernstein's guarantee with b = step. Scoped, so a count's laws
/// (step 1) are never affected.
pub fn with_step<R>(step: u64, f: impl FnOnce() -> R) -> R {
    let old = STEP.with(|s| s.replace(step as f64));
    let out = f();
    STEP.with(|s| s.set(old));
    out
}

#[derive(Debug, Clone)]
pub struct Window {
    /// Count of w[0].
    pub lo: u64,
    pub w: Vec<f64>,
    pub rel: f64,
    pub abs: f64,
    /// Mean and variance of the exact tilted law of this part (used to place truncations).
    pub mean: f64,
    pub var: f64,
    /// True when the part is a finite sum of Bernoulli variables (bounded support); the Poisson part is not.
    pub max: Option<u64>,
}

impl Window {
    pub fn hi(&self) -> u64 {
        self.lo + self.w.len() as u64 - 1
    }

    pub fn point() -> Window {
        Window { lo: 0, w: vec![1.0], rel: 0.0, abs: 0.0, mean: 0.0, var: 0.0, max: Some(0) }
    }

    /// Errors of the product of two windows before the rounding of the product itself.
    pub fn after_product(a: &Window, b: &Window) -> (f64, f64) {
        let rel = compose(a.rel, b.rel);
        let abs = a.abs * (1.0 + b.rel + b.abs) + b.abs * (1.0 + a.rel);
        (rel, abs)
    }

    /// Bernstein radius s: a sum of independent variables with |X_i - E X_i| <= b and variance v satisfies
    /// P(S - ES >= s) <= exp(-s^2 / (2 (v + b s/3))) and likewise below (Bernstein 1924; e.g. Boucheron, Lugosi
    /// and Massart, "Concentration Inequalities", 2013, Thm 2.10). Solving for exp(-TRUNC_LN). The step b is 1
    /// for a count, and the largest lattice step of one exposure inside [`with_step`] (losses in units).
    pub fn bernstein_radius(var: f64) -> f64 {
        Self::bernstein_radius_step(var, STEP.with(|s| s.get()))
    }

    /// [`Window::bernstein_radius`] for summands of at most `step` lattice steps each.
    pub fn bernstein_radius_step(var: f64, step: f64) -> f64 {
        let (l, lb) = (TRUNC_LN, TRUNC_LN * step);
        lb / 3.0 + (lb * lb / 9.0 + 2.0 * l * var.max(0.0)).sqrt()
    }

    /// Count range [lo, hi] that a part with this mean and variance keeps; the mass outside is at most
    /// exp(-TRUNC_LN) on each side. The margin of one count and 1e-9 relative absorbs the rounding in mean/var.
    pub fn keep_range(mean: f64, var: f64, min: u64, max: Option<u64>) -> (u64, u64) {
        let s = Self::bernstein_radius(var) * (1.0 + 1e-9) + 1.0;
        let lo = (mean - s).floor().max(min as f64) as u64;
        let hi_f = (mean + s).ceil();
        let hi = match max {
            Some(m) => hi_f.min(m as f64) as u64,
            None => hi_f.max(lo as f64) as u64,
        };
        (lo.min(hi), hi)
    }

    /// Account for gradual underflow: each operation that lands below the normal range may lose up to
    /// 2^-1075 absolutely. `ops` bounds the number of such operations.
    pub fn add_underflow_slack(&mut self, ops: f64) {
        self.abs += ops * f64::from_bits(1);
    }
}
