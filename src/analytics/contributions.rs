//! The contributions question: which exposures drive a tail. For threshold k and every listed or generated
//! exposure i: the sensitivity dP(S >= k)/dp_i = P(S without i = k - 1), the tail without it, and its impact
//! p_i x sensitivity = P(S >= k) - P(S without i >= k) (formed as a product, so small impacts keep their
//! accuracy); ranked, optionally only the top N. The per-exposure figures come from the exact engine's
//! product tree (`engine::exact::leave_one_out`); exposures with p = 0 or 1 are not in the model, and their
//! figures are those of S itself.

use super::dependence::Dependence;
use super::error::Error;
use super::law::{Law, Summary, ValueOut};
use super::pipeline::{Analytic, Ctx, Inputs};
use super::scenario::{assumptions, ModelOut, MAX_UNBOUNDED_COUNT};
use crate::config::ServiceLimits;
use crate::engine::exact::{self, leave_one_out};
use crate::engine::{Side, Value};
use crate::portfolio::families::listed_probabilities;
use crate::portfolio::stress::Stress;
use crate::portfolio::{ExposureId, PortfolioSpec, Violation};
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
#[serde(deny_unknown_fields)]
pub struct ContributionsRequest {
    pub portfolio: PortfolioSpec,
    /// The threshold k of the tail P(S >= k).
    #[schema(example = 12)]
    pub threshold: u64,
    /// Return only the first `top` after ranking (all by default).
    pub top: Option<usize>,
    #[serde(default)]
    pub rank_by: RankBy,
    #[serde(default)]
    pub stress: Option<Stress>,
    /// Only `independent` is served here: under a common factor the derivative in p_i also moves p_i(z).
    #[serde(default)]
    pub dependence: Option<Dependence>,
}

#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct ContributionOut {
    /// Position among `probabilities` (table rows after the JSON's), then the members of `families` in order.
    pub index: usize,
    /// The exposure's id (`portfolio.ids`, or the id column of an uploaded table), when it has one.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub id: Option<ExposureId>,
    pub probability: f64,
    /// dP(S >= k)/dp_i = P(S without i = k - 1).
    pub sensitivity: f64,
    /// P(S without i >= k).
    pub tail_without: f64,
    /// p_i x sensitivity = P(S >= k) - tail_without.
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
    pub assumptions: Vec<String>,
}

/// Work of the contribution tree in units of one exact evaluation (log2 of the blocks times a full product,
/// plus the per-exposure block sums).
const EVALUATIONS: f64 = 40.0;

pub struct Contributions;

impl Analytic for Contributions {
    type Request = ContributionsRequest;
    type Answer = ContributionsResponse;

    /// The dependence field is refused in `check`, so the scenario is always independent.
    fn inputs(req: &ContributionsRequest) -> Inputs<'_> {
        Inputs { portfolio: &req.portfolio, stress: req.stress, dependence: None }
    }

    fn check(req: &ContributionsRequest, _limits: &ServiceLimits, errs: &mut Vec<Violation>) {
        if matches!(req.dependence, Some(Dependence::OneFactorGaussian { .. })) {
            errs.push(Violation::new(
                "/dependence",
                "contributions are served for independent exposures only (under a common factor the derivative in p_i also moves every conditional p_i(z))",
            ));
        }
        if req.threshold > MAX_UNBOUNDED_COUNT {
            errs.push(Violation::new("/threshold", format!("must be at most {MAX_UNBOUNDED_COUNT}")));
        }
    }

    fn evaluations(_req: &ContributionsRequest) -> Option<f64> {
        Some(EVALUATIONS)
    }

    fn answer(
        req: &ContributionsRequest,
        law: &Law,
        stress: Option<Stress>,
        _ctx: &Ctx,
    ) -> Result<ContributionsResponse, Error> {
        let (model, moments) = law.single().expect("contributions are asked of an independent law");
        let mut listed = listed_probabilities(&req.portfolio);
        if let Some(s) = stress {
            listed.iter_mut().for_each(|p| *p = s.apply(*p));
        }
        let k = req.threshold;
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
        let mut next = 0;
        let mut rows: Vec<ContributionOut> = listed
            .iter()
            .enumerate()
            .map(|(index, &p)| {
                let (s, t) = if p <= 0.0 {
                    (point_below, tail)
                } else if p >= 1.0 {
                    (point_at, tail_above)
                } else {
                    let c = per[next];
                    next += 1;
                    (c.sensitivity, c.tail_without)
                };
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
        let key = |c: &ContributionOut| match req.rank_by {
            RankBy::Sensitivity => c.sensitivity,
            RankBy::Impact => c.impact,
        };
        rows.sort_by(|a, b| key(b).total_cmp(&key(a)).then(a.index.cmp(&b.index)));
        let ranked = rows.len();
        if let Some(n) = req.top {
            rows.truncate(n);
        }
        Ok(ContributionsResponse {
            summary: Summary::of_law(law),
            model: ModelOut::of(law, stress),
            threshold: k,
            tail_probability: tail.into(),
            exposures_ranked: ranked,
            contributions: rows,
            base: None,
            assumptions: assumptions(),
        })
    }

    fn with_base(answer: &mut ContributionsResponse, base: ContributionsResponse) {
        answer.base = Some(Box::new(base));
    }
}
