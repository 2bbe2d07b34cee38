//! POST /v1/distribution: pmf, cdf and survival function (with their logarithms and bounds) over a count range,
//! given as `from`/`to` or as the central range holding all but `mass`. JSON by default; CSV when the client
//! sends `Accept: text/csv`.

use crate::api::cancel::{off_executor, Cancel};
use crate::api::extract::Body;
use crate::api::problem::Problem;
use crate::api::routes::tail::MAX_POISSON_THRESHOLD;
use crate::api::scenario::{self, ModelOut, Scenario};
use crate::api::types::{Summary, ASSUMPTIONS};
use crate::api::AppState;
use crate::config::ServiceLimits;
use crate::engine::dependence::Dependence;
use crate::engine::distribution::{central_range, table};
use crate::engine::law::{Law, LawValue};
use crate::engine::BoundKind;
use crate::portfolio::stress::Stress;
use crate::portfolio::{PortfolioSpec, Violation};
use axum::extract::State;
use axum::http::{header, HeaderMap, HeaderValue};
use axum::response::{IntoResponse, Response};
use axum::Json;
use serde::{Deserialize, Serialize};
use std::fmt::Write;
use utoipa::ToSchema;

/// Mass left outside the range when neither `from`/`to` nor `mass` is given.
pub const DEFAULT_MASS: f64 = 1e-12;

/// POST /v1/distribution request: `from` and `to` (inclusive), or `mass` (default 1e-12).
#[derive(Debug, Clone, Deserialize, Serialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct DistributionRequest {
    pub portfolio: PortfolioSpec,
    pub from: Option<u64>,
    pub to: Option<u64>,
    /// Probability mass allowed outside the range (half on each side), in (0, 1).
    pub mass: Option<f64>,
    #[serde(default)]
    pub stress: Option<Stress>,
    #[serde(default)]
    pub dependence: Option<Dependence>,
}

/// POST /v1/distribution response (arrays over the counts from..=to).
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct DistributionResponse {
    pub summary: Summary,
    pub model: ModelOut,
    pub from: u64,
    pub to: u64,
    pub pmf: Vec<f64>,
    /// P(S <= k).
    pub cdf: Vec<f64>,
    /// P(S > k).
    pub sf: Vec<f64>,
    /// ln P(S = k) (null where the probability is 0).
    pub ln_pmf: Vec<Option<f64>>,
    pub ln_cdf: Vec<Option<f64>>,
    pub ln_sf: Vec<Option<f64>>,
    /// Bound on |pmf - truth| per count.
    pub pmf_error_bound: Vec<f64>,
    /// Largest error bound of any cdf or sf value.
    pub cdf_sf_max_error_bound: f64,
    pub bound_kind: BoundKind,
    #[serde(skip_serializing_if = "Option::is_none")]
    #[schema(no_recursion)]
    pub base: Option<Box<DistributionResponse>>,
    pub assumptions: Vec<String>,
}

/// The count distribution over a range.
#[utoipa::path(
    post, path = "/v1/distribution", tag = "analytics",
    request_body = DistributionRequest,
    responses(
        (status = 200, description = "pmf, cdf and survival over the range (CSV with `Accept: text/csv`)",
            content((DistributionResponse = "application/json"), (String = "text/csv"))),
        (status = 400, description = "Malformed JSON", body = Problem, content_type = "application/problem+json"),
        (status = 408, description = "Not answered within the request timeout", body = Problem, content_type = "application/problem+json"),
        (status = 413, description = "Body or work over the configured limits", body = Problem, content_type = "application/problem+json"),
        (status = 415, description = "Not JSON", body = Problem, content_type = "application/problem+json"),
        (status = 422, description = "Invalid field, with its JSON pointer", body = Problem, content_type = "application/problem+json"),
        (status = 503, description = "All computing slots busy and the queue full (see Retry-After)", body = Problem, content_type = "application/problem+json"),
    )
)]
pub async fn distribution(
    State(state): State<AppState>,
    headers: HeaderMap,
    Body(req): Body<DistributionRequest>,
) -> Result<Response, Problem> {
    let limits = state.limits.clone();
    let csv = headers
        .get(header::ACCEPT)
        .and_then(|v| v.to_str().ok())
        .is_some_and(|a| a.split(',').any(|m| m.trim().starts_with("text/csv")));
    let out = off_executor(move |cancel| compute_cancellable(&req, &limits, cancel)).await?;
    if csv {
        let mut res = to_csv(&out).into_response();
        res.headers_mut().insert(header::CONTENT_TYPE, HeaderValue::from_static("text/csv; charset=utf-8"));
        return Ok(res);
    }
    Ok(Json(out).into_response())
}

fn opt(x: Option<f64>) -> String {
    x.map(|v| format!("{v:e}")).unwrap_or_default()
}

/// count,pmf,cdf,sf,ln_pmf,ln_cdf,ln_sf,pmf_error_bound; one row per count (the stressed law under stress).
pub fn to_csv(d: &DistributionResponse) -> String {
    let mut s = String::from("count,pmf,cdf,sf,ln_pmf,ln_cdf,ln_sf,pmf_error_bound\n");
    for i in 0..d.pmf.len() {
        let _ = writeln!(
            s,
            "{},{:e},{:e},{:e},{},{},{},{:e}",
            d.from + i as u64,
            d.pmf[i],
            d.cdf[i],
            d.sf[i],
            opt(d.ln_pmf[i]),
            opt(d.ln_cdf[i]),
            opt(d.ln_sf[i]),
            d.pmf_error_bound[i]
        );
    }
    s
}

