//! The contributions question: which exposures drive a tail. For threshold k and every listed or generated
//! exposure i: the sensitivity dP(S >= k)/dp_i, the tail without it P(S without i >= k), and its impact
//! p_i x sensitivity; ranked, optionally only the top N. The per-exposure figures come from the exact engine's
//! product tree (`engine::exact::leave_one_out`).
//!
//! Independent exposures: the sensitivity is P(S without i = k - 1) and the impact equals P(S >= k) - P(S
//! without i >= k) (formed as a product, so small impacts keep their accuracy); exposures with p = 0 or 1 are
//! not in the model, and their figures are those of S itself (S or S - 1).
//!
//! Under the one-factor model p_i(z) moves with p_i, so dP/dp_i = E[P(S_{-i} = k - 1 | Z) dp_i(Z)/dp_i], the
//! conditional sensitivity averaged over the law of Z given the exposure's latent variable at its threshold
//! (N(sqrt(rho_i) c_i, 1 - rho_i), c_i = Phi^-1(p_i)), and the tail without i is E[P(S_{-i} >= k | Z)]; both are
//! integrated over the factor with the tree at every Gauss-Kronrod node (`factor`). The impact p_i x
//! sensitivity is then a first-order share, no longer P(S >= k) minus the tail without i. An exposure with
//! p = 0 or 1 and loading 0 is independent of the factor and its figures are those of S (or S - 1) averaged;
//! with a positive loading its derivative is the limit where the factor given its latent variable goes to -inf
//! (p = 0) or +inf (p = 1), taken at the end of the factor's range, +-37.
//!
//! In loss units (and with compound sources) exposure i adds u_i units: independent, dP(S >= k)/dp_i =
//! P(S_{-i} >= k - u_i) - P(S_{-i} >= k), each S_{-i} an exact law on the lattice; under the factor the same
//! difference given Z, averaged as above with dp_i(Z)/dp_i (`factor::Factor::contributions_in_units`), and an
//! impossible or certain exposure's figures are those of S (or S - u_i).

use super::cost::{self, Footprint};
use super::dependence::Dependence;
use super::error::Error;
use super::law::{Law, Summary, ValueOut};
use super::pipeline::{Analytic, Ctx, Inputs};
use super::scenario::{self, assumptions, Assumptions, ModelOut, MAX_UNBOUNDED_COUNT};
use crate::config::ServiceLimits;
use crate::engine::exact::leaf::BLOCK;
use crate::engine::exact::window::Window;
use crate::engine::exact::{self, leave_one_out};
use crate::engine::{Side, Value};
use crate::portfolio::families::{expected_len, listed_loadings, listed_probabilities};
use crate::portfolio::stress::Stress;
use crate::portfolio::{ExposureId, Model, PortfolioSpec, Violation};
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

/// How contributions are ranked (largest first).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Deserialize, Serialize, ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum RankBy {
    /// dP(S >= k)/dp_i.
    #[default]
    Sensitivity,
    /// p_i x sensitivity: how much the tail falls without the exposure.
    Impact,
}

/// POST /v1/contributions request.
#[derive(Debug, Clone, Deserialize, Serialize, ToSchema)]
#[serde(remote = "Self", deny_unknown_fields)]
pub struct ContributionsRequest {
    pub portfolio: PortfolioSpec,
    /// The threshold k of the tail P(S >= k).
    #[schema(example = 12, maximum = 1_000_000_000)]
    pub threshold: u64,
    /// Return only the first `top` after ranking (all by default).
    pub top: Option<usize>,
    #[serde(default)]
    pub rank_by: RankBy,
    #[serde(default)]
    pub stress: Option<Stress>,
    /// Dependence between exposures; under the one-factor model the derivative in p_i also moves p_i(z).
    #[serde(default)]
    pub dependence: Option<Dependence>,
}
crate::portfolio::objects::objects_only!(ContributionsRequest);

#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct ContributionOut {
    /// Position among `probabilities` (table rows after the JSON's), then the members of `families` in order.
    pub index: usize,
    /// The exposure's id (`portfolio.ids`, or the id column of an uploaded table), when it has one.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub id: Option<ExposureId>,
    pub probability: f64,
    /// dP(S >= k)/dp_i (independent exposures: P(S without i = k - 1)).
    pub sensitivity: f64,
    /// P(S without i >= k).
    pub tail_without: f64,
    /// p_i x sensitivity (independent exposures: = P(S >= k) - tail_without).
    pub impact: f64,
    /// The two values with logarithms and error bounds.
    pub detail: ContributionDetail,
}

