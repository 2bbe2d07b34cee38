//! The memory a question will hold, estimated from the validated model before anything is built, so that a
//! request over the per-request ceiling (`--max-request-memory`) is refused with a 413 that names the part
//! too large, rather than exhausting the machine.
//!
//! The estimates are upper bounds of the engine's allocations, not measurements: each window of the exact
//! engine is at most its Bernstein range long (`engine::exact::window`), a binomial group's tilted variance
//! is at most size/4, a Poisson part's tilted mean is at most the largest count asked (or its rate), and
//! smallest-first merging holds at most as many doubles in products as in the leaves. The model itself is
//! not counted: it is already held, and bounded by the portfolio limits and the body limit.
//!
//! Also here: `inline_work`, a bound on a question's CPU cost read from the request alone, by which the API
//! answers small questions on the async worker rather than handing them to the blocking pool.

use super::dependence::Dependence;
use super::error::Error;
use super::pipeline::Analytic;
use crate::engine::exact::leaf::BLOCK;
use crate::engine::exact::window::Window;
use crate::portfolio::families::expected_len;
use crate::portfolio::Model;

const MIB: f64 = (1u64 << 20) as f64;

/// Bytes a question will hold, by part.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Footprint {
    /// The exact engine's windows (leaves and products) alive at once.
    pub windows: f64,
    /// What the question keeps besides (per-exposure figures, the factor model's components).
    pub working: f64,
    /// The answer, as structures and as JSON.
    pub answer: f64,
}

impl Footprint {
    pub fn total(&self) -> f64 {
        self.windows + self.working + self.answer
    }
}

/// Doubles held by the exact engine's windows for one tilted law of `model`, where `top` is the largest
/// count the question asks about.
pub fn exact_window_doubles(model: &Model, top: u64) -> f64 {
    if model.weighted() {
        // Losses in units: leaves as wide as their members' steps (block widths plus one each), groups'
        // count windows spread over their step, products no wider in all than the leaves.
        let blocks = (model.bernoulli.len() as f64 / BLOCK as f64).ceil();
        let mut d = blocks + super::scenario::lattice_work(model);
        d += super::scenario::compound_width(model, top / model.span());
        if model.poisson > 0.0 {
            let mu = model.poisson.max(top.min(super::scenario::MAX_UNBOUNDED_COUNT) as f64);
            d += 2.0 * Window::bernstein_radius_step(mu, 1.0) + 4.0;
        }
        return 2.0 * d;
    }
    let blocks = (model.bernoulli.len() as f64 / BLOCK as f64).ceil();
    let mut d = blocks * (BLOCK as f64 + 1.0);
    for b in &model.binomials {
        d += ((b.size as f64) + 1.0).min(2.0 * Window::bernstein_radius(b.size as f64 / 4.0) + 4.0);
    }
    if model.poisson > 0.0 {
        let mu = model.poisson.max(top.min(super::scenario::MAX_UNBOUNDED_COUNT) as f64);
        d += 2.0 * Window::bernstein_radius(mu) + 4.0;
    }
    // Leaves, plus the products of the merge (never wider in all than the leaves they came from).
    2.0 * d
}

/// Bytes the law mixed over the factor holds (`factor::MixedLaw`) on a book in units: its pmf, errors and
/// both running sums, and one panel's three sums and fifteen node laws, each at most as wide as one tilted law's
/// windows (`exact_window_doubles`, which counts leaves and products); 0 when the question does not mix.
pub fn mixed_law_bytes(model: &Model, top: u64, dep: &Option<Dependence>) -> f64 {
    if !model.weighted() || dep.as_ref().and_then(|d| d.rho()).is_none() {
        return 0.0;
    }
    8.0 * (6.0 + 3.0 + 15.0) * exact_window_doubles(model, top)
}

/// Bytes of the model's own parts (what the factor model copies per node).
pub fn model_bytes(model: &Model) -> f64 {
    8.0 * model.bernoulli.len() as f64 + 16.0 * model.binomials.len() as f64 + 64.0
}

