//! Common-factor dependence: the one-factor Gaussian model (Vasicek, "The distribution of loan portfolio
//! value", Risk 15 (2002); the large-portfolio limit is his "Probability of loss on loan portfolio", KMV 1987).
//!
//! Conditional on a standard normal factor Z, exposures are independent with
//!   p_i(Z) = Phi((Phi^-1(p_i) - sqrt(rho_i) Z) / sqrt(1 - rho_i)),
//! so each exposure keeps its own probability on average (E p_i(Z) = p_i) while all of them move together
//! with Z. The loading rho_i is the dependence model's `rho` unless the portfolio gives the exposure its own
//! (`loadings`, a group's or a family's `loading`). Binomial groups move with the factor like their members;
//! Poisson sources are taken as independent of the factor. The law of S is the mixture over Z, integrated by
//! adaptive Gauss-Kronrod panels (`factor`): the conditional law at each node is an ordinary independent
//! portfolio, so every method applies to it.
//!
//! This file holds the model: the wire form, the per-exposure constants of p_i(z), the conditional portfolio at
//! a node, and a compressed profile of the conditional mean and variance that places the panels.

use super::checks::check_factor_tolerance;
use crate::engine::numerics::mixture::{Tol, LIMIT};
use crate::engine::numerics::normal_law::{self, normal_quantile};
use crate::portfolio::{Model, Violation};
use serde::{Deserialize, Serialize};
use std::collections::HashMap;
use utoipa::ToSchema;

/// Default quadrature tolerance under the factor: relative to the value, with an absolute floor.
pub const DEFAULT_RELATIVE_TOLERANCE: f64 = 1e-7;
pub const DEFAULT_ABSOLUTE_TOLERANCE: f64 = 1e-13;

/// How exposures depend on each other.
#[derive(Debug, Clone, Copy, PartialEq, Deserialize, Serialize, ToSchema)]
#[serde(tag = "model", rename_all = "snake_case", deny_unknown_fields)]
pub enum Dependence {
    /// Mutually independent exposures (the default).
    // A struct variant, not a unit one: serde reads an internally tagged unit variant without looking at the
    // other keys, so `deny_unknown_fields` would not refuse `{"model": "independent", "rho": 0.2}`, which the
    // document (closed objects) calls invalid.
    Independent {},
    /// One common Gaussian factor with asset correlation `rho` in [0, 1) (the loading of every exposure that has
    /// none of its own). The law is mixed over the factor by adaptive Gauss-Kronrod quadrature until the
    /// embedded rules agree within `tolerance`.
    OneFactorGaussian {
        #[schema(minimum = 0.0, exclusive_maximum = 1.0)]
        rho: f64,
        /// Deprecated and ignored (it was the Gauss-Hermite node count); the quadrature now refines until it
        /// meets `tolerance`. Accepted so that older requests keep working.
        #[serde(default, skip_serializing_if = "Option::is_none")]
        #[schema(deprecated)]
        nodes: Option<u64>,
        /// Quadrature tolerance over the factor; default relative 1e-7 with absolute 1e-13.
        #[serde(default, skip_serializing_if = "Option::is_none")]
        tolerance: Option<FactorTolerance>,
    },
}

/// Refine the quadrature over the factor until its error estimate is at most max(absolute, relative x value)
/// for every figure of the answer. Either field may be left out (its default then applies); `absolute: 0`
/// asks for relative accuracy only, which far tails may need (and which costs more nodes).
#[derive(Debug, Clone, Copy, PartialEq, Deserialize, Serialize, ToSchema)]
#[serde(remote = "Self", deny_unknown_fields)]
pub struct FactorTolerance {
    /// In [1e-13, 1) or 0; default 1e-7.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    #[schema(example = 1e-7)]
    pub relative: Option<f64>,
    /// At least 0; default 1e-13.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    #[schema(example = 1e-13, minimum = 0.0)]
    pub absolute: Option<f64>,
}

crate::portfolio::objects::objects_only!(FactorTolerance);

impl Dependence {
    /// The one-factor model with loading rho and the default tolerance.
    pub fn one_factor(rho: f64) -> Dependence {
        Dependence::OneFactorGaussian { rho, nodes: None, tolerance: None }
    }

    /// The one-factor model with loading rho and the given tolerance.
    pub fn one_factor_with(rho: f64, relative: f64, absolute: f64) -> Dependence {
        let tolerance = Some(FactorTolerance { relative: Some(relative), absolute: Some(absolute) });
        Dependence::OneFactorGaussian { rho, nodes: None, tolerance }
    }

