//! From a method's name to its implementation.

use super::vocabulary::{Estimate, MethodId, Prepared, Side, TailMethod, Tolerance};
use super::{edgeworth, exact, normal, poisson, saddlepoint, select};

/// Run one method (`auto` with the given tolerance, or the default one).
pub fn run(id: MethodId, prep: &Prepared, queries: &[(u64, Side)], tol: Option<Tolerance>) -> Vec<Estimate> {
    match id {
        MethodId::Exact => exact::Exact.estimate(prep, queries),
        MethodId::Normal => normal::Normal.estimate(prep, queries),
        MethodId::Edgeworth => edgeworth::Edgeworth.estimate(prep, queries),
        MethodId::Poisson => poisson::PoissonApprox.estimate(prep, queries),
        MethodId::Saddlepoint => saddlepoint::Saddlepoint.estimate(prep, queries),
        MethodId::Auto => select::auto(prep, queries, tol.unwrap_or(select::DEFAULT_TOLERANCE)),
    }
}
