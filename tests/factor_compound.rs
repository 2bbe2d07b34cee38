//! The one-factor Gaussian model beside compound Poisson sources (POST /v1/tail's pipeline with `dependence`
//! and `compound_sources`), against an independent reference: a homogeneous group of m exposures of u units
//! beside one compound source (independent of the factor) has, given Z = z, the law of u Binomial(m, p(z))
//! convolved with the compound Poisson law, whose pmf is Panjer's recursion (Panjer 1981, "Recursive evaluation
//! of a family of compound distributions", ASTIN Bulletin 12). fixtures/reference/factor_compound.json holds
//! P(S >= k) integrated against phi(z) by mpmath at 40 digits (fixtures/reference/make_factor_compound.py: two
//! quadrature rules agreeing to 1e-38), so the only allowance beside the bound is the rounding of the stored
//! double (1e-15 relative). Every exact value must lie within its reported bound (kind `estimated`, as every
//! figure under the factor) and within the default tolerance, and normal's rigorous bound must cover its own
//! error.

use serde_json::{json, Value};
use tailtally::analytics::cancel::Cancel;
use tailtally::analytics::tail::{Tail, TailRequest, TailResponse};
use tailtally::config::{Options, ServiceLimits};
use tailtally::engine::BoundKind;

fn tail(req: Value) -> TailResponse {
    let req: TailRequest = serde_json::from_value(req).unwrap();
    let limits = ServiceLimits::from_options(&Options::default());
    tailtally::analytics::run::<Tail>(&req, &limits, &Cancel::never()).expect("an answer")
}

/// The cases and their reference tails, as fixtures/reference/make_factor_compound.py wrote them.
fn cases() -> Vec<Value> {
    let path = concat!(env!("CARGO_MANIFEST_DIR"), "/fixtures/reference/factor_compound.json");
    let doc: Value = serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
    assert!(doc["source"].as_str().unwrap().contains("mpmath"));
    doc["cases"].as_array().unwrap().clone()
}

#[test]
fn a_group_beside_a_compound_source_matches_a_quadrature_of_panjers_recursion() {
    let cases = cases();
    assert_eq!(cases.len(), 3);
    let (mut checked, mut worst) = (0, 0.0f64);
    for c in &cases {
        let want: Vec<f64> = c["values"].as_array().unwrap().iter().map(|v| v["upper"].as_f64().unwrap()).collect();
        let r = tail(json!({
            "portfolio": {"groups": [{"size": c["m"], "probability": c["p"], "units": c["u"]}],
                          "compound_sources": [{"rate": c["rate"], "severity": {"kind": "listed",
                              "sizes": c["sizes"], "probabilities": c["probs"]}}]},
            "thresholds": c["ks"],
            "methods": ["exact", "normal"],
            "dependence": {"model": "one_factor_gaussian", "rho": c["rho"]},
        }));
        assert_eq!(r.results.len(), want.len());
        for (res, &truth) in r.results.iter().zip(&want) {
            let e = &res.estimates[0];
            let what = format!("m={} rate={} rho={} k={}", c["m"], c["rate"], c["rho"], res.threshold);
            assert_eq!(e.bound_kind, BoundKind::Estimated, "{what}");
            let miss = (e.probability - truth).abs();
            worst = worst.max(miss / truth);
            assert!(
                miss <= e.error_bound + 1e-15 * truth,
                "{what}: {} vs {truth} (bound {})",
                e.probability,
                e.error_bound
            );
            // The default tolerance: relative 1e-7 with a small absolute floor.
            assert!(miss <= 1e-6 * truth + 1e-12, "{what}: {} vs {truth}", e.probability);
            let n = &res.estimates[1];
            assert!(
                (n.probability - truth).abs() <= n.error_bound,
                "{what}: normal {} vs {truth}: {n:?}",
                n.probability
            );
            checked += 1;
        }
        // The summary's mean: m p u + rate E[size] (the factor leaves the mean unchanged).
        let f = |key: &str| c[key].as_f64().unwrap();
        let list = |key: &str| -> Vec<f64> { c[key].as_array().unwrap().iter().map(|v| v.as_f64().unwrap()).collect() };
        let es: f64 = list("sizes").iter().zip(list("probs")).map(|(s, q)| s * q).sum();
        let mean = f("m") * f("p") * f("u") + f("rate") * es;
        assert!((r.summary.mean - mean).abs() <= 1e-9 * mean, "{:?}", r.summary);
    }
    eprintln!("worst relative error of exact against mpmath: {worst:.2e}");
    assert_eq!(checked, 19);
}