    /// The common loading, None when independent.
    pub fn rho(&self) -> Option<f64> {
        match *self {
            Dependence::Independent {} => None,
            Dependence::OneFactorGaussian { rho, .. } => Some(rho),
        }
    }

    /// The quadrature tolerance (defaults filled in).
    pub fn tolerance(&self) -> Tol {
        let t = match *self {
            Dependence::OneFactorGaussian { tolerance: Some(t), .. } => t,
            _ => FactorTolerance { relative: None, absolute: None },
        };
        Tol {
            rel: t.relative.unwrap_or(DEFAULT_RELATIVE_TOLERANCE),
            abs: t.absolute.unwrap_or(DEFAULT_ABSOLUTE_TOLERANCE),
        }
    }

    /// Check the fields (pointers under /dependence).
    pub fn check(&self, errs: &mut Vec<Violation>) {
        if let Dependence::OneFactorGaussian { rho, tolerance, .. } = self {
            if !(rho.is_finite() && (0.0..1.0).contains(rho)) {
                errs.push(Violation::new("/dependence/rho", format!("must be in [0, 1), got {rho}")));
            }
            if let Some(t) = tolerance {
                check_factor_tolerance(t, "/dependence/tolerance", errs);
            }
        }
    }
}

/// The constants of p_i(z) = Phi(alpha_i - beta_i z), alpha = Phi^-1(p) / sqrt(1 - rho), beta = sqrt(rho) /
/// sqrt(1 - rho), for every Bernoulli exposure and every binomial group of a model, computed once and reused at
/// every node.
#[derive(Debug, Clone)]
pub struct Loads {
    pub alpha: Vec<f64>,
    /// One beta for all Bernoulli exposures (one loading), or one each.
    pub beta: Beta,
    pub group_alpha: Vec<f64>,
    pub group_beta: Vec<f64>,
}

#[derive(Debug, Clone)]
pub enum Beta {
    All(f64),
    Each(Vec<f64>),
}

/// (alpha, beta) of an exposure with probability p and loading rho.
pub fn constants(p: f64, rho: f64) -> (f64, f64) {
    let b = (1.0 - rho).sqrt();
    (normal_quantile(p) / b, rho.sqrt() / b)
}

impl Loads {
    /// The constants of a model whose exposures carry their own loadings, or all take `rho`.
    pub fn of(model: &Model, rho: f64) -> Loads {
        let loaded = model.loaded();
        let r = |i: usize, v: &Vec<f64>| if loaded { v[i] } else { rho };
        let alpha = model.bernoulli.iter().enumerate().map(|(i, &p)| constants(p, r(i, &model.loadings)).0).collect();
        let beta = if loaded {
            Beta::Each(model.loadings.iter().map(|&x| constants(0.5, x).1).collect())
        } else {
            Beta::All(constants(0.5, rho).1)
        };
        let (group_alpha, group_beta) =
            model.binomials.iter().enumerate().map(|(i, g)| constants(g.p, r(i, &model.group_loadings))).unzip();
        Loads { alpha, beta, group_alpha, group_beta }
    }

    pub fn beta_of(&self, i: usize) -> f64 {
        match &self.beta {
            Beta::All(b) => *b,
            Beta::Each(v) => v[i],
        }
    }

    /// Whether every exposure ignores the factor (all loadings 0).
    pub fn all_zero(&self) -> bool {
        let bern = match &self.beta {
            Beta::All(b) => *b == 0.0 || self.alpha.is_empty(),
            Beta::Each(v) => v.iter().all(|&b| b == 0.0),
        };
        bern && self.group_beta.iter().all(|&b| b == 0.0)
    }
}

/// The independent portfolio conditional on Z = z. Losses in units keep their steps and the unconditional
/// lattice (span, offset): an exposure whose p_i(z) rounds to 1 moves its steps into the shift and one that rounds
/// to 0 leaves, and neither changes the lattice the questions were mapped onto (a coarser one would fit the
/// remaining exposures, but this one contains it).
pub fn conditional(model: &Model, loads: &Loads, z: f64) -> Model {
    if model.weighted() {
        return conditional_weighted(model, loads, z);
    }
    let mut m = Model { shift: model.shift, poisson: model.poisson, ..Model::default() };
    m.bernoulli.reserve(model.bernoulli.len());
    match &loads.beta {
        Beta::All(b) => {
            for &a in &loads.alpha {
                m.push_bernoulli(normal_law::cdf(a - b * z));
            }
        }
        Beta::Each(bs) => {
            for (&a, &b) in loads.alpha.iter().zip(bs) {
                m.push_bernoulli(normal_law::cdf(a - b * z));
            }
        }
    }
    for ((g, &a), &b) in model.binomials.iter().zip(&loads.group_alpha).zip(&loads.group_beta) {
        m.push_group(g.size, normal_law::cdf(a - b * z));
    }
    m.exposures = model.exposures;
    m
}

