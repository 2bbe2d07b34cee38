//! `auto`: the cheapest estimate whose *rigorous* bound meets the client's tolerance, falling back to exact.
//!
//! Candidates in order of cost: normal (O(1) after the moments), Poisson (O(sqrt(mean))), exact. Estimated bounds
//! (Edgeworth, saddlepoint) are never used to certify a tolerance. A relative tolerance r is met when
//! bound <= r * (probability - bound), i.e. relative to the smallest value the truth can take.
//!
//! Losses in units: the Poisson law of the count is not a law of a total in units (its compound form is
//! another method), so the candidates there are normal (Berry-Esseen with the weighted third moments) and exact.

use super::exact::Exact;
use super::normal::Normal;
use super::poisson::PoissonApprox;
use super::vocabulary::{Check, Estimate, Prepared, Selection, Side, TailMethod, Tolerance};

/// Documented default: 0.1% relative, what pricing work usually needs.
pub const DEFAULT_TOLERANCE: Tolerance = Tolerance::Relative(1e-3);

fn check(e: &Estimate, tol: &Tolerance) -> Check {
    Check { method: e.method, error_bound: e.error_bound, meets_tolerance: tol.met_by(e), elapsed_us: e.elapsed_us }
}

pub fn auto(prep: &Prepared, queries: &[(u64, Side)], tol: Tolerance) -> Vec<Estimate> {
    let normal = Normal.estimate(prep, queries);
    let poisson = if prep.model.weighted() { Vec::new() } else { PoissonApprox.estimate(prep, queries) };
    let mut out: Vec<Option<Estimate>> = vec![None; queries.len()];
    let mut checks: Vec<Vec<Check>> = vec![Vec::new(); queries.len()];
    let mut need_exact = Vec::new();
    for i in 0..queries.len() {
        for cand in std::iter::once(&normal[i]).chain(poisson.get(i)) {
            checks[i].push(check(cand, &tol));
            if tol.met_by(cand) {
                out[i] = Some(cand.clone());
                break;
            }
        }
        if out[i].is_none() {
            need_exact.push(i);
        }
    }
    if !need_exact.is_empty() {
        let qs: Vec<(u64, Side)> = need_exact.iter().map(|&i| queries[i]).collect();
        for (e, &i) in Exact.estimate(prep, &qs).into_iter().zip(&need_exact) {
            checks[i].push(check(&e, &tol));
            out[i] = Some(e);
        }
    }
    out.into_iter()
        .zip(checks)
        .map(|(e, checked)| {
            let mut e = e.expect("every query answered");
            e.selection = Some(Selection { tolerance: tol, chosen: e.method, checked });
            e
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::MethodId;
    use crate::portfolio::Model;

    /// A loose absolute tolerance is met by the normal law's rigorous bound; a relative tolerance of 1e-12
    /// in a far tail only by exact; either way the answer says what was checked.
    #[test]
    fn auto_takes_the_cheapest_rigorous_bound_that_meets_the_tolerance() {
        let ps: Vec<f64> = (0..500).map(|i| 0.02 + 0.1 * ((i * 7 % 11) as f64 / 11.0)).collect();
        let model = Model::from_parts(&ps, &[], 0.0);
        let prep = Prepared::new(&model);
        let loose = auto(&prep, &[(40, Side::Upper)], Tolerance::Absolute(0.5)).remove(0);
        assert_eq!(loose.method, MethodId::Normal);
        assert!(loose.selection.as_ref().unwrap().checked.len() == 1);
        let tight = auto(&prep, &[(120, Side::Upper)], Tolerance::Relative(1e-12)).remove(0);
        assert_eq!(tight.method, MethodId::Exact);
        let sel = tight.selection.unwrap();
        assert_eq!(
            sel.checked.iter().map(|c| c.method).collect::<Vec<_>>(),
            [MethodId::Normal, MethodId::Poisson, MethodId::Exact]
        );
        assert!(!sel.checked[0].meets_tolerance && !sel.checked[1].meets_tolerance);
    }
}
