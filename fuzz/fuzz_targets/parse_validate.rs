//! Fuzz target: arbitrary bytes through the request parser (`api::extract::parse`, the JSON extractor's
//! core) and, when they parse, through portfolio validation (`build_model`). Neither may panic; a model that
//! validation accepts must keep the invariants the engine relies on.

#![no_main]

use libfuzzer_sys::fuzz_target;
use tailtally::api::types::TailRequest;
use tailtally::portfolio::{validate::build_model, Limits};

fuzz_target!(|data: &[u8]| {
    let Ok(req) = tailtally::api::extract::parse::<TailRequest>(data) else { return };
    // Small limits keep each input fast; the rules checked are the same at any size.
    let limits = Limits { max_listed_exposures: 10_000, max_total_exposures: 1 << 40, max_poisson_rate: 1e6 };
    let Ok(model) = build_model(&req.portfolio, "/portfolio", &limits) else { return };
    assert!(model.bernoulli.iter().all(|&p| p > 0.0 && p < 1.0), "Bernoulli p outside (0, 1)");
    assert!(model.binomials.iter().all(|b| b.size >= 1 && b.p > 0.0 && b.p < 1.0), "bad binomial part");
    assert!(model.poisson.is_finite() && model.poisson >= 0.0 && model.poisson <= 1e6, "bad Poisson rate");
    assert!(model.bernoulli.len() as u64 <= limits.max_listed_exposures, "listed limit not enforced");
    assert!(model.exposures <= limits.max_total_exposures, "total limit not enforced");
    assert!(model.shift + model.bernoulli.len() as u64 <= model.exposures, "exposures undercounted");
});