#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct ContributionDetail {
    pub sensitivity: ValueOut,
    pub tail_without: ValueOut,
}

/// POST /v1/contributions response.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct ContributionsResponse {
    pub summary: Summary,
    pub model: ModelOut,
    pub threshold: u64,
    /// P(S >= threshold).
    pub tail_probability: ValueOut,
    /// Exposures counted (listed and generated); groups and Poisson sources are part of every S without i.
    pub exposures_ranked: usize,
    pub contributions: Vec<ContributionOut>,
    #[serde(skip_serializing_if = "Option::is_none")]
    #[schema(no_recursion)]
    pub base: Option<Box<ContributionsResponse>>,
    #[schema(value_type = Vec<String>)]
    pub assumptions: Assumptions,
}

/// Listed and generated exposures, counted without expanding the families.
fn listed_count(spec: &PortfolioSpec) -> u64 {
    spec.probabilities.len() as u64 + spec.families.iter().map(expected_len).sum::<u64>()
}

/// The listed exposures' loss units in the order of `listed_probabilities` (1 where none is given).
fn listed_units(spec: &PortfolioSpec) -> Vec<u64> {
    let mut out: Vec<u64> = if spec.units.is_empty() { vec![1; spec.probabilities.len()] } else { spec.units.clone() };
    for f in &spec.families {
        out.extend(std::iter::repeat_n(f.units().unwrap_or(1), expected_len(f) as usize));
    }
    out
}

/// Work of the contribution tree in units of one exact evaluation (log2 of the blocks times a full product,
/// plus the per-exposure block sums).
const EVALUATIONS: f64 = 40.0;

pub struct Contributions;

/// Where exposure i's figures are: entry `Each(j)` of the per-exposure list (an exposure in the model), or
/// entry `Fixed(j)` of the impossible-or-certain ones.
#[derive(Clone, Copy)]
enum Slot {
    Each(usize),
    Fixed(usize),
}

impl Contributions {
    /// Rank first, then build only the rows kept (`top`): ranking needs 24 bytes per exposure, a row about
    /// 450. `figures` gives an exposure's (sensitivity, tail without it) from its slot and probability.
    fn respond(
        req: &ContributionsRequest,
        law: &Law,
        stress: Option<Stress>,
        tail: Value,
        listed: &[f64],
        figures: impl Fn(Slot, f64) -> (Value, Value),
    ) -> ContributionsResponse {
        let (mut each, mut fixed) = (0usize, 0usize);
        let mut order: Vec<(f64, usize, Slot)> = listed
            .iter()
            .enumerate()
            .map(|(index, &p)| {
                let slot = if p <= 0.0 || p >= 1.0 {
                    fixed += 1;
                    Slot::Fixed(fixed - 1)
                } else {
                    each += 1;
                    Slot::Each(each - 1)
                };
                let sensitivity = figures(slot, p).0.value;
                let key = match req.rank_by {
                    RankBy::Sensitivity => sensitivity,
                    RankBy::Impact => p * sensitivity,
                };
                (key, index, slot)
            })
            .collect();
        order.sort_by(|a, b| b.0.total_cmp(&a.0).then(a.1.cmp(&b.1)));
        let ranked = order.len();
        order.truncate(req.top.unwrap_or(ranked));
        let rows = order
            .iter()
            .map(|&(_, index, slot)| {
                let p = listed[index];
                let (s, t) = figures(slot, p);
                ContributionOut {
                    index,
                    id: req.portfolio.ids.get(index).cloned().flatten(),
                    probability: p,
                    sensitivity: s.value,
                    tail_without: t.value,
                    impact: p * s.value,
                    detail: ContributionDetail { sensitivity: s.into(), tail_without: t.into() },
                }
            })
            .collect();
        ContributionsResponse {
            summary: Summary::of_law(law),
            model: ModelOut::of(law, stress),
            threshold: req.threshold,
            tail_probability: tail.into(),
            exposures_ranked: ranked,
            contributions: rows,
            base: None,
            assumptions: assumptions(),
        }
    }

