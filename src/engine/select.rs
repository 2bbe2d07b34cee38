//! `auto`: the cheapest estimate whose *rigorous* bound meets the client's tolerance, falling back to exact.
//!
//! Candidates in order of cost: normal (O(1) after the moments), Poisson (O(sqrt(mean))), exact. Estimated bounds
//! (Edgeworth, saddlepoint) are never used to certify a tolerance. A relative tolerance r is met when
//! bound <= r * (probability - bound), i.e. relative to the smallest value the truth can take.

use super::{exact::Exact, normal::Normal, poisson::PoissonApprox, Estimate, MethodId, Prepared, Side, TailMethod};
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

/// The accuracy a client asks for.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize, ToSchema)]
#[serde(rename_all = "snake_case", deny_unknown_fields)]
pub enum Tolerance {
    /// |estimate - truth| <= a.
    Absolute(f64),
    /// |estimate - truth| <= r * truth.
    Relative(f64),
}

/// Documented default: 0.1% relative, what pricing work usually needs.
pub const DEFAULT_TOLERANCE: Tolerance = Tolerance::Relative(1e-3);

impl Tolerance {
    pub fn met_by(&self, e: &Estimate) -> bool {
        if e.bound_kind != super::BoundKind::Rigorous {
            return false;
        }
        match *self {
            Tolerance::Absolute(a) => e.error_bound <= a,
            Tolerance::Relative(r) => {
                e.error_bound <= r * (e.probability - e.error_bound).max(0.0) || e.error_bound == 0.0
            }
        }
    }
}

/// One candidate that `auto` checked.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, ToSchema)]
pub struct Check {
    pub method: MethodId,
    pub error_bound: f64,
    pub meets_tolerance: bool,
    pub elapsed_us: f64,
}

/// Why `auto` chose what it chose.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, ToSchema)]
pub struct Selection {
    pub tolerance: Tolerance,
    pub chosen: MethodId,
    pub checked: Vec<Check>,
}

fn check(e: &Estimate, tol: &Tolerance) -> Check {
    Check { method: e.method, error_bound: e.error_bound, meets_tolerance: tol.met_by(e), elapsed_us: e.elapsed_us }
}

pub fn auto(prep: &Prepared, queries: &[(u64, Side)], tol: Tolerance) -> Vec<Estimate> {
    let normal = Normal.estimate(prep, queries);
    let poisson = PoissonApprox.estimate(prep, queries);
    let mut out: Vec<Option<Estimate>> = vec![None; queries.len()];
    let mut checks: Vec<Vec<Check>> = vec![Vec::new(); queries.len()];
    let mut need_exact = Vec::new();
    for i in 0..queries.len() {
        for cand in [&normal[i], &poisson[i]] {
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
