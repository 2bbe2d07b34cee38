//! What every question shares besides its own fields: the portfolio validated into a model, an optional
//! stress and an optional dependence model, the work budget, and the laws built from them (the stressed one
//! and, under stress, the base). Also how the answer describes the model it used (`ModelOut`).

use super::cancel::Cancel;
use super::dependence::Dependence;
use super::error::Error;
use super::law::Law;
use crate::config::ServiceLimits;
use crate::portfolio::stress::{stressed, Stress};
use crate::portfolio::{validate::build_model_with, Model, PortfolioSpec, Violation};
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

/// The model's assumptions, returned with every answer.
pub const ASSUMPTIONS: &[&str] = &[
    "Exposures and sources are mutually independent unless a dependence model is named in `model`; under the one-factor Gaussian model they are independent given the common factor, and Poisson sources are independent of it.",
    "Each listed probability is the exposure's event probability over the same period (at most one event each), and Poisson rates and compound sources' rates are over that period too; without loss units S counts events (a count is not a loss), with them S is the total loss in those whole units.",
    "Error bounds cover the computation only, not the uncertainty of the input probabilities, rates or rho.",
    "The one-factor Gaussian model has no tail dependence, and its rho must be calibrated to the book; it is not estimated here.",
    "Results support, and do not replace, the judgement of a qualified actuary or engineer and the rules of local regulation.",
];

/// The footer of the chart: the cautions in one line short enough to print under a plot.
pub const CHART_CAUTION: &str =
    "Bounds cover the computation, not the inputs' uncertainty; rho (if used) must be calibrated. Supports, does not replace, expert judgement.";

/// [`ASSUMPTIONS`] as an answer carries them.
pub fn assumptions() -> Assumptions {
    Assumptions::Constant
}

/// An answer's list of assumptions (a list of strings on the wire). The service's answers hold the constant
/// lines themselves, written out without being copied for each answer; an answer read back (a client's,
/// a test's) holds the lines it read.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Assumptions {
    Constant,
    Read(Vec<String>),
}

impl Assumptions {
    pub fn iter(&self) -> impl Iterator<Item = &str> + '_ {
        let (constant, read): (&[&str], &[String]) = match self {
            Assumptions::Constant => (ASSUMPTIONS, &[]),
            Assumptions::Read(lines) => (&[], lines),
        };
        constant.iter().copied().chain(read.iter().map(String::as_str))
    }
}

impl Serialize for Assumptions {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        match self {
            // The constant lines' JSON text, escaped once: every answer carries these 900 bytes, and escaping
            // them was a twentieth of a small answer's encoding. (serde_json writes a raw value as it is, and
            // `to_value` reads it back into the same list.)
            Assumptions::Constant => {
                static TEXT: std::sync::LazyLock<Box<serde_json::value::RawValue>> = std::sync::LazyLock::new(|| {
                    serde_json::value::to_raw_value(ASSUMPTIONS).expect("constant strings serialise")
                });
                TEXT.serialize(s)
            }
            Assumptions::Read(_) => s.collect_seq(self.iter()),
        }
    }
}

impl<'de> Deserialize<'de> for Assumptions {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        Vec::<String>::deserialize(d).map(Assumptions::Read)
    }
}

/// Largest count (threshold, range end, layer bound) served for an unbounded (Poisson) portfolio: its tilted
/// window then holds about 10^6 counts.
pub const MAX_UNBOUNDED_COUNT: u64 = 1_000_000_000;

/// How the law was modelled, echoed in every answer.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct ModelOut {
    /// `independent` or `one_factor_gaussian`.
    pub dependence: Dependence,
    /// Under dependence: [conditional laws evaluated over the factor for this answer (Gauss-Kronrod nodes and
    /// panel ends, all integrations), of which Gauss nodes (the embedded 7-point rule that checks each 15-point
    /// panel; they cost nothing extra)].
    #[serde(skip_serializing_if = "Option::is_none")]
    pub nodes_evaluated: Option<[usize; 2]>,
    /// The stress applied to the figures in this answer, if any (the unstressed ones are under `base`).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub stress: Option<Stress>,
}

