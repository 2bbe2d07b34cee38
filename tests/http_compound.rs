//! Compound Poisson sources end to end: a textbook-style compound Poisson law and the compound Poisson
//! approximation of a small book over HTTP, against values from the committed script
//! fixtures/reference/make_compound_poisson.py (Panjer 1981 in exact fractions, e^-lambda by mpmath); and the
//! problems: every bad field at its pointer, the factor model on questions that do not take compound sources
//! (422 at the field), a threshold beyond the served range and a lattice too wide for the memory ceiling (4xx,
//! never an allocation).

mod common;
use common::{assert_problem, start};
use serde_json::{json, Value};

fn reference() -> Value {
    serde_json::from_str(include_str!("../fixtures/reference/compound_poisson.json")).unwrap()
}

fn f(v: &Value) -> f64 {
    v.as_f64().unwrap()
}

#[tokio::test]
async fn a_textbook_compound_poisson_law_matches_the_script() {
    let s = start(&[]).await;
    let r = &reference()["textbook"];
    let portfolio = json!({"compound_sources": [{"rate": r["rate"], "severity": {"kind": "listed",
        "sizes": r["sizes"], "probabilities": r["probabilities"]}}]});
    let ks: Vec<u64> = (0..41).collect();
    for (side, key) in [("point", "pmf"), ("upper", "upper")] {
        let q = json!({"portfolio": portfolio, "thresholds": ks, "side": side, "methods": ["exact", "normal"]});
        let (st, ct, body) = s.post_json("/v1/tail", &q).await;
        assert_eq!((st, ct.as_str()), (200, "application/json"), "{body}");
        for (res, want) in body["results"].as_array().unwrap().iter().zip(r[key].as_array().unwrap()) {
            let (e, want) = (&res["estimates"][0], f(want));
            let got = f(&e["probability"]);
            // The script's values (make_compound_poisson.py) are the law of the f64 inputs to 30 digits.
            assert!((got - want).abs() <= 1e-12 * want, "{side} k={}: {got} vs {want}", res["threshold"]);
            assert!((got - want).abs() <= f(&e["error_bound"]) + 1e-16 * want, "{side} k={}", res["threshold"]);
            let n = &res["estimates"][1];
            assert!(
                (f(&n["probability"]) - want).abs() <= f(&n["error_bound"]),
                "normal {side} k={}",
                res["threshold"]
            );
        }
        // Mean lambda E[X] = 3 (1/2 + 2/3 + 1/2) = 5; the support is unbounded.
        assert!((f(&body["summary"]["mean"]) - 5.0).abs() < 1e-12, "{}", body["summary"]);
    }
    s.shutdown().await.unwrap();
}

#[tokio::test]
async fn the_compound_poisson_approximation_matches_the_script_within_le_cam() {
    let s = start(&[]).await;
    let r = &reference()["approximation"];
    let g = &r["group"];
    let portfolio = json!({"probabilities": r["probabilities"], "units": r["units"],
        "groups": [{"size": g["size"], "probability": g["probability"], "units": g["units"]}],
        "compound_sources": [{"rate": r["source"]["rate"], "severity": {"kind": "listed",
            "sizes": r["source"]["sizes"], "probabilities": r["source"]["probabilities"]}}]});
    let q = json!({"portfolio": portfolio, "thresholds": r["thresholds"], "methods": ["exact", "poisson"]});
    let (st, _, body) = s.post_json("/v1/tail", &q).await;
    assert_eq!(st, 200, "{body}");
    let le_cam = f(&r["le_cam"]);
    let results = body["results"].as_array().unwrap();
    let pairs = r["approximation_upper"].as_array().unwrap().iter().zip(r["exact_upper"].as_array().unwrap());
    for (res, (approx, truth)) in results.iter().zip(pairs) {
        let (x, a) = (&res["estimates"][0], &res["estimates"][1]);
        let (approx, truth, k) = (f(approx), f(truth), &res["threshold"]);
        // Exact: the book's own law (enumeration and Panjer in the script).
        assert!((f(&x["probability"]) - truth).abs() <= 1e-12 * truth, "exact k={k}: {x} vs {truth}");
        // The approximation's value: the all-Poisson law of the script.
        assert_eq!(a["method"], "poisson");
        assert_eq!(a["bound_kind"], "rigorous");
        assert!((f(&a["probability"]) - approx).abs() <= 1e-12 * approx, "poisson k={k}: {a} vs {approx}");
        // Its bound: Le Cam's sum p^2 (+ m p^2) plus the engine's, and it covers the distance to the truth.
        let bound = f(&a["error_bound"]);
        if k.as_u64().unwrap() > 0 {
            assert!(bound >= le_cam && bound <= le_cam * 1.001 + 1e-12, "k={k}: bound {bound}, Le Cam {le_cam}");
        }
        assert!((approx - truth).abs() <= bound, "k={k}: |{approx} - {truth}| over {bound}");
    }
    s.shutdown().await.unwrap();
}