fn conditional_weighted(model: &Model, loads: &Loads, z: f64) -> Model {
    let mut m = Model {
        shift: model.shift,
        poisson: model.poisson,
        // Compound sources are independent of the factor.
        scaled_poisson: model.scaled_poisson.clone(),
        span: model.span,
        offset: model.offset,
        ..Model::default()
    };
    m.bernoulli.reserve(model.bernoulli.len());
    m.units.reserve(model.bernoulli.len());
    let step = |v: &[u64], i: usize| v.get(i).copied().unwrap_or(1);
    for (i, &a) in loads.alpha.iter().enumerate() {
        m.push_weighted(normal_law::cdf(a - loads.beta_of(i) * z), step(&model.units, i));
    }
    for (i, ((g, &a), &b)) in model.binomials.iter().zip(&loads.group_alpha).zip(&loads.group_beta).enumerate() {
        m.push_group_weighted(g.size, normal_law::cdf(a - b * z), step(&model.group_units, i));
    }
    if m.units.iter().all(|&u| u == 1) {
        m.units.clear();
    }
    if m.group_units.iter().all(|&u| u == 1) {
        m.group_units.clear();
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

/// The conditional mean and variance as functions of z on a compressed copy of the portfolio: groups as they
/// are, listed exposures as they are up to `EXACT_PROFILE` of them and binned by (alpha, beta) beyond (bins of
/// 1/16 in alpha and 1/32 in beta, each at its members' mean constants). Only the panels' placement and first
/// guesses use it, never a value.
#[derive(Debug, Clone)]
pub struct Profile {
    /// (steps: sum of u over the members, sum of u^2, alpha, beta); u = 1 for a count.
    buckets: Vec<(f64, f64, f64, f64)>,
    /// Shift plus the Poisson and compound sources' means, and their variance (independent of the factor).
    constant_mean: f64,
    constant_var: f64,
}

const EXACT_PROFILE: usize = 512;

/// One bin of the profile: (members, sum of alpha, sum of beta, sum of u, sum of u^2).
type Bin = (f64, f64, f64, f64, f64);

impl Profile {
    pub fn of(model: &Model, loads: &Loads) -> Profile {
        // Losses in units: the profile is in lattice steps, each exposure weighted by its steps.
        let step = |v: &[u64], i: usize| v.get(i).copied().unwrap_or(1) as f64;
        let mut buckets: Vec<(f64, f64, f64, f64)> = Vec::new();
        if model.bernoulli.len() <= EXACT_PROFILE {
            for (i, &a) in loads.alpha.iter().enumerate() {
                let u = step(&model.units, i);
                buckets.push((u, u * u, a, loads.beta_of(i)));
            }
        } else {
            let mut bins: HashMap<(i64, i64), Bin> = HashMap::new();
            for (i, &a) in loads.alpha.iter().enumerate() {
                let b = loads.beta_of(i);
                let u = step(&model.units, i);
                let e = bins
                    .entry(((a * 16.0).floor() as i64, (b * 32.0).floor() as i64))
                    .or_insert((0.0, 0.0, 0.0, 0.0, 0.0));
                e.0 += 1.0;
                e.1 += a;
                e.2 += b;
                e.3 += u;
                e.4 += u * u;
            }
            let mut v: Vec<_> = bins.into_iter().collect();
            v.sort_by_key(|(k, _)| *k);
            buckets.extend(v.into_iter().map(|(_, (n, a, b, u, u2))| (u, u2, a / n, b / n)));
        }
        for (i, ((g, &a), &b)) in model.binomials.iter().zip(&loads.group_alpha).zip(&loads.group_beta).enumerate() {
            let (n, u) = (g.size as f64, step(&model.group_units, i));
            buckets.push((n * u, n * u * u, a, b));
        }
        // Compound sources do not load on the factor: their mean and variance (sum of r s and of r s^2 over
        // their parts, in steps) are the same at every z.
        let (sp_mean, sp_var) =
            model.scaled_poisson.iter().fold((0.0, 0.0), |(m, v), &(s, r)| (m + r * s as f64, v + r * (s * s) as f64));
        Profile {
            buckets,
            constant_mean: model.shift as f64 + model.poisson + sp_mean,
            constant_var: model.poisson + sp_var,
        }
    }

    /// (mean, variance, d mean / dz) of the conditional law at z.
    pub fn at(&self, z: f64) -> (f64, f64, f64) {
        let (mut m, mut v, mut d) = (self.constant_mean, self.constant_var, 0.0);
        for &(n, n2, a, b) in &self.buckets {
            let u = a - b * z;
            let p = normal_law::cdf(u);
            m += n * p;
            v += n2 * p * (1.0 - p);
            d -= n * b * (normal_law::ln_pdf(u)).exp();
        }
        (m, v, d)
    }

    /// The z in (-LIMIT, LIMIT) where the conditional mean equals x (it decreases in z), with the width of the
    /// conditional law's step there, sd / |d mean / dz|; None when x is not crossed inside the range.
    pub fn crossing(&self, x: f64) -> Option<(f64, f64)> {
        let (mut lo, mut hi) = (-LIMIT, LIMIT);
        if self.at(lo).0 <= x || self.at(hi).0 >= x {
            return None;
        }
        // Safeguarded Newton: bisection whenever the step leaves the bracket.
        let mut z = 0.0f64.clamp(lo, hi);
        for _ in 0..100 {
            let (m, _, d) = self.at(z);
            if m > x {
                lo = z;
            } else {
                hi = z;
            }
            let newton = if d < 0.0 { z - (m - x) / d } else { f64::NAN };
            let next = if newton > lo && newton < hi { newton } else { 0.5 * (lo + hi) };
            if (next - z).abs() <= 1e-10 * (1.0 + z.abs()) || hi - lo <= 1e-12 {
                z = next;
                break;
            }
            z = next;
        }
        let (_, v, d) = self.at(z);
        let w = if d < 0.0 { v.sqrt().max(0.5) / -d } else { f64::INFINITY };
        Some((z, w))
    }

    /// The large-pool guess of a quantile: m(z) at the factor's (1 - level) quantile (exact as the pool grows,
    /// since S / n tends to the conditional mean's fraction).
    pub fn quantile_guess(&self, level: f64) -> f64 {
        self.at(normal_quantile(1.0 - level).clamp(-LIMIT, LIMIT)).0
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::numerics::quadrature::Rule;

    /// The conditional probabilities average back to p over the factor (E p_i(Z) = p_i).
    #[test]
    fn conditional_probabilities_average_to_the_unconditional_ones() {
        let rule = Rule::new(96);
        for p in [0.001, 0.05, 0.4] {
            let m = Model::from_parts(&[p], &[], 0.0);
            for rho in [0.01, 0.2, 0.6] {
                let loads = Loads::of(&m, rho);
                // The conditional mean of the single exposure (p(z) may round to 0 or 1 at far nodes).
                let avg = rule.expect(|z| {
                    let c = conditional(&m, &loads, z);
                    c.shift as f64 + c.bernoulli.first().copied().unwrap_or(0.0)
                });
                assert!((avg / p - 1.0).abs() < 1e-6, "p = {p}, rho = {rho}: {avg}");
            }
        }
    }

    /// The profile's crossing of a homogeneous group is Vasicek's closed form z* = (Phi^-1(p) - sqrt(1 - rho)
    /// Phi^-1(x / n)) / sqrt(rho).
    #[test]
    fn crossings_of_a_homogeneous_group_are_closed_form() {
        let (n, p, rho) = (10_000u64, 0.01, 0.12);
        let m = Model::from_parts(&[], &[(n, p)], 0.0);
        let prof = Profile::of(&m, &Loads::of(&m, rho));
        for x in [10.0, 100.0, 900.0] {
            let (z, w) = prof.crossing(x).unwrap();
            let want = (normal_quantile(p) - (1.0 - rho).sqrt() * normal_quantile(x / n as f64)) / rho.sqrt();
            assert!((z - want).abs() < 1e-8, "x = {x}: {z} vs {want}");
            assert!(w > 0.0 && w < 1.0);
        }
        assert!(prof.crossing(n as f64 + 1.0).is_none());
    }
}
