//! Stress scenarios: every event probability moved by one factor, on the probability scale (capped at 1)
//! or on the odds scale p / (1 - p). A stressed portfolio is an ordinary model, so every method and endpoint
//! applies to it unchanged.

use super::model::Model;
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

/// `{"probability_factor": f}`: p -> min(f p, 1); `{"odds_factor": f}`: p / (1 - p) -> f p / (1 - p).
/// Poisson rates are multiplied by the factor in both cases (a rate is the small-probability limit of both
/// scales).
#[derive(Debug, Clone, Copy, PartialEq, Deserialize, Serialize, ToSchema)]
#[serde(rename_all = "snake_case", deny_unknown_fields)]
pub enum Stress {
    ProbabilityFactor(f64),
    OddsFactor(f64),
}

impl Stress {
    pub fn factor(&self) -> f64 {
        match *self {
            Stress::ProbabilityFactor(f) | Stress::OddsFactor(f) => f,
        }
    }

    /// The stressed probability. Odds are scaled without forming p / (1 - p), so p near 1 stays accurate:
    /// f p / (1 - p + f p).
    pub fn apply(&self, p: f64) -> f64 {
        match *self {
            // A certain exposure stays certain, as in `stressed` (it is part of the shift, not a probability).
            Stress::ProbabilityFactor(_) if p >= 1.0 => 1.0,
            Stress::ProbabilityFactor(f) => (f * p).min(1.0),
            Stress::OddsFactor(f) => {
                if p >= 1.0 {
                    1.0
                } else {
                    let fp = f * p;
                    (fp / ((1.0 - p) + fp)).min(1.0)
                }
            }
        }
    }
}

/// The model with every probability stressed. Exposures with p = 0 stay impossible and certain ones stay
/// certain; exposures that become certain move into the shift.
pub fn stressed(model: &Model, s: &Stress) -> Model {
    let mut m = Model { shift: model.shift, poisson: model.poisson * s.factor(), ..Model::default() };
    m.bernoulli.reserve(model.bernoulli.len());
    if model.weighted() {
        // Loss units travel with their exposures, in lattice steps; the lattice itself is kept (a stress that
        // makes some exposures certain may leave a coarser one, which this one contains).
        m.span = model.span;
        m.offset = model.offset;
        // Compound sources' rates scale like the Poisson rate.
        m.scaled_poisson =
            model.scaled_poisson.iter().map(|&(u, r)| (u, r * s.factor())).filter(|p| p.1 > 0.0).collect();
        let step = |v: &[u64], i: usize| v.get(i).copied().unwrap_or(1);
        for (i, &p) in model.bernoulli.iter().enumerate() {
            let n = m.bernoulli.len();
            m.push_weighted(s.apply(p), step(&model.units, i));
            if m.bernoulli.len() > n && model.loaded() {
                m.loadings.push(model.loadings[i]);
            }
        }
        for (i, b) in model.binomials.iter().enumerate() {
            let (n, k) = (m.bernoulli.len(), m.binomials.len());
            m.push_group_weighted(b.size, s.apply(b.p), step(&model.group_units, i));
            if model.loaded() {
                if m.bernoulli.len() > n {
                    m.loadings.push(model.group_loadings[i]);
                }
                if m.binomials.len() > k {
                    m.group_loadings.push(model.group_loadings[i]);
                }
            }
        }
        if m.units.iter().all(|&u| u == 1) {
            m.units.clear();
        }
        if m.group_units.iter().all(|&u| u == 1) {
            m.group_units.clear();
        }
    } else if model.loaded() {
        // Factor loadings travel with their exposures (an exposure made certain leaves with its loading).
        for (&p, &r) in model.bernoulli.iter().zip(&model.loadings) {
            m.push_loaded(s.apply(p), r);
        }
        for (b, &r) in model.binomials.iter().zip(&model.group_loadings) {
            m.push_group_loaded(b.size, s.apply(b.p), r);
        }
    } else {
        for &p in &model.bernoulli {
            m.push_bernoulli(s.apply(p));
        }
        for b in &model.binomials {
            m.push_group(b.size, s.apply(b.p));
        }
    }
    // Counted once above for each random exposure; impossible and certain ones keep their count.
    m.exposures = model.exposures;
    if m.poisson <= 0.0 {
        m.poisson = 0.0;
    }
    m
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn factors_act_on_their_scales() {
        let m = Model::from_parts(&[0.1, 0.6, 1.0], &[(10, 0.2)], 2.0);
        let p = stressed(&m, &Stress::ProbabilityFactor(2.0));
        assert_eq!(p.shift, 2, "0.6 doubled is certain");
        assert_eq!(p.bernoulli, vec![0.2]);
        assert_eq!(p.binomials[0].p, 0.4);
        assert_eq!(p.poisson, 4.0);
        assert_eq!(p.exposures, m.exposures);
        let o = stressed(&m, &Stress::OddsFactor(3.0));
        // Odds 1/9 -> 1/3, i.e. p = 0.25; odds 1.5 -> 4.5, p = 4.5 / 5.5.
        assert!((o.bernoulli[0] - 0.25).abs() < 1e-16);
        assert!((o.bernoulli[1] - 4.5 / 5.5).abs() < 1e-15);
        assert_eq!(o.shift, 1);
        assert_eq!(Stress::OddsFactor(1.0).apply(1.0 - 1e-12), 1.0 - 1e-12);
    }
}
