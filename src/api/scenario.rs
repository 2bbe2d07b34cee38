//! What every analytics request shares besides its portfolio: an optional stress and an optional dependence
//! model. This file validates them, builds the law (base and stressed) and describes in the response which
//! model was used. The engine does the work; this is the wire side.

use crate::api::problem::Problem;
use crate::config::ServiceLimits;
use crate::engine::dependence::{Dependence, MAX_NODES};
use crate::engine::law::{Law, LawValue};
use crate::engine::BoundKind;
use crate::portfolio::stress::{stressed, Stress};
use crate::portfolio::{validate::build_model, Model, PortfolioSpec, Violation};
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

/// How the law was modelled, echoed in every answer.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct ModelOut {
    /// `independent` or `one_factor_gaussian`.
    pub dependence: Dependence,
    /// Quadrature nodes evaluated for the answer and for its error estimate (dependence only).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub nodes_evaluated: Option<[usize; 2]>,
    /// The stress applied to the figures in this answer, if any (the unstressed ones are under `base`).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub stress: Option<Stress>,
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

impl From<LawValue> for ValueOut {
    fn from(v: LawValue) -> Self {
        ValueOut {
            value: v.value,
            ln_value: v.ln_value.is_finite().then_some(v.ln_value),
            error_bound: v.abs_err,
            bound_kind: v.kind,
        }
    }
}

/// The laws a request asks about: the stressed one (or the base when unstressed), and the base under stress.
pub struct Scenario {
    pub law: Law,
    pub base: Option<Law>,
    pub stress: Option<Stress>,
}

impl Scenario {
    pub fn model_out(law: &Law, stress: Option<Stress>) -> ModelOut {
        ModelOut {
            dependence: law.dependence,
            nodes_evaluated: law.is_mixture().then(|| {
                let (a, b) = law.nodes_used();
                [a, b]
            }),
            stress,
        }
    }

    /// Multiplier of the work of one independent evaluation under this scenario (quadrature nodes of both
    /// rules, and a second law under stress).
    pub fn work_factor(stress: &Option<Stress>, dep: &Option<Dependence>) -> f64 {
        let nodes = match dep {
            Some(Dependence::OneFactorGaussian { nodes, .. }) => *nodes as f64 * 3.0,
            _ => 1.0,
        };
        nodes * if stress.is_some() { 2.0 } else { 1.0 }
    }
}

/// Check the stress and dependence fields; `errs` collects violations with pointers.
pub fn check(stress: &Option<Stress>, dep: &Option<Dependence>, errs: &mut Vec<Violation>) {
    if let Some(s) = stress {
        let (f, at) = match s {
            Stress::ProbabilityFactor(f) => (*f, "/stress/probability_factor"),
            Stress::OddsFactor(f) => (*f, "/stress/odds_factor"),
        };
        if !(f.is_finite() && f >= 0.0) {
            errs.push(Violation::new(at, format!("must be a finite factor >= 0, got {f}")));
        }
    }
    if let Some(Dependence::OneFactorGaussian { rho, nodes }) = dep {
        if !(rho.is_finite() && (0.0..1.0).contains(rho)) {
            errs.push(Violation::new("/dependence/rho", format!("must be in [0, 1), got {rho}")));
        }
        if !(2..=MAX_NODES).contains(nodes) {
            errs.push(Violation::new("/dependence/nodes", format!("must be between 2 and {MAX_NODES}, got {nodes}")));
        }
    }
}

/// Validate the portfolio with the other fields' violations, and build the model. A stress multiplies the
/// Poisson rate, so the stressed rate must meet the portfolio's rate limit too (probabilities saturate at 1).
pub fn model(
    spec: &PortfolioSpec,
    stress: &Option<Stress>,
    limits: &ServiceLimits,
    mut errs: Vec<Violation>,
) -> Result<Model, Problem> {
    let m = match build_model(spec, "/portfolio", &limits.portfolio) {
        Ok(m) => m,
        Err(mut v) => {
            errs.append(&mut v);
            return Err(Problem::invalid(errs));
        }
    };
    if let Some(s) = stress {
        let rate = m.poisson * s.factor();
        let max = limits.portfolio.max_poisson_rate;
        if !(rate.is_finite() && rate <= max) {
            let at = match s {
                Stress::ProbabilityFactor(_) => "/stress/probability_factor",
                Stress::OddsFactor(_) => "/stress/odds_factor",
            };
            errs.push(Violation::new(at, format!("the stressed total Poisson rate {rate} exceeds the limit {max}")));
        }
    }
    if !errs.is_empty() {
        return Err(Problem::invalid(errs));
    }
    crate::api::metrics::exposures_processed(m.exposures);
    Ok(m)
}

/// Refuse work over the budget (exposures x evaluations x scenario factor).
pub fn check_work(model: &Model, evaluations: f64, factor: f64, limits: &ServiceLimits) -> Result<(), Problem> {
    let work = crate::api::routes::tail::work_of(model, 1) * evaluations * factor;
    if work > limits.max_work {
        return Err(Problem::too_large(format!(
            "estimated work {work:.0} (exposures x evaluations x nodes) exceeds the work budget {} (see --max-work); split the request",
            limits.max_work
        )));
    }
    Ok(())
}

/// The stressed and base laws under the dependence model.
pub fn build(model: Model, stress: Option<Stress>, dep: Option<Dependence>) -> Scenario {
    let dep = dep.unwrap_or(Dependence::Independent);
    match stress {
        None => Scenario { law: Law::new(model, dep), base: None, stress: None },
        Some(s) => {
            let st = stressed(&model, &s);
            Scenario { law: Law::new(st, dep), base: Some(Law::new(model, dep)), stress: Some(s) }
        }
    }
}