/// The footprint under the scenario: the factor model keeps one conditional model per node of both rules
/// and evaluates on every core at once; a stress keeps the base law and answers twice.
pub fn under_scenario(mut f: Footprint, model: &Model, stressed: bool, dep: &Option<Dependence>) -> Footprint {
    let laws = if stressed { 2.0 } else { 1.0 };
    if let Some(Dependence::OneFactorGaussian { .. }) = dep {
        // The factor integration builds one conditional model per worker thread at a time (built, evaluated,
        // dropped), each with its own exact windows; the law keeps its loadings and profile beside the model.
        let cores = std::thread::available_parallelism().map_or(1, |n| n.get()) as f64;
        f.working += laws * (cores + 1.0) * model_bytes(model);
        f.windows *= cores;
    }
    if stressed {
        f.working += model_bytes(model);
        f.answer *= 2.0;
    }
    f
}

/// Largest work (`inline_work`) answered on the async worker instead of the blocking pool. Measured by
/// examples/inline_crossover (one run, idle 2-core machine): an empty hand-off round trip takes about 8 us;
/// a tail question at 2 thresholds takes 15 us at 100 exposures (work 200), 49 us at 300 (600) and 175 us
/// at 1,000 (2,000). Under many small requests the hand-offs' wake-ups and switches were 45% of the
/// server's CPU. At this budget an inline question holds its worker for under about 0.1 ms.
pub const INLINE_WORK: f64 = 1_000.0;

/// A bound on a question's cost taken from the request alone, before any model is built or any memory sized
/// (units: exposures x evaluations): `None` where that cannot be told cheaply or may be large (a dependence
/// model, an unknown number of evaluations, large binomial groups or Poisson parts, values not yet checked).
pub fn inline_work<A: Analytic>(req: &A::Request) -> Option<f64> {
    let inputs = A::inputs(req);
    if inputs.dependence.as_ref().is_some_and(|d| d.rho().is_some()) || !A::may_inline(req) {
        return None;
    }
    let evaluations = A::evaluations(req)?;
    let spec = inputs.portfolio;
    let mut exposures = spec.probabilities.len() as f64;
    for f in &spec.families {
        exposures += expected_len(f) as f64;
    }
    for g in &spec.groups {
        // A group's leaf is as wide as its law: bounded by its size.
        if g.size > 10_000 {
            return None;
        }
        exposures += g.size as f64;
    }
    let rate: f64 = spec.poisson_rates.iter().sum();
    // Compound sources' windows grow with their sizes: never inline.
    if !(0.0..=1_000.0).contains(&rate) || !spec.compound_sources.is_empty() {
        return None;
    }
    exposures += rate;
    let laws = if inputs.stress.is_some() { 2.0 } else { 1.0 };
    Some(laws * exposures.max(1.0) * evaluations.max(1.0))
}

/// Refuse a footprint over the ceiling, naming its parts.
pub fn check(f: &Footprint, max_bytes: f64) -> Result<(), Error> {
    if f.total() <= max_bytes {
        return Ok(());
    }
    Err(Error::TooLarge(format!(
        "the request would hold about {:.0} MiB (exact windows {:.0} MiB, working data {:.0} MiB, answer {:.0} MiB), over the per-request memory ceiling of {:.0} MiB (see --max-request-memory); ask for fewer figures (e.g. `top` on contributions), a looser dependence tolerance, or split the portfolio's groups into fewer distinct ones",
        f.total() / MIB,
        f.windows / MIB,
        f.working / MIB,
        f.answer / MIB,
        max_bytes / MIB
    )))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::exact;
    use crate::engine::numerics::moments::Moments;
    use crate::engine::Side;

    /// The estimate bounds what the engine builds: the widest window of a tilted law is within it, for
    /// Bernoulli blocks, binomial groups and a Poisson part, at thresholds from the bulk to far tails.
    #[test]
    fn window_estimate_bounds_the_widest_window_built() {
        let ps: Vec<f64> = (0..5000).map(|i| 0.001 + 0.2 * ((i * 7 % 13) as f64 / 13.0)).collect();
        let groups = [(500u64, 0.5), (100_000, 0.01), (7, 0.9)];
        let model = Model::from_parts(&ps, &groups, 40.0);
        let moments = Moments::of(&model);
        for k in [100u64, 1500, 3000, 20_000] {
            let (_, work) = exact::evaluate(&model, &moments, &[(k, Side::Upper)]);
            let est = exact_window_doubles(&model, k);
            assert!((work.max_window as f64) <= est, "k={k}: window {} > estimate {est}", work.max_window);
        }
    }
}
