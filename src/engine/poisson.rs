//! The Poisson approximation: S - shift ~ Poisson(mean - shift), with the rigorous total-variation bound of
//! Barbour and Hall, "On the rate of Poisson convergence", Math. Proc. Cambridge Philos. Soc. 95 (1984) 473-480:
//! d_TV(sum of Bernoulli(p_i), Poisson(lambda)) <= (1 - e^-lambda)/lambda * sum p_i^2, lambda = sum p_i.
//!
//! Binomial blocks count as their exposures; the Poisson part is already Poisson and adds no error (convolving
//! both laws with the same Poisson part cannot increase their distance). A total-variation bound bounds the error
//! of every event's probability, so it holds for every side. The Poisson probabilities themselves are computed by
//! the exact engine, so the value carries no error of its own beyond the approximation.
//!
//! Losses in units: the compound Poisson approximation. Each exposure of u_i steps, u_i Bernoulli(p_i), is
//! replaced by u_i Poisson(p_i) (a group of m members: u Poisson(m p)); compound sources and the Poisson part are
//! kept. The value is the exact engine's answer on that all-Poisson model. Its error: coupling each Bernoulli
//! B_i with a Poisson N_i so that P(B_i != N_i) = d_TV(Bernoulli(p_i), Poisson(p_i)) = p_i (1 - e^-p_i) <=
//! p_i^2, the two totals differ only where some pair differs, so d_TV <= sum p_i^2 (+ m p^2 per group), the
//! bound of L. Le Cam, "An approximation theorem for the Poisson binomial distribution", Pacific J. Math. 10
//! (1960) 1181-1197, which holds whatever the sizes u_i. The bound reported adds the exact engine's own.

use super::{exact, numerics::moments::Moments, BoundKind, Estimate, MethodId, Prepared, Side, TailMethod};
use crate::portfolio::Model;

pub struct PoissonApprox;

impl PoissonApprox {
    pub fn bound(prep: &Prepared) -> f64 {
        let lam_b = prep.moments.mean - prep.model.shift as f64 - prep.model.poisson;
        if lam_b <= 0.0 {
            return 0.0;
        }
        ((-(-lam_b).exp_m1()) / lam_b * prep.moments.sum_p_squared).min(1.0)
    }

    /// Le Cam's bound for losses in units: sum p_i^2 over the exposures (m p^2 per group), rounded up.
    pub fn le_cam_bound(prep: &Prepared) -> f64 {
        (prep.moments.sum_p_squared * (1.0 + 1e-12)).min(1.0)
    }

    /// The all-Poisson model of a model in units (see the module note): the same lattice, every exposure a
    /// scaled Poisson part of its own steps.
    pub fn compound_model(model: &Model) -> Model {
        let mut m = Model {
            shift: model.shift,
            poisson: model.poisson,
            exposures: model.exposures,
            span: model.span,
            offset: model.offset,
            scaled_poisson: model.scaled_poisson.clone(),
            ..Model::default()
        };
        let step = |v: &[u64], i: usize| v.get(i).copied().unwrap_or(1);
        for (i, &p) in model.bernoulli.iter().enumerate() {
            m.push_scaled_poisson(step(&model.units, i), p);
        }
        for (i, b) in model.binomials.iter().enumerate() {
            m.push_scaled_poisson(step(&model.group_units, i), b.size as f64 * b.p);
        }
        m.merge_scaled();
        m
    }

    /// The compound Poisson approximation (losses in units).
    fn estimate_compound(prep: &Prepared, queries: &[(u64, Side)]) -> Vec<Estimate> {
        let start = std::time::Instant::now();
        let approx = PoissonApprox::compound_model(prep.model);
        PoissonApprox::answers(prep, &approx, PoissonApprox::le_cam_bound(prep), queries, start)
    }

    /// The approximating law's values for the queries, each with `bound` (the approximation's own distance to
    /// the portfolio's law) added to the exact engine's bound. Where the portfolio's own support already decides
    /// the answer (exactly 0 or 1) the approximation has nothing to add; elsewhere `approx` is evaluated by the
    /// exact engine.
    fn answers(
        prep: &Prepared,
        approx: &Model,
        bound: f64,
        queries: &[(u64, Side)],
        start: std::time::Instant,
    ) -> Vec<Estimate> {
        let known: Vec<Option<f64>> = queries.iter().map(|&(k, side)| exact::trivial(prep.model, k, side)).collect();
        let open: Vec<(u64, Side)> = queries.iter().zip(&known).filter(|(_, t)| t.is_none()).map(|(q, _)| *q).collect();
        let (vals, _) = exact::evaluate(approx, &Moments::of(approx), &open);
        let mut vals = vals.into_iter();
        let per = start.elapsed().as_secs_f64() * 1e6 / queries.len().max(1) as f64;
        known
            .iter()
            .map(|t| {
                let (p, ln_p, err) = match t {
                    Some(p) => (*p, p.ln(), 0.0),
                    None => {
                        let v = vals.next().expect("one value per open query");
                        (v.value, v.ln_value, (bound + v.abs_err).min(1.0))
                    }
                };
                let mut e = Estimate::new(MethodId::Poisson, p, ln_p, err, BoundKind::Rigorous, start);
                e.elapsed_us = per;
                e
            })
            .collect()
    }
}

impl TailMethod for PoissonApprox {
    fn estimate(&self, prep: &Prepared, queries: &[(u64, Side)]) -> Vec<Estimate> {
        if prep.model.weighted() {
            return PoissonApprox::estimate_compound(prep, queries);
        }
        let start = std::time::Instant::now();
        // A rate below 1e-200 is rounding residue of mean - shift (every exposure certain or impossible).
        let lam = (prep.moments.mean - prep.model.shift as f64).max(0.0);
        let lam = if lam < 1e-200 { 0.0 } else { lam };
        let approx =
            Model { shift: prep.model.shift, poisson: lam, exposures: prep.model.exposures, ..Model::default() };
        PoissonApprox::answers(prep, &approx, PoissonApprox::bound(prep), queries, start)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use statrs::distribution::{DiscreteCDF, Poisson};

    /// The value is the Poisson law with the portfolio's mean (statrs' Poisson sf as the closed form), and
    /// the Barbour-Hall bound covers its distance to the exact law of the portfolio.
    #[test]
    fn poisson_law_with_the_mean_within_the_barbour_hall_bound() {
        let ps: Vec<f64> = (0..200).map(|i| 0.001 + 0.0002 * (i % 13) as f64).collect();
        let model = Model::from_parts(&ps, &[], 0.0);
        let prep = Prepared::new(&model);
        let lam: f64 = ps.iter().sum();
        let pois = Poisson::new(lam).unwrap();
        let queries: Vec<(u64, Side)> = (1..8).map(|k| (k, Side::Upper)).collect();
        let exact = exact::evaluate(&model, &prep.moments, &queries).0;
        for ((e, x), &(k, _)) in PoissonApprox.estimate(&prep, &queries).iter().zip(&exact).zip(&queries) {
            let closed = pois.sf(k - 1);
            assert!((e.probability / closed - 1.0).abs() < 1e-9, "k={k}: {} vs {closed}", e.probability);
            assert!((e.probability - x.value).abs() <= e.error_bound, "k={k}");
        }
    }
}
