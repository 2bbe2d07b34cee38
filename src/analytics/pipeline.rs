//! The one trait every question implements, and the one pipeline that runs them all: check -> model ->
//! budget (work and memory) -> answer -> base answer under stress (the steps are listed in the module above).

use super::cancel::Cancel;
use super::cost::{self, Footprint};
use super::dependence::Dependence;
use super::error::Error;
use super::law::Law;
use super::scenario;
use crate::config::ServiceLimits;
use crate::engine::interrupt;
use crate::portfolio::stress::Stress;
use crate::portfolio::{Model, PortfolioSpec, Violation};

/// The parts of a request that every question shares: the portfolio and the scenario.
pub struct Inputs<'a> {
    pub portfolio: &'a PortfolioSpec,
    pub stress: Option<Stress>,
    pub dependence: Option<Dependence>,
}

/// What a question needs besides its request and law: the service's limits and the cancellation flag.
pub struct Ctx<'a> {
    pub limits: &'a ServiceLimits,
    pub cancel: &'a Cancel,
}

/// One question asked of a portfolio's law.
pub trait Analytic {
    type Request;
    type Answer;

    /// The portfolio and scenario of the request.
    fn inputs(req: &Self::Request) -> Inputs<'_>;

    /// The question's own fields (besides portfolio, stress and dependence), in the order they are reported.
    fn check(req: &Self::Request, limits: &ServiceLimits, errs: &mut Vec<Violation>);

    /// Whether this request may be asked of a portfolio with loss units (its violations otherwise, at the
    /// fields that stand in the way). A question that does not yet compute on the lattice says so at the
    /// portfolio's first units field (the default).
    fn check_units(_req: &Self::Request) -> Result<(), Vec<Violation>> {
        Err(vec![Violation::new(
            "",
            "this question does not yet take loss units (it answers about the count of events); /v1/tail does, with every method but poisson",
        )])
    }

    /// Whether the question answers under the one-factor model on a book with compound sources (the factor's
    /// node pins and profile count them for its integrands; a question not yet checked there is refused).
    fn factor_takes_compound() -> bool {
        false
    }

    /// Rules that need the validated model.
    fn check_model(_req: &Self::Request, _model: &Model) -> Result<(), Error> {
        Ok(())
    }

    /// Independent evaluations the question costs (in units of one exact tail), for the work budget; `None`
    /// when the question checks its budget itself (it needs the law's moments to know its size).
    fn evaluations(req: &Self::Request) -> Option<f64>;

    /// Whether the question may be answered on the async worker when its work is small (`cost::inline_work`);
    /// a question whose size the request does not bound by its evaluations says no.
    fn may_inline(_req: &Self::Request) -> bool {
        true
    }

    /// The memory the question will hold on this model (one law, independent, unstressed: the pipeline
    /// scales it by the scenario), for the per-request ceiling.
    fn footprint(req: &Self::Request, model: &Model, limits: &ServiceLimits) -> Footprint;

    /// The answer on one law (stressed when `stress` is named, the base law otherwise).
    fn answer(req: &Self::Request, law: &Law, stress: Option<Stress>, ctx: &Ctx) -> Result<Self::Answer, Error>;

    /// Attach the unstressed answer to the stressed one.
    fn with_base(answer: &mut Self::Answer, base: Self::Answer);
}

/// The one pipeline: check -> model -> budget -> answer -> base answer under stress. The engine sees the
/// cancellation flag throughout, and an answer finished after the flag was set is never returned.
pub fn run<A: Analytic>(req: &A::Request, limits: &ServiceLimits, cancel: &Cancel) -> Result<A::Answer, Error> {
    interrupt::with(cancel.flag(), || {
        let out = steps::<A>(req, limits, cancel)?;
        cancel.check()?;
        Ok(out)
    })
}

fn steps<A: Analytic>(req: &A::Request, limits: &ServiceLimits, cancel: &Cancel) -> Result<A::Answer, Error> {
    let mut errs = Vec::new();
    A::check(req, limits, &mut errs);
    let inputs = A::inputs(req);
    scenario::check(&inputs.stress, &inputs.dependence, &mut errs);
    let model = scenario::model(
        inputs.portfolio,
        &inputs.stress,
        &inputs.dependence,
        A::factor_takes_compound(),
        limits,
        errs,
    )?;
    if model.weighted() {
        A::check_units(req).map_err(|mut v| {
            for x in v.iter_mut().filter(|x| x.pointer.is_empty()) {
                x.pointer = scenario::units_pointer(inputs.portfolio);
            }
            Error::Invalid(v)
        })?;
    }
    A::check_model(req, &model)?;
    if let Some(evaluations) = A::evaluations(req) {
        let factor = scenario::work_factor(&inputs.stress, &inputs.dependence);
        // Every question counts the windows of the book's wide parts (`scenario::part_windows`): each tilted
        // law convolves them, and a tail of 1,000 groups of 10^6 counted as 64 each took 1.4 s for a work of
        // 6.4e4 (22,000 ns a unit, where the budget's unit is about 100; examples/work_calibration).
        let extra = scenario::part_windows(&model, &inputs.stress);
        scenario::check_work_with(&model, extra, evaluations, factor, limits)?;
    }
    let footprint = A::footprint(req, &model, limits);
    cost::check(
        &cost::under_scenario(footprint, &model, inputs.stress.is_some(), &inputs.dependence),
        limits.max_request_bytes,
    )?;
    let laws = scenario::build(model, inputs.stress, inputs.dependence, cancel);
    let ctx = Ctx { limits, cancel };
    cancel.check()?;
    let mut out = A::answer(req, &laws.law, laws.stress, &ctx)?;
    if let Some(base) = &laws.base {
        cancel.check()?;
        let b = A::answer(req, base, None, &ctx)?;
        A::with_base(&mut out, b);
    }
    Ok(out)
}