impl ModelOut {
    pub fn of(law: &Law, stress: Option<Stress>) -> ModelOut {
        ModelOut {
            dependence: law.dependence,
            nodes_evaluated: law.is_mixture().then(|| {
                let (a, b) = law.nodes_used();
                [a, b]
            }),
            stress,
        }
    }
}

/// The laws a request asks about: the stressed one (or the base when unstressed), and the base under stress.
pub struct Laws {
    pub law: Law,
    pub base: Option<Law>,
    pub stress: Option<Stress>,
}

/// Conditional laws a typical integration over the factor evaluates, for the work budget (measured: 60 to 150
/// for one threshold; the refinement itself stops at `factor::MAX_NODES`).
pub const FACTOR_WORK: f64 = 150.0;

/// Multiplier of the work of one independent evaluation under this scenario (quadrature nodes over the
/// factor, and a second law under stress).
pub fn work_factor(stress: &Option<Stress>, dep: &Option<Dependence>) -> f64 {
    let nodes = match dep {
        Some(Dependence::OneFactorGaussian { .. }) => FACTOR_WORK,
        _ => 1.0,
    };
    nodes * if stress.is_some() { 2.0 } else { 1.0 }
}

/// The work a model costs for `evaluations` exact tails, in exposure-threshold units, to compare with
/// `--max-work`.
pub fn work_of(model: &Model, evaluations: usize) -> f64 {
    (model.bernoulli.len() as f64 + model.binomials.len() as f64 * 64.0 + 64.0 + lattice_work(model))
        * evaluations as f64
}

/// The extra work of loss units, in the same units: a Bernoulli block's recursion costs its members times
/// its width in lattice steps (for a count, 32 x 32 per block: one unit of work per exposure), so the leaves
/// cost the sum of the steps; a binomial group's leaf is its count window spread over u steps each. 0 for a
/// count.
pub fn lattice_work(model: &Model) -> f64 {
    if !model.weighted() {
        return 0.0;
    }
    let bern: f64 = model.units.iter().map(|&u| u as f64).sum::<f64>().max(model.bernoulli.len() as f64);
    let groups: f64 = model
        .binomials
        .iter()
        .enumerate()
        .map(|(i, b)| {
            let u = model.group_units.get(i).map_or(1.0, |&u| u as f64);
            let m = b.size as f64;
            (m + 1.0).min(2.0 * crate::engine::exact::window::Window::bernstein_radius_step(m / 4.0, 1.0) + 4.0) * u
        })
        .sum();
    bern + groups + compound_width(model, 0)
}

/// Lattice steps the windows of the compound sources' scaled parts span when the question reaches `top`
/// steps: a part of s steps tilted towards top carries at most about top / s events (its tilted mean is at most
/// the total's), or its rate when that is more, and its window is its Bernstein range in events spread over s
/// steps each. 0 without compound sources.
pub fn compound_width(model: &Model, top: u64) -> f64 {
    model
        .scaled_poisson
        .iter()
        .map(|&(s, lam)| {
            let s = s as f64;
            let mu = lam.max(top as f64 / s);
            (2.0 * crate::engine::exact::window::Window::bernstein_radius_step(mu, 1.0) + 4.0) * s
        })
        .sum()
}

/// Pointer to the first field that gives loss units (where a question that does not take them says so).
pub fn units_pointer(spec: &PortfolioSpec) -> String {
    if !spec.units.is_empty() {
        return "/portfolio/units".into();
    }
    if let Some(i) = spec.groups.iter().position(|g| g.units.is_some()) {
        return format!("/portfolio/groups/{i}/units");
    }
    if let Some(i) = spec.families.iter().position(|f| f.units().is_some()) {
        return format!("/portfolio/families/{i}/units");
    }
    if !spec.compound_sources.is_empty() {
        return "/portfolio/compound_sources".into();
    }
    "/portfolio".into()
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
    if let Some(d) = dep {
        d.check(errs);
    }
}

