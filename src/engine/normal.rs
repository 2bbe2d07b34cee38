//! The normal approximation with continuity correction, and its rigorous Berry-Esseen bound.
//!
//! P(S <= k) ~ Phi((k + 1/2 - mean) / sd) and P(S >= k) ~ 1 - Phi((k - 1/2 - mean) / sd). Bound: for independent
//! summands with finite third moments, sup_x |P(S <= x) - Phi((x - mean)/sd)| <= C0 * sum E|X_i - EX_i|^3 / sd^3
//! with C0 = 0.5600 (Shevtsova, "An improvement of convergence rate estimates in the Lyapunov theorem", Doklady
//! Mathematics 82 (2010) 862-864), the best published constant for non-identically distributed summands. The
//! continuity-corrected points are values of x, so the bound applies as it stands; a point probability is a
//! difference of two cdf values and gets twice the bound. E|X - p|^3 = p(1-p)(p^2 + (1-p)^2) per Bernoulli;
//! the Poisson part, as the limit of many tiny Bernoullis, contributes its rate. The bound is absolute: it says
//! nothing useful in far tails, which is why the other methods exist.

use super::numerics::normal_law::{cdf, ln_cdf, ln_sf, sf};
use super::{BoundKind, Estimate, MethodId, Prepared, Side, TailMethod};

/// Shevtsova (2010).
pub const BERRY_ESSEEN_C0: f64 = 0.5600;

pub struct Normal;

impl Normal {
    pub fn bound(prep: &Prepared, side: Side) -> f64 {
        let b = (BERRY_ESSEEN_C0 * prep.moments.lyapunov_ratio()).min(1.0);
        if side == Side::Point {
            (2.0 * b).min(1.0)
        } else {
            b
        }
    }
}

impl TailMethod for Normal {
    fn estimate(&self, prep: &Prepared, queries: &[(u64, Side)]) -> Vec<Estimate> {
        let m = &prep.moments;
        let sd = m.sd();
        queries
            .iter()
            .map(|&(k, side)| {
                let start = std::time::Instant::now();
                let kf = k as f64;
                let (p, ln_p) = if sd == 0.0 {
                    let v = match side {
                        Side::Upper => (kf <= m.mean) as u8 as f64,
                        Side::Lower => (kf >= m.mean) as u8 as f64,
                        Side::Point => (kf == m.mean) as u8 as f64,
                    };
                    (v, v.ln())
                } else {
                    match side {
                        Side::Upper => {
                            let z = (kf - 0.5 - m.mean) / sd;
                            (sf(z), ln_sf(z))
                        }
                        Side::Lower => {
                            let z = (kf + 0.5 - m.mean) / sd;
                            (cdf(z), ln_cdf(z))
                        }
                        Side::Point => {
                            let (a, b) = ((kf - 0.5 - m.mean) / sd, (kf + 0.5 - m.mean) / sd);
                            // Difference of two tails on the side where both are small, in log space.
                            let (la, lb) = if a > 0.0 { (ln_sf(a), ln_sf(b)) } else { (ln_cdf(b), ln_cdf(a)) };
                            let ln = la + super::numerics::float::log1m_exp(lb - la);
                            (ln.exp(), ln)
                        }
                    }
                };
                Estimate::new(MethodId::Normal, p, ln_p, Normal::bound(prep, side), BoundKind::Rigorous, start)
            })
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::portfolio::Model;
    use statrs::distribution::{Binomial, ContinuousCDF, DiscreteCDF, Normal as StatrsNormal};

    /// The value is the continuity-corrected normal cdf (statrs' normal law as the closed form), and the
    /// Berry-Esseen bound covers the distance to the binomial law (statrs' binomial cdf) at every count.
    #[test]
    fn continuity_corrected_normal_within_berry_esseen_of_the_binomial() {
        let (n, p) = (400u64, 0.3);
        let model = Model::from_parts(&[], &[(n, p)], 0.0);
        let prep = Prepared::new(&model);
        let (mean, sd) = (n as f64 * p, (n as f64 * p * (1.0 - p)).sqrt());
        let phi = StatrsNormal::new(mean, sd).unwrap();
        let bin = Binomial::new(p, n).unwrap();
        let ks: Vec<u64> = (90..150).step_by(3).collect();
        let queries: Vec<(u64, Side)> = ks.iter().map(|&k| (k, Side::Lower)).collect();
        for (e, &k) in Normal.estimate(&prep, &queries).iter().zip(&ks) {
            let closed = phi.cdf(k as f64 + 0.5);
            // statrs' normal cdf goes through its erfc, off by up to 1e-10 relative (normal_law uses libm's).
            assert!((e.probability - closed).abs() < 1e-10 * closed, "k={k}: {} vs {closed}", e.probability);
            assert!((e.probability - bin.cdf(k)).abs() <= e.error_bound, "k={k}");
            assert_eq!(e.bound_kind, BoundKind::Rigorous);
        }
    }
}