#[tokio::test]
async fn bad_compound_sources_get_problems_at_their_fields() {
    let s = start(&[]).await;
    let bad = json!({"portfolio": {"compound_sources": [
        {"rate": -1.0, "severity": {"kind": "listed", "sizes": [0, 3], "probabilities": [0.5, 0.6]}},
        {"rate": 1.0, "severity": {"kind": "listed", "sizes": [2], "probabilities": [0.5, 0.5]}},
        {"rate": 1.0, "severity": {"kind": "geometric", "first": 5, "step": 0, "largest": 3, "ratio": 1.5}},
        {"rate": 1.0, "severity": {"kind": "listed", "sizes": [], "probabilities": []}},
        {"rate": 1.0, "severity": {"kind": "listed", "sizes": [1], "probabilities": [-0.5]}}]}, "thresholds": [1]});
    let (st, ct, body) = s.post_json("/v1/tail", &bad).await;
    for at in [
        "/portfolio/compound_sources/0/rate",
        "/portfolio/compound_sources/0/severity/sizes/0",
        "/portfolio/compound_sources/0/severity/probabilities",
        "/portfolio/compound_sources/1/severity/probabilities",
        "/portfolio/compound_sources/2/severity/step",
        "/portfolio/compound_sources/2/severity/largest",
        "/portfolio/compound_sources/2/severity/ratio",
        "/portfolio/compound_sources/3/severity/sizes",
        "/portfolio/compound_sources/4/severity/probabilities/0",
    ] {
        assert_problem(st, &ct, &body, 422, Some(at));
    }
    // A total rate over the limit, and a severity generating too many sizes: refused before anything is built.
    let q = json!({"portfolio": {"poisson_rates": [6e8], "compound_sources": [{"rate": 6e8, "severity":
        {"kind": "geometric", "first": 1, "step": 1, "largest": 1000000000, "ratio": 0.5}}]}, "thresholds": [1]});
    let (st, ct, body) = s.post_json("/v1/tail", &q).await;
    assert_problem(st, &ct, &body, 422, Some("/portfolio/poisson_rates"));
    assert_problem(st, &ct, &body, 422, Some("/portfolio/compound_sources/0/severity"));
    // An unknown field of a source.
    let q = json!({"portfolio": {"compound_sources": [{"rate": 1.0, "frequency": 2,
        "severity": {"kind": "listed", "sizes": [1], "probabilities": [1.0]}}]}, "thresholds": [1]});
    let (st, _, _) = s.post_json("/v1/tail", &q).await;
    assert_eq!(st, 422);
    s.shutdown().await.unwrap();
}