/// Validate the portfolio with the other fields' violations, and build the model. A stress multiplies the
/// Poisson rate, so the stressed rate must meet the portfolio's rate limit too (probabilities saturate at 1).
pub fn model(
    spec: &PortfolioSpec,
    stress: &Option<Stress>,
    dep: &Option<Dependence>,
    factor_compound: bool,
    limits: &ServiceLimits,
    mut errs: Vec<Violation>,
) -> Result<Model, Error> {
    check_ids(spec, &mut errs);
    // The factor's pins and profile count compound sources (independent of the factor: constant conditional
    // mean and variance, their sizes in the largest step) for the questions that say so
    // (`Analytic::factor_takes_compound`, checked against a quadrature of Panjer's recursion in
    // tests/factor_compound.rs and tests/factor_mixed.rs); the others refuse the pair rather than answer with a
    // bound not checked there.
    if !factor_compound && dep.and_then(|d| d.rho()).is_some() && !spec.compound_sources.is_empty() {
        errs.push(Violation::new(
            "/dependence",
            "the one-factor model does not yet take compound sources for this question; tail, quantiles, distribution and layers do",
        ));
    }
    // Under a dependence model the exposures' own factor loadings are kept (the default is its rho).
    let rho = dep.and_then(|d| d.rho()).filter(|r| r.is_finite() && (0.0..1.0).contains(r));
    let m = match build_model_with(spec, "/portfolio", &limits.portfolio, rho) {
        Ok(m) => m,
        Err(mut v) => {
            name_ids(spec, &mut v);
            errs.append(&mut v);
            return Err(Error::Invalid(errs));
        }
    };
    if let Some(s) = stress {
        let rate = (m.poisson + m.scaled_rate()) * s.factor();
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
        return Err(Error::Invalid(errs));
    }
    crate::telemetry::metrics::exposures_processed(m.exposures);
    Ok(m)
}

/// `ids`, when given, are parallel to `probabilities`.
fn check_ids(spec: &PortfolioSpec, errs: &mut Vec<Violation>) {
    let (ids, listed) = (spec.ids.len(), spec.probabilities.len());
    if ids != 0 && ids != listed {
        errs.push(Violation::new(
            "/portfolio/ids",
            format!("{ids} ids for {listed} probabilities: give one id (or null) per probability, or none"),
        ));
    }
}

/// Name the exposure's id in the violations of its probability, so that a client finds it in its own books.
fn name_ids(spec: &PortfolioSpec, errs: &mut [Violation]) {
    for v in errs.iter_mut() {
        let index = v.pointer.strip_prefix("/portfolio/probabilities/").and_then(|i| i.parse::<usize>().ok());
        if let Some(Some(id)) = index.and_then(|i| spec.ids.get(i)) {
            v.detail = format!("{} (exposure id {id})", v.detail);
        }
    }
}

/// Refuse work over the budget ((exposures + the wide parts' windows) x evaluations x scenario factor).
pub fn check_work(model: &Model, evaluations: f64, factor: f64, limits: &ServiceLimits) -> Result<(), Error> {
    check_work_with(model, part_windows(model, &None), evaluations, factor, limits)
}

/// The windows of a book's wide parts beyond what `work_of` counts for them, per evaluation, in the same
/// units: a binomial group of a count is counted there as 64, but the exact engine convolves its window of
/// counts (up to its size + 1, about 2 sqrt(150 m / 4) wide), and the Poisson part's window (about 2 sqrt(150
/// rate) wide, the rate stressed when a stress raises it) is not counted at all. Two such windows of 10^6 cost
/// one FFT convolution each time a tilted law is built (measured 0.2-0.6 s at 3 x 10^6, about one work unit per
/// step, as a Bernoulli exposure is), which the count of 64 made 20,000 times cheaper than it is.
pub fn part_windows(model: &Model, stress: &Option<Stress>) -> f64 {
    let radius = crate::engine::exact::window::Window::bernstein_radius;
    let mut w = 0.0;
    if !model.weighted() {
        for b in &model.binomials {
            let m = b.size as f64;
            w += ((m + 1.0).min(2.0 * radius(m / 4.0) + 4.0) - 64.0).max(0.0);
        }
    }
    if model.poisson > 0.0 {
        let rate = model.poisson * stress.map_or(1.0, |s| s.factor().max(1.0));
        w += 2.0 * radius(rate) + 4.0;
    }
    w
}