    /// The figures of an independent book in units (`leave_one_out::contributions_in_units`): the exact law
    /// without each distinct (p_i, u_i), or for big books on wide lattices one law's samples divided by each
    /// exposure's factor, so the work budget is checked again here with what that costs.
    /// Impossible and certain exposures are not in the model: S without one is S, or S - u_i.
    #[allow(clippy::too_many_arguments)]
    fn in_units(
        req: &ContributionsRequest,
        law: &Law,
        stress: Option<Stress>,
        listed: &[f64],
        model: &Model,
        moments: &crate::engine::numerics::moments::Moments,
        ctx: &Ctx,
    ) -> Result<ContributionsResponse, Error> {
        let k = req.threshold;
        let factor = if stress.is_some() { 2.0 } else { 1.0 };
        let spectral = if leave_one_out::spectrum_may_answer(model, k) {
            scenario::check_work(model, EVALUATIONS + 4.0, factor, ctx.limits)?;
            leave_one_out::contributions_in_units_spectrum(model, k)
        } else {
            None
        };
        let per = match spectral {
            Some(per) => per,
            None => {
                let classes = leave_one_out::classes_in_units(model) as f64;
                scenario::check_work(model, EVALUATIONS + classes, factor, ctx.limits)?;
                leave_one_out::contributions_in_units_by_class(model, k)
            }
        };
        ctx.cancel.check()?;
        let units = listed_units(&req.portfolio);
        let tail = leave_one_out::upper_in_units(model, moments, &[k])[0];
        let fixed: Vec<(Value, Value)> = listed
            .iter()
            .zip(&units)
            .filter(|(&p, _)| p <= 0.0 || p >= 1.0)
            .map(|(&p, &u)| {
                if p <= 0.0 {
                    let t = leave_one_out::upper_in_units(model, moments, &[k.saturating_sub(u)])[0];
                    (leave_one_out::difference(t, tail), tail)
                } else {
                    let t = leave_one_out::upper_in_units(model, moments, &[k.saturating_add(u)])[0];
                    (leave_one_out::difference(tail, t), t)
                }
            })
            .collect();
        Ok(Self::respond(req, law, stress, tail, listed, |slot, _| match slot {
            Slot::Each(j) => (per[j].sensitivity, per[j].tail_without),
            Slot::Fixed(j) => fixed[j],
        }))
    }

    /// The figures under the one-factor model (`factor::Factor::contributions`; in units or with compound
    /// sources `factor::Factor::contributions_in_units`, which evaluates an exact law per distinct (p_i, u_i,
    /// loading) at every node: the work budget is checked again here with their number).
    fn under_factor(
        req: &ContributionsRequest,
        law: &Law,
        stress: Option<Stress>,
        listed: &[f64],
        ctx: &Ctx,
    ) -> Result<ContributionsResponse, Error> {
        let f = law.factor().expect("a law under the factor");
        let loads = listed_loadings(&req.portfolio, f.rho);
        let got = if f.model.weighted() {
            let units = listed_units(&req.portfolio);
            let fixed: Vec<(f64, f64, u64)> = (0..listed.len())
                .filter(|&i| listed[i] <= 0.0 || listed[i] >= 1.0)
                .map(|i| (listed[i], loads[i], units[i]))
                .collect();
            let classes = factor_classes(&f.model, f.rho) as f64;
            // Each impossible or certain exposure of its own size costs up to two integrals over the factor.
            let sizes: std::collections::HashSet<(bool, u64)> = fixed.iter().map(|f| (f.0 > 0.0, f.2)).collect();
            let work = scenario::work_factor(&req.stress, &req.dependence);
            scenario::check_work(&f.model, EVALUATIONS + classes + 2.0 * sizes.len() as f64, work, ctx.limits)?;
            f.contributions_in_units(req.threshold, &fixed)
        } else {
            let fixed: Vec<(f64, f64)> =
                listed.iter().zip(&loads).filter(|(&p, _)| p <= 0.0 || p >= 1.0).map(|(&p, &r)| (p, r)).collect();
            f.contributions(req.threshold, &fixed)
        };
        ctx.cancel.check()?;
        Ok(Self::respond(req, law, stress, got.tail, listed, |slot, _| match slot {
            Slot::Each(j) => got.each[j],
            Slot::Fixed(j) => got.fixed[j],
        }))
    }
}

