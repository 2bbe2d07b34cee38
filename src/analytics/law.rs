//! The law of the count as the analytics see it: one independent portfolio, or the mixture of independent
//! portfolios over a common factor (`dependence`). Every analytic (tail, quantiles, distribution, layers,
//! contributions) asks this type for exact values or method estimates and gets them with their error bound,
//! mixed over the factor where there is one.
//!
//! Under the factor every figure is an integral over Z of the conditional portfolio's figure, by adaptive
//! Gauss-Kronrod panels refined until the embedded rules agree within the dependence model's tolerance
//! (`factor`; default relative 1e-7 with an absolute floor of 1e-13). The conditional model at a node is built,
//! evaluated for all the figures of the call, and dropped, so the law holds one copy of the portfolio whatever
//! the node count. The quadrature's error estimate is an estimate, so every answer under dependence has bound
//! kind `estimated`.

use super::cancel::Cancel;
use super::dependence::Dependence;
use super::factor::{Factor, MixedLaw};
use crate::engine::exact;
use crate::engine::numerics::moments::Moments;
use crate::engine::Tolerance;
use crate::engine::{BoundKind, Estimate, MethodId, Prepared, Side, Value};
use crate::portfolio::Model;
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

enum Kind {
    // Boxed: the model is a few hundred bytes of vectors' headers and the factor variant is a pointer.
    Independent { model: Box<Model>, moments: Moments },
    Factor(Box<Factor>),
}

pub struct Law {
    pub dependence: Dependence,
    kind: Kind,
    /// Support of the unconditional law (a conditional one may be narrower where p_i(z) rounds to 0 or 1).
    support: (u64, Option<u64>),
}

impl Law {
    pub fn independent(model: Model) -> Law {
        let support = (model.support_min(), model.support_max());
        let moments = Moments::of(&model);
        Law {
            dependence: Dependence::Independent {},
            kind: Kind::Independent { model: Box::new(model), moments },
            support,
        }
    }

    /// The law under `dep`: the model itself when independent (or when every loading is 0), else the mixture
    /// over the factor.
    pub fn new(model: Model, dep: Dependence) -> Law {
        match dep.rho() {
            None => Law::independent(model),
            Some(rho) => {
                let support = (model.support_min(), model.support_max());
                let f = Factor::new(model, rho, dep.tolerance(), Cancel::never());
                if f.loads.all_zero() {
                    let mut l = Law::independent(f.model);
                    l.dependence = dep;
                    return l;
                }
                Law { dependence: dep, kind: Kind::Factor(Box::new(f)), support }
            }
        }
    }

    /// The same law, its integrations stopping early once `cancel` is set.
    pub fn cancellable(mut self, cancel: &Cancel) -> Law {
        if let Kind::Factor(f) = &mut self.kind {
            f.set_cancel(cancel.clone());
        }
        self
    }

    pub fn is_mixture(&self) -> bool {
        matches!(self.kind, Kind::Factor(_))
    }

    /// The model when the law is a single independent portfolio.
    pub fn single(&self) -> Option<(&Model, &Moments)> {
        match &self.kind {
            Kind::Independent { model, moments } => Some((&**model, moments)),
            Kind::Factor(_) => None,
        }
    }

    /// The mixture over the factor, when there is one.
    pub fn factor(&self) -> Option<&Factor> {
        match &self.kind {
            Kind::Factor(f) => Some(f),
            Kind::Independent { .. } => None,
        }
    }

    /// The unconditional model.
    pub fn model(&self) -> &Model {
        match &self.kind {
            Kind::Independent { model, .. } => model,
            Kind::Factor(f) => &f.model,
        }
    }

    /// Moments of the law; under the factor those of the mixture (law of total variance and its third-moment
    /// analogue, integrated over the factor). The Berry-Esseen and Poisson sums are then the conditional ones
    /// averaged, reported for completeness only.
    pub fn moments(&self) -> Moments {
        match &self.kind {
            Kind::Independent { moments, .. } => *moments,
            Kind::Factor(f) => f.moments(),
        }
    }

    /// Exposures as the client counted them.
    pub fn exposures(&self) -> u64 {
        self.model().exposures
    }

    /// The law's support.
    pub fn support(&self) -> (u64, Option<u64>) {
        self.support
    }

    /// Exact values for (threshold, side) queries, in order.
    pub fn exact(&self, queries: &[(u64, Side)]) -> Vec<Value> {
        match &self.kind {
            Kind::Independent { model, moments } => exact::evaluate(model, moments, queries).0,
            Kind::Factor(f) => f.exact(queries),
        }
    }