/// `check_work` with `extra` work per evaluation (`part_windows`, for the questions that count them).
pub fn check_work_with(
    model: &Model,
    extra: f64,
    evaluations: f64,
    factor: f64,
    limits: &ServiceLimits,
) -> Result<(), Error> {
    let work = (work_of(model, 1) + extra) * evaluations * factor;
    if work > limits.max_work && model.weighted() {
        // The lattice's share shrinks in proportion to a coarser unit; say how much coarser would fit.
        let lattice = lattice_work(model) * evaluations * factor;
        let room = limits.max_work - (work - lattice);
        let coarser = if room > 0.0 { (lattice / room).ceil().max(2.0) } else { f64::INFINITY };
        let advice = if coarser.is_finite() {
            format!(
                "losses in units about {coarser:.0} times coarser would fit (divide every unit by {coarser:.0} and round: actuaries rebucket amounts this way)"
            )
        } else {
            "the exposures alone exceed it, whatever the unit; split the request".to_string()
        };
        return Err(Error::TooLarge(format!(
            "estimated work {work:.0} (exposures and lattice width {:.0} steps x evaluations x nodes) exceeds the work budget {} (see --max-work); {advice}",
            model.lattice_width(),
            limits.max_work
        )));
    }
    if work > limits.max_work {
        let windows = if extra > 0.0 {
            format!(" and the windows of the groups and the Poisson part, {extra:.0} counts,")
        } else {
            String::new()
        };
        return Err(Error::TooLarge(format!(
            "estimated work {work:.0} (exposures{windows} x evaluations x nodes) exceeds the work budget {} (see --max-work); split the request",
            limits.max_work
        )));
    }
    Ok(())
}

/// The stressed and base laws under the dependence model (their integrations stop once `cancel` is set).
pub fn build(model: Model, stress: Option<Stress>, dep: Option<Dependence>, cancel: &Cancel) -> Laws {
    let dep = dep.unwrap_or(Dependence::Independent {});
    let law = |m: Model| Law::new(m, dep).cancellable(cancel);
    match stress {
        None => Laws { law: law(model), base: None, stress: None },
        Some(s) => {
            let st = stressed(&model, &s);
            Laws { law: law(st), base: Some(law(model)), stress: Some(s) }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The work budget's per-evaluation width bounds the widest window the exact engine builds for a book of a
    /// wide group and a wide Poisson part, at thresholds from the bulk to the far tail, and is within 4 times
    /// of it (a budget far above the real work would refuse what is cheap); without `part_windows` the
    /// estimate (64 per group, 0 for the Poisson part) was below the window it stands for.
    #[test]
    fn part_windows_bound_the_widest_window_built() {
        use crate::engine::exact;
        use crate::engine::numerics::moments::Moments;
        use crate::engine::Side;
        let model = Model::from_parts(&[0.3, 0.7], &[(10_000_000, 0.5)], 5_000_000.0);
        let moments = Moments::of(&model);
        let estimate = work_of(&model, 1) + part_windows(&model, &None);
        assert!(work_of(&model, 1) < 1_000.0, "the count of 64 per group stands for a window of 10^4 and more");
        for k in [10_000_000u64, 10_005_000, 10_020_000, 10_100_000] {
            let (_, work) = exact::evaluate(&model, &moments, &[(k, Side::Upper)]);
            let built = work.max_window as f64;
            assert!(built <= estimate && estimate <= 4.0 * built, "k={k}: window {built}, estimate {estimate}");
        }
        // A stress that raises the Poisson rate widens its window by the square root of its factor.
        let stressed = part_windows(&model, &Some(Stress::ProbabilityFactor(4.0)));
        assert!(stressed > part_windows(&model, &None) && stressed < 2.0 * part_windows(&model, &None) + 1e3);
    }

    /// The constant lines are written as the list of strings they were (the wire form before this type), and
    /// read back as that list.
    #[test]
    fn assumptions_are_written_as_the_constant_list() {
        let text = serde_json::to_string(&assumptions()).unwrap();
        assert_eq!(text, serde_json::to_string(ASSUMPTIONS).unwrap());
        let back: Assumptions = serde_json::from_str(&text).unwrap();
        assert!(back.iter().eq(ASSUMPTIONS.iter().copied()));
        assert_eq!(serde_json::to_value(assumptions()).unwrap(), serde_json::json!(ASSUMPTIONS));
        assert_eq!(serde_json::to_string(&back).unwrap(), text);
    }
}