/// Distinct (p_i, u_i, loading) among the model's Bernoulli exposures: the exact laws without one exposure that
/// `factor::Factor::contributions_in_units` builds at each node (equal triples share their conditional law).
fn factor_classes(model: &Model, rho: f64) -> usize {
    let set: std::collections::HashSet<(u64, u64, u64)> = (0..model.bernoulli.len())
        .map(|j| {
            let r = if model.loaded() { model.loadings[j] } else { rho };
            (model.bernoulli[j].to_bits(), model.units.get(j).copied().unwrap_or(1), r.to_bits())
        })
        .collect();
    set.len()
}

impl Analytic for Contributions {
    type Request = ContributionsRequest;
    type Answer = ContributionsResponse;

    fn inputs(req: &ContributionsRequest) -> Inputs<'_> {
        Inputs { portfolio: &req.portfolio, stress: req.stress, dependence: req.dependence }
    }

    fn check(req: &ContributionsRequest, _limits: &ServiceLimits, errs: &mut Vec<Violation>) {
        if req.threshold > MAX_UNBOUNDED_COUNT {
            errs.push(Violation::new("/threshold", format!("must be at most {MAX_UNBOUNDED_COUNT}")));
        }
    }

    fn check_units(_req: &ContributionsRequest) -> Result<(), Vec<Violation>> {
        // Each exposure's law without it on the lattice, independent or at every node over the factor.
        Ok(())
    }

    fn factor_takes_compound() -> bool {
        true
    }

    fn evaluations(_req: &ContributionsRequest) -> Option<f64> {
        Some(EVALUATIONS)
    }

    /// The leave-one-out tree holds its nodes' windows (the leaves' doubles on each of its levels) and, on
    /// the way down, two complements per level, each as wide as the whole law; then 24 bytes per listed
    /// exposure to rank them, 80 for their figures, and about 450 per row answered.
    fn footprint(req: &ContributionsRequest, model: &Model, _limits: &ServiceLimits) -> Footprint {
        let leaves = cost::exact_window_doubles(model, req.threshold) / 2.0;
        let blocks = (model.bernoulli.len() as f64 / BLOCK as f64).ceil().max(1.0);
        let depth = blocks.log2().ceil() + 1.0;
        let var: f64 = model.bernoulli.iter().map(|p| p * (1.0 - p)).sum::<f64>()
            + model.binomials.iter().map(|b| b.size as f64 * b.p * (1.0 - b.p)).sum::<f64>()
            + model.poisson.max(req.threshold.min(MAX_UNBOUNDED_COUNT) as f64);
        let law = 2.0 * Window::bernstein_radius(var) + 4.0;
        let listed = listed_count(&req.portfolio) as f64;
        Footprint {
            windows: 8.0 * (depth * leaves + 2.0 * depth * law),
            working: 112.0 * listed,
            answer: 450.0 * req.top.map_or(listed, |t| (t as f64).min(listed)),
        }
    }

    fn answer(
        req: &ContributionsRequest,
        law: &Law,
        stress: Option<Stress>,
        ctx: &Ctx,
    ) -> Result<ContributionsResponse, Error> {
        let mut listed = listed_probabilities(&req.portfolio);
        if let Some(s) = stress {
            listed.iter_mut().for_each(|p| *p = s.apply(*p));
        }
        let k = req.threshold;
        let Some((model, moments)) = law.single() else {
            return Self::under_factor(req, law, stress, &listed, ctx);
        };
        if model.weighted() {
            return Self::in_units(req, law, stress, &listed, model, moments, ctx);
        }
        let per = leave_one_out::contributions(model, moments, k);
        // Exposures that are impossible or certain are not in the model: S without them is S, or S - 1.
        let fixed = exact::evaluate(
            model,
            moments,
            &[
                (k, Side::Upper),
                (k.saturating_sub(1), Side::Point),
                (k, Side::Point),
                (k.saturating_add(1), Side::Upper),
            ],
        )
        .0;
        let (tail, point_below, point_at, tail_above) = (fixed[0], fixed[1], fixed[2], fixed[3]);
        let point_below = if k == 0 { Value::certain(0.0) } else { point_below };
        // Exposures that are impossible or certain are not in the model: S without them is S, or S - 1.
        Ok(Self::respond(req, law, stress, tail, &listed, |slot, p| match slot {
            Slot::Each(j) => (per[j].sensitivity, per[j].tail_without),
            Slot::Fixed(_) if p <= 0.0 => (point_below, tail),
            Slot::Fixed(_) => (point_at, tail_above),
        }))
    }

    fn with_base(answer: &mut ContributionsResponse, base: ContributionsResponse) {
        answer.base = Some(Box::new(base));
    }
}