    /// E[min((S - a)+, l)] (no cap when `limit` is None).
    pub fn layer_expectation(&self, a: u64, limit: Option<u64>) -> Value {
        match &self.kind {
            Kind::Independent { model, moments } => exact::layer_expectation(model, moments, a, limit),
            Kind::Factor(f) => f.layer_expectation(a, limit),
        }
    }

    /// One method's estimates; under dependence each node's estimate is mixed like an exact value.
    pub fn estimates(&self, id: MethodId, queries: &[(u64, Side)], tol: Option<Tolerance>) -> Vec<Estimate> {
        let start = std::time::Instant::now();
        let f = match &self.kind {
            Kind::Independent { model, moments } => {
                return crate::engine::run(id, &Prepared { model, moments: *moments }, queries, tol)
            }
            Kind::Factor(f) => f,
        };
        let vals = if id == MethodId::Exact { f.exact(queries) } else { f.estimates(id, queries, tol) };
        let per = start.elapsed().as_secs_f64() * 1e6 / queries.len().max(1) as f64;
        vals.into_iter()
            .map(|v| {
                let mut e = Estimate::new(id, v.value.min(1.0), v.ln_value.min(0.0), v.abs_err.min(1.0), v.kind, start);
                e.relative_error_bound = v.rel_err.is_finite().then_some(v.rel_err);
                e.elapsed_us = per;
                e
            })
            .collect()
    }

    /// The whole law mixed over the factor once (`Factor::mixed_law`), for the questions that read many values
    /// of one law (quantiles, a distribution table): under the factor on a book in loss units or with compound
    /// sources, where probing one tail integral at a time costs a lattice law per node per probe. None
    /// otherwise (the count keeps its integrals per figure, and an independent law has no mixture).
    pub fn mixed(&self) -> Option<&MixedLaw> {
        match &self.kind {
            Kind::Factor(f) if f.model.weighted() => Some(f.mixed_law()),
            _ => None,
        }
    }

    /// A first guess of the quantile at `level` under the factor (the large-pool limit), None when independent.
    pub fn quantile_guess(&self, level: f64) -> Option<u64> {
        self.factor().map(|f| f.quantile_guess(level))
    }

    /// Nodes evaluated so far under the factor, and how many of them were Gauss nodes (the embedded check
    /// rule's), for the response.
    pub fn nodes_used(&self) -> (usize, usize) {
        self.factor().map_or((0, 0), |f| f.nodes_used())
    }
}

/// A value (a probability or an expected count) with its error bound.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct ValueOut {
    pub value: f64,
    /// Natural logarithm of the value, finite where the value underflows; null only when the value is 0.
    pub ln_value: Option<f64>,
    /// Bound on |value - truth|.
    pub error_bound: f64,
    pub bound_kind: BoundKind,
}

impl From<Value> for ValueOut {
    fn from(v: Value) -> Self {
        ValueOut { value: v.value, ln_value: v.ln(), error_bound: v.abs_err, bound_kind: v.kind }
    }
}

/// Summary of the portfolio's law.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct Summary {
    /// Exposures as counted by the client (p = 0 and p = 1 included; group sizes counted).
    pub exposures: u64,
    pub mean: f64,
    pub variance: f64,
    pub standard_deviation: f64,
    pub skewness: f64,
    /// Lyapunov ratio sum E|X - EX|^3 / sd^3: the Berry-Esseen bound is a constant times this.
    pub lyapunov_ratio: Option<f64>,
    pub support_min: u64,
    /// Largest possible count; null when a Poisson part makes it unbounded.
    pub support_max: Option<u64>,
}

impl Summary {
    /// The summary of a law: its own moments, which under dependence are those of the mixture.
    pub fn of_law(law: &Law) -> Summary {
        let mut m = law.moments();
        let (mut min, mut max) = law.support();
        let model = law.model();
        if model.weighted() {
            // The law was computed in lattice steps: S = offset + span j.
            let h = model.span() as f64;
            m.mean = model.offset as f64 + h * m.mean;
            m.variance *= h * h;
            m.third_central *= h * h * h;
            m.third_abs_sum *= h * h * h;
            min = model.units_of(min);
            max = max.map(|j| model.units_of(j));
        }
        let lr = m.lyapunov_ratio();
        Summary {
            exposures: law.exposures(),
            mean: m.mean,
            variance: m.variance,
            standard_deviation: m.sd(),
            skewness: m.skewness(),
            // The Berry-Esseen diagnostic belongs to independent sums only.
            lyapunov_ratio: (lr.is_finite() && !law.is_mixture()).then_some(lr),
            support_min: min,
            support_max: max,
        }
    }
}