/// The whole computation, synchronous and free of HTTP (also used by batches and the command line).
pub fn compute(req: &DistributionRequest, limits: &ServiceLimits) -> Result<DistributionResponse, Problem> {
    compute_cancellable(req, limits, &Cancel::never())
}

/// `compute`, giving up with an error once `cancel` is set.
pub fn compute_cancellable(
    req: &DistributionRequest,
    limits: &ServiceLimits,
    cancel: &Cancel,
) -> Result<DistributionResponse, Problem> {
    let mut errs = Vec::new();
    match (req.from, req.to, req.mass) {
        (Some(a), Some(b), None) => {
            if b < a {
                errs.push(Violation::new("/to", format!("must be >= from ({a}), got {b}")));
            } else if b - a >= limits.max_thresholds as u64 {
                errs.push(Violation::new(
                    "/to",
                    format!("the range holds {} counts, over the limit of {}", b - a + 1, limits.max_thresholds),
                ));
            }
        }
        (None, None, Some(m)) => {
            if !(m > 0.0 && m < 1.0) {
                errs.push(Violation::new("/mass", format!("must be strictly between 0 and 1, got {m}")));
            }
        }
        (None, None, None) => {}
        (_, _, Some(_)) => errs.push(Violation::new("/mass", "give either from and to, or mass, not both")),
        (None, _, _) => errs.push(Violation::new("/from", "from and to go together")),
        (_, None, _) => errs.push(Violation::new("/to", "from and to go together")),
    }
    scenario::check(&req.stress, &req.dependence, &mut errs);
    let model = scenario::model(&req.portfolio, &req.stress, limits, errs)?;
    // With a Poisson part the support is unbounded and the exact engine's window grows with the count (the
    // tilted Poisson window is about 25 sqrt(k) long): an explicit range meets the same threshold limit as
    // POST /v1/tail, before any window is built.
    if model.poisson > 0.0 {
        let bad: Vec<Violation> = [("/from", req.from), ("/to", req.to)]
            .into_iter()
            .filter_map(|(at, k)| k.filter(|&k| k > MAX_POISSON_THRESHOLD).map(|k| (at, k)))
            .map(|(at, k)| {
                Violation::new(
                    at,
                    format!("{k} exceeds {MAX_POISSON_THRESHOLD}, the largest count served with a Poisson part"),
                )
            })
            .collect();
        if !bad.is_empty() {
            return Err(Problem::invalid(bad));
        }
    }
    let factor = Scenario::work_factor(&req.stress, &req.dependence);
    // A range of counts costs about one tilted law per 1.5 standard deviations; the pmf cells are cheap.
    scenario::check_work(&model, 64.0, factor, limits)?;
    let sc = scenario::build(model, req.stress, req.dependence);
    cancel.check()?;
    let mut out = answer(req, &sc.law, sc.stress, limits)?;
    if let Some(base) = &sc.base {
        // The table is one engine call; the check goes between the stressed and the base law.
        cancel.check()?;
        out.base = Some(Box::new(answer(req, base, None, limits)?));
    }
    Ok(out)
}

fn answer(
    req: &DistributionRequest,
    law: &Law,
    stress: Option<Stress>,
    limits: &ServiceLimits,
) -> Result<DistributionResponse, Problem> {
    let (from, to) = match (req.from, req.to) {
        (Some(a), Some(b)) => (a, b),
        _ => central_range(law, req.mass.unwrap_or(DEFAULT_MASS)),
    };
    if to - from >= limits.max_thresholds as u64 {
        return Err(Problem::too_large(format!(
            "the range {from}..{to} that holds the requested mass has {} counts, over the limit of {} (see --max-thresholds); ask for a larger mass or an explicit range",
            to - from + 1,
            limits.max_thresholds
        )));
    }
    let t = table(law, from, to);
    let ln = |v: &[LawValue]| v.iter().map(|x| x.ln_value.is_finite().then_some(x.ln_value)).collect::<Vec<_>>();
    let all = t.pmf.iter().chain(&t.cdf).chain(&t.sf);
    let kind =
        if all.clone().all(|v| v.kind == BoundKind::Rigorous) { BoundKind::Rigorous } else { BoundKind::Estimated };
    Ok(DistributionResponse {
        summary: Summary::of_law(law),
        model: Scenario::model_out(law, stress),
        from,
        to,
        pmf: t.pmf.iter().map(|v| v.value).collect(),
        cdf: t.cdf.iter().map(|v| v.value).collect(),
        sf: t.sf.iter().map(|v| v.value).collect(),
        ln_pmf: ln(&t.pmf),
        ln_cdf: ln(&t.cdf),
        ln_sf: ln(&t.sf),
        pmf_error_bound: t.pmf.iter().map(|v| v.abs_err).collect(),
        cdf_sf_max_error_bound: t.cdf.iter().chain(&t.sf).map(|v| v.abs_err).fold(0.0, f64::max),
        bound_kind: kind,
        base: None,
        assumptions: ASSUMPTIONS.iter().map(|s| s.to_string()).collect(),
    })
}
