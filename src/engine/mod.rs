//! The computation core: the law of the count S and its approximations, with no HTTP in it.
//!
//! Every method answers the same question, a probability for a threshold and a side, and returns an
//! [`Estimate`]: the value, its natural logarithm (exact even where the value underflows f64), an absolute error
//! bound and the kind of that bound. One file per method; `exact` is the reference every other method is
//! checked against.

pub mod cgf;
pub mod contributions;
pub mod dependence;
pub mod distribution;
pub mod edgeworth;
pub mod exact;
pub mod float;
pub mod law;
pub mod layers;
pub mod moments;
pub mod normal;
pub mod normal_law;
pub mod poisson;
pub mod quadrature;
pub mod quantiles;
pub mod saddlepoint;
pub mod select;

use crate::portfolio::Model;
use moments::Moments;
use serde::{Deserialize, Serialize};
use std::time::Instant;
use utoipa::ToSchema;

/// Which probability a threshold asks for.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Default, Serialize, Deserialize, ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum Side {
    /// P(S >= k).
    #[default]
    Upper,
    /// P(S <= k).
    Lower,
    /// P(S = k).
    Point,
}

/// Whether an error bound is proven (`rigorous`) or an estimate of the likely error (`estimated`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum BoundKind {
    Rigorous,
    Estimated,
}

/// The methods the engine offers.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize, ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum MethodId {
    Exact,
    Normal,
    Edgeworth,
    Poisson,
    Saddlepoint,
    /// The cheapest method whose rigorous bound meets the tolerance.
    Auto,
}

/// One method's answer for one threshold.
#[derive(Debug, Clone, PartialEq)]
pub struct Estimate {
    pub method: MethodId,
    pub probability: f64,
    pub ln_probability: f64,
    /// Bound on |probability - truth|.
    pub error_bound: f64,
    /// Bound on |probability - truth| / truth, where the method gives one.
    pub relative_error_bound: Option<f64>,
    pub bound_kind: BoundKind,
    /// Compute time attributed to this estimate, in microseconds.
    pub elapsed_us: f64,
    /// ln of a rigorous Chernoff upper bound on the probability (saddlepoint only).
    pub chernoff_ln_bound: Option<f64>,
    /// Why `auto` chose this method.
    pub selection: Option<select::Selection>,
}

impl Estimate {
    pub fn new(
        method: MethodId,
        probability: f64,
        ln_probability: f64,
        error_bound: f64,
        bound_kind: BoundKind,
        start: Instant,
    ) -> Estimate {
        Estimate {
            method,
            probability,
            ln_probability,
            error_bound: float::up(error_bound),
            relative_error_bound: None,
            bound_kind,
            elapsed_us: start.elapsed().as_secs_f64() * 1e6,
            chernoff_ln_bound: None,
            selection: None,
        }
    }

    pub fn renamed(mut self, m: MethodId) -> Estimate {
        self.method = m;
        self
    }

    /// [lo, hi] clipped to [0, 1], where the truth lies given the bound.
    pub fn interval(&self) -> (f64, f64) {
        ((self.probability - self.error_bound).max(0.0), (self.probability + self.error_bound).min(1.0))
    }
}

/// The portfolio with its one-pass summaries, computed once per request.
pub struct Prepared<'a> {
    pub model: &'a Model,
    pub moments: Moments,
}

impl<'a> Prepared<'a> {
    pub fn new(model: &'a Model) -> Self {
        Prepared { model, moments: Moments::of(model) }
    }
}

/// What every method implements: estimates for a batch of (threshold, side) queries, in order.
pub trait TailMethod {
    fn id(&self) -> MethodId;
    fn estimate(&self, prep: &Prepared, queries: &[(u64, Side)]) -> Vec<Estimate>;
}

impl TailMethod for exact::Exact {
    fn id(&self) -> MethodId {
        MethodId::Exact
    }

    fn estimate(&self, prep: &Prepared, queries: &[(u64, Side)]) -> Vec<Estimate> {
        let start = Instant::now();
        let (vals, _) = exact::evaluate(prep.model, &prep.moments, queries);
        let per = start.elapsed().as_secs_f64() * 1e6 / queries.len().max(1) as f64;
        vals.into_iter()
            .map(|v| Estimate {
                method: MethodId::Exact,
                probability: v.p,
                ln_probability: v.ln_p,
                error_bound: v.abs_err,
                relative_error_bound: Some(v.rel_err),
                bound_kind: BoundKind::Rigorous,
                elapsed_us: per,
                chernoff_ln_bound: None,
                selection: None,
            })
            .collect()
    }
}

/// Run one method (`auto` with the given tolerance, or the default one).
pub fn run(id: MethodId, prep: &Prepared, queries: &[(u64, Side)], tol: Option<select::Tolerance>) -> Vec<Estimate> {
    match id {
        MethodId::Exact => exact::Exact.estimate(prep, queries),
        MethodId::Normal => normal::Normal.estimate(prep, queries),
        MethodId::Edgeworth => edgeworth::Edgeworth.estimate(prep, queries),
        MethodId::Poisson => poisson::PoissonApprox.estimate(prep, queries),
        MethodId::Saddlepoint => saddlepoint::Saddlepoint.estimate(prep, queries),
        MethodId::Auto => select::auto(prep, queries, tol.unwrap_or(select::DEFAULT_TOLERANCE)),
    }
}
