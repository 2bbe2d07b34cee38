//! A window of a (tilted) probability mass function together with a rigorous description of its error.
//!
//! The exact engine never holds a whole pmf over 0..n: each partial sum keeps only the counts where its tilted
//! law has non-negligible mass, chosen a priori by Bernstein's inequality, so memory and time follow the
//! standard deviation rather than n.
//!
//! Error model. A window `w` on counts lo..lo+len approximates the exact pmf f of its part in the sense that
//! w_j = f_j (1 + d_j) + e_j with |d_j| <= `rel` for every j, sum_j |e_j| <= `abs`, max_j |e_j| <= `inf` and
//! (sum_j e_j^2)^(1/2) <= `l2` (w is 0 outside the window). Direct arithmetic on non-negative numbers keeps errors relative (`rel`); the
//! FFT and truncation add absolute error (`abs`, and `inf` per entry). The per-entry bound matters because an
//! absolute error made low in the product tree is later convolved with the rest of the law, which spreads it:
//! ||e * q||_inf <= ||e||_1 max_j q_j, and a tail sum near the threshold sees only the entries there. The 2-norm
//! is the FFT's own (`fft`): a tail sum weighted by rho^d takes at most ||e||_2 (sum_d rho^(2 d))^(1/2) of it
//! (Cauchy-Schwarz), far less than ||e||_inf sum_d rho^d for a small tilt.
//! The propagation rules are in `Window::after_product`.

use crate::engine::numerics::float::compose;

/// ln of the tail mass that one truncation may drop on each side: exp(-75) ~ 2.7e-33.
pub const TRUNC_LN: f64 = 75.0;

#[derive(Debug, Clone)]
pub struct Window {
    /// Count of w[0].
    pub lo: u64,
    pub w: Vec<f64>,
    pub rel: f64,
    pub abs: f64,
    /// Bound on every single |e_j| (never above `abs`).
    pub inf: f64,
    /// Bound on the 2-norm of e (never above `abs`).
    pub l2: f64,
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
        Window { lo: 0, w: vec![1.0], rel: 0.0, abs: 0.0, inf: 0.0, l2: 0.0, mean: 0.0, var: 0.0, max: Some(0) }
    }

    /// Errors (rel, abs, inf) of the exact product of two computed windows, before the rounding of the product
    /// itself. With a^ = a~ + e_a, a~ = f_a (1 + d_a) >= 0 (the same for b): a^ * b^ = a~ * b~ + e_a * b^ + a~ * e_b.
    /// The first term is relative; ||b^||_1 <= 1 + rel_b + abs_b (the exact law has mass <= 1) and
    /// ||a~||_1 <= 1 + rel_a give the L1 part; per entry, ||e_a * b^||_inf <= min(||e_a||_inf ||b^||_1,
    /// ||e_a||_1 max b^) with max b^ read off the computed window, and ||a~||_inf <= max a^ + inf_a.
    /// The 2-norm likewise by Young's inequality, ||e_a * b^||_2 <= min(||e_a||_2 ||b^||_1, ||e_a||_1 ||b^||_2),
    /// with ||a~||_2 <= ||a^||_2 + l2_a. Returned as (rel, abs, inf) and the 2-norm by [`Window::after_product_l2`].
    pub fn after_product(a: &Window, b: &Window) -> (f64, f64, f64) {
        let rel = compose(a.rel, b.rel);
        let b1 = 1.0 + b.rel + b.abs;
        let abs = a.abs * b1 + b.abs * (1.0 + a.rel);
        let (amax, bmax) = (a.max_entry(), b.max_entry());
        let inf = (a.inf * b1).min(a.abs * bmax) + (b.inf * (1.0 + a.rel)).min(b.abs * (amax + a.inf));
        (rel, abs, inf.min(abs))
    }

    /// The 2-norm part of [`Window::after_product`].
    pub fn after_product_l2(a: &Window, b: &Window) -> f64 {
        let b1 = 1.0 + b.rel + b.abs;
        let l2 = (a.l2 * b1).min(a.abs * b.norm2()) + (b.l2 * (1.0 + a.rel)).min(b.abs * (a.norm2() + a.l2));
        l2.min(a.abs * b1 + b.abs * (1.0 + a.rel))
    }

    /// An upper bound on the 2-norm of the computed window: the sum of squares carries at most gamma(len + 1) of
    /// relative rounding (non-negative terms), far below the margin of one part in 10^6 for any window held.
    pub fn norm2(&self) -> f64 {
        self.w.iter().map(|&x| x * x).sum::<f64>().sqrt() * (1.0 + 1e-6)
    }

    /// The largest entry of the computed window.
    pub fn max_entry(&self) -> f64 {
        self.w.iter().fold(0.0f64, |m, &x| m.max(x))
    }

    /// Add an absolute error vector of L1 norm `l1` and largest entry `linf`.
    pub fn add_abs(&mut self, l1: f64, linf: f64) {
        // ||v||_2^2 <= ||v||_1 ||v||_inf.
        self.add_abs_l2(l1, (l1 * linf).sqrt() * (1.0 + 1e-15), linf);
    }

    /// Add an absolute error vector of L1 norm `l1`, 2-norm `l2` and largest entry `linf`.
    pub fn add_abs_l2(&mut self, l1: f64, l2: f64, linf: f64) {
        self.abs += l1;
        self.inf = (self.inf + linf).min(self.abs);
        self.l2 = (self.l2 + l2).min(self.abs);
    }

    /// Bernstein radius s: a sum of independent variables with |X_i - E X_i| <= b and variance v satisfies
    /// P(S - ES >= s) <= exp(-s^2 / (2 (v + b s/3))) and likewise below (Bernstein 1924; e.g. Boucheron, Lugosi
    /// and Massart, "Concentration Inequalities", 2013, Thm 2.10). Solving for exp(-TRUNC_LN). The step b is 1
    /// for a count; products on a lattice place their truncations themselves (`lattice`).
    pub fn bernstein_radius(var: f64) -> f64 {
        Self::bernstein_radius_step(var, 1.0)
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
        self.add_abs(ops * f64::from_bits(1), ops * f64::from_bits(1));
    }
}