#[tokio::test]
async fn what_does_not_take_compound_sources_says_so_and_large_ones_are_refused() {
    let s = start(&[]).await;
    let portfolio = json!({"probabilities": [0.1], "compound_sources": [{"rate": 2.0,
        "severity": {"kind": "geometric", "first": 2, "step": 2, "largest": 20, "ratio": 0.7}}]});
    // The median in units answers on the lattice (span 1 here), and agrees with the lower tails around it.
    let (st, _, body) = s.post_json("/v1/quantiles", &json!({"portfolio": portfolio, "levels": [0.5]})).await;
    assert_eq!(st, 200, "{body}");
    let q = body["quantiles"][0]["count"].as_u64().unwrap();
    let lower = json!({"portfolio": portfolio, "thresholds": [q - 1, q], "side": "lower"});
    let (st, _, tails) = s.post_json("/v1/tail", &lower).await;
    assert_eq!(st, 200, "{tails}");
    let cdf = |i: usize| tails["results"][i]["estimates"][0]["probability"].as_f64().unwrap();
    assert!(cdf(0) < 0.5 && cdf(1) >= 0.5, "{body} {tails}");
    // The factor model takes compound sources on /v1/tail (tests/factor_compound.rs checks its values) and on
    // quantiles (tests/factor_mixed.rs) and contributions (tests/factor_contributions.rs).
    let factor = json!({"model": "one_factor_gaussian", "rho": 0.2});
    let q = json!({"portfolio": portfolio, "thresholds": [10], "dependence": factor});
    let (st, _, body) = s.post_json("/v1/tail", &q).await;
    assert_eq!(st, 200, "{body}");
    let q = json!({"portfolio": portfolio, "levels": [0.5], "dependence": factor});
    let (st, _, body) = s.post_json("/v1/quantiles", &q).await;
    assert_eq!(st, 200, "{body}");
    let q = json!({"portfolio": portfolio, "threshold": 10, "dependence": factor});
    let (st, _, body) = s.post_json("/v1/contributions", &q).await;
    assert_eq!(st, 200, "{body}");
    // Every method takes compound sources (tests/units_methods.rs measures the estimated bounds there).
    let q = json!({"portfolio": portfolio, "thresholds": [10], "methods": ["exact", "saddlepoint", "edgeworth"]});
    let (st, _, body) = s.post_json("/v1/tail", &q).await;
    assert_eq!(st, 200, "{body}");
    // A threshold beyond the served range of an unbounded law.
    let q = json!({"portfolio": portfolio, "thresholds": [10, 2000000000u64]});
    let (st, ct, body) = s.post_json("/v1/tail", &q).await;
    assert_problem(st, &ct, &body, 422, Some("/thresholds/1"));
    // Sizes of a billion units beside single units: a lattice far too wide to hold, refused with a 413.
    let wide = json!({"portfolio": {"probabilities": [0.5], "compound_sources": [{"rate": 1.0,
        "severity": {"kind": "listed", "sizes": [1000000000u64], "probabilities": [1.0]}}]}, "thresholds": [900000000]});
    let (st, ct, body) = s.post_json("/v1/tail", &wide).await;
    assert_problem(st, &ct, &body, 413, None);
    // The stressed rate counts the compound sources too.
    let q = json!({"portfolio": {"compound_sources": [{"rate": 6e8, "severity": {"kind": "listed", "sizes": [2],
        "probabilities": [1.0]}}]}, "thresholds": [1], "stress": {"probability_factor": 2.0}});
    let (st, ct, body) = s.post_json("/v1/tail", &q).await;
    assert_problem(st, &ct, &body, 422, Some("/stress/probability_factor"));
    s.shutdown().await.unwrap();
}

#[tokio::test]
async fn the_approximations_wider_model_is_counted_in_the_memory_ceiling() {
    let s = start(&["--max-request-memory", "50000000"]).await;
    // Forty exposures of distinct units near a thousand: the book's lattice is 41,000 steps, but each
    // exposure's Poisson part in the approximation spans about fifty events of a thousand steps.
    let units: Vec<u64> = (0..40).map(|i| 1000 + i).collect();
    let portfolio = json!({"probabilities": vec![0.01; 40], "units": units});
    let q = json!({"portfolio": portfolio, "thresholds": [2000], "methods": ["exact"]});
    let (st, _, body) = s.post_json("/v1/tail", &q).await;
    assert_eq!(st, 200, "{body}");
    let q = json!({"portfolio": portfolio, "thresholds": [2000], "methods": ["exact", "poisson"]});
    let (st, ct, body) = s.post_json("/v1/tail", &q).await;
    assert_problem(st, &ct, &body, 413, None);
    s.shutdown().await.unwrap();
}
