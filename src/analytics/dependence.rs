//! Common-factor dependence: the one-factor Gaussian model (Vasicek, "The distribution of loan portfolio
//! value", Risk 15 (2002); the large-portfolio limit is his "Probability of loss on loan portfolio", KMV 1987).
//!
//! Conditional on a standard normal factor Z, exposures are independent with
//!   p_i(Z) = Phi((Phi^-1(p_i) - sqrt(rho) Z) / sqrt(1 - rho)),
//! so each exposure keeps its own probability on average (E p_i(Z) = p_i) while all of them move together
//! with Z. The law of S is the mixture over Z, computed by Gauss-Hermite quadrature (`quadrature`): the
//! conditional law at each node is an ordinary independent portfolio, so every method applies to it. Binomial
//! groups move with the factor like their members; Poisson sources are taken as independent of the factor.

use crate::engine::numerics::normal_law::{self, normal_quantile};
use crate::portfolio::Model;
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

/// Default and largest number of quadrature nodes.
pub const DEFAULT_NODES: usize = 64;
pub const MAX_NODES: usize = 256;

/// How exposures depend on each other.
#[derive(Debug, Clone, Copy, PartialEq, Deserialize, Serialize, ToSchema)]
#[serde(tag = "model", rename_all = "snake_case", deny_unknown_fields)]
pub enum Dependence {
    /// Mutually independent exposures (the default).
    Independent,
    /// One common Gaussian factor with asset correlation `rho` in [0, 1); `nodes` Gauss-Hermite nodes (default
    /// 64). The answer uses a rule with twice as many nodes and its error is estimated from the distance to
    /// the `nodes` rule.
    OneFactorGaussian {
        rho: f64,
        #[serde(default = "default_nodes")]
        nodes: usize,
    },
}

fn default_nodes() -> usize {
    DEFAULT_NODES
}

/// The factor's per-exposure thresholds Phi^-1(p), computed once and reused at every node.
pub struct Thresholds {
    bernoulli: Vec<f64>,
    binomial: Vec<f64>,
}

impl Thresholds {
    pub fn of(model: &Model) -> Thresholds {
        Thresholds {
            bernoulli: model.bernoulli.iter().map(|&p| normal_quantile(p)).collect(),
            binomial: model.binomials.iter().map(|b| normal_quantile(b.p)).collect(),
        }
    }
}

/// The independent portfolio conditional on Z = z.
pub fn conditional(model: &Model, th: &Thresholds, rho: f64, z: f64) -> Model {
    let (a, b) = (rho.sqrt(), (1.0 - rho).sqrt());
    let p_at = |c: f64| normal_law::cdf((c - a * z) / b);
    let mut m = Model { shift: model.shift, poisson: model.poisson, ..Model::default() };
    m.bernoulli.reserve(model.bernoulli.len());
    for &c in &th.bernoulli {
        m.push_bernoulli(p_at(c));
    }
    for (g, &c) in model.binomials.iter().zip(&th.binomial) {
        m.push_group(g.size, p_at(c));
    }
    m.exposures = model.exposures;
    m
}

/// Vasicek's large-portfolio law: P(fraction of events <= x) = Phi((sqrt(1 - rho) Phi^-1(x) - Phi^-1(p)) /
/// sqrt(rho)) for a homogeneous portfolio with probability p, the limit as the number of exposures grows.
pub fn large_portfolio_cdf(x: f64, p: f64, rho: f64) -> f64 {
    if x <= 0.0 {
        return 0.0;
    }
    if x >= 1.0 {
        return 1.0;
    }
    normal_law::cdf(((1.0 - rho).sqrt() * normal_quantile(x) - normal_quantile(p)) / rho.sqrt())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The conditional probabilities average back to p over the factor (E p_i(Z) = p_i).
    #[test]
    fn conditional_probabilities_average_to_the_unconditional_ones() {
        let rule = crate::engine::numerics::quadrature::Rule::new(96);
        for p in [0.001, 0.05, 0.4] {
            let m = Model::from_parts(&[p], &[], 0.0);
            let th = Thresholds::of(&m);
            for rho in [0.01, 0.2, 0.6] {
                // The conditional mean of the single exposure (p(z) may round to 0 or 1 at far nodes).
                let avg = rule.expect(|z| {
                    let c = conditional(&m, &th, rho, z);
                    c.shift as f64 + c.bernoulli.first().copied().unwrap_or(0.0)
                });
                assert!((avg / p - 1.0).abs() < 1e-6, "p = {p}, rho = {rho}: {avg}");
            }
        }
    }
}
