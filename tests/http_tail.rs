//! POST /v1/tail end to end: the real server on a free port, called as a client would.

mod common;
use common::{assert_problem, start};
use serde_json::{json, Value};

#[tokio::test]
async fn demo_request_answers_with_bounds_and_summary() {
    let s = start(&[]).await;
    let body: Value = serde_json::from_str(&std::fs::read_to_string("fixtures/demo-tail.json").unwrap()).unwrap();
    let (status, ct, v) = s.post_json("/v1/tail", &body).await;
    assert_eq!(status, 200, "{v}");
    assert!(ct.starts_with("application/json"));
    assert_eq!(v["summary"]["exposures"], 2400 + 18000);
    assert_eq!(v["results"].as_array().unwrap().len(), 4);
    let mut last = 1.0;
    for r in v["results"].as_array().unwrap() {
        let e = &r["estimates"][0];
        assert_eq!(e["method"], "exact");
        assert_eq!(e["bound_kind"], "rigorous");
        let p = e["probability"].as_f64().unwrap();
        assert!(p < last, "upper tails decrease with the threshold");
        last = p;
        assert!((e["ln_probability"].as_f64().unwrap() - p.ln()).abs() < 1e-12);
        assert!(e["error_bound"].as_f64().unwrap() <= 1e-9 * p);
        let iv = e["interval"].as_array().unwrap();
        assert!(iv[0].as_f64().unwrap() <= p && p <= iv[1].as_f64().unwrap());
    }
    assert!(v["assumptions"][0].as_str().unwrap().contains("independent"));
}

#[tokio::test]
async fn far_tail_below_f64_range_keeps_its_logarithm() {
    let s = start(&[]).await;
    // 400 exposures with p = 0.01: P(S = 400) = 0.01^400 = 1e-800 exactly.
    let body = json!({"portfolio": {"families": [{"kind": "constant", "n": 400, "probability": 0.01}]}, "thresholds": [400], "side": "point"});
    let (status, _, v) = s.post_json("/v1/tail", &body).await;
    assert_eq!(status, 200, "{v}");
    let e = &v["results"][0]["estimates"][0];
    assert_eq!(e["probability"], 0.0);
    let ln = e["ln_probability"].as_f64().unwrap();
    let truth = 400.0 * 0.01f64.ln();
    assert!((ln - truth).abs() < 1e-12 * truth.abs(), "{ln} vs {truth}");
}

#[tokio::test]
async fn thresholds_outside_the_support_are_exact() {
    let s = start(&[]).await;
    let body = json!({"portfolio": {"probabilities": [0.5, 1.0, 0.0, 0.25]}, "thresholds": [0, 1, 3, 4, 9]});
    let (status, _, v) = s.post_json("/v1/tail", &body).await;
    assert_eq!(status, 200, "{v}");
    let p: Vec<f64> =
        v["results"].as_array().unwrap().iter().map(|r| r["estimates"][0]["probability"].as_f64().unwrap()).collect();
    // S = 1 + B(0.5) + B(0.25): support {1, 2, 3}. Outside it (and at its lower end) the answers are exact.
    assert_eq!([p[0], p[1], p[3], p[4]], [1.0, 1.0, 0.0, 0.0]);
    // Inside, P(S >= 3) = 0.5 * 0.25 = 0.125 within the stated bound.
    let bound = v["results"][2]["estimates"][0]["error_bound"].as_f64().unwrap();
    assert!((p[2] - 0.125).abs() <= bound && bound < 1e-14, "{} +- {bound}", p[2]);
    assert_eq!(v["summary"]["support_min"], 1);
    assert_eq!(v["summary"]["support_max"], 3);
}

#[tokio::test]
async fn bad_inputs_get_problem_details_pointing_at_the_field() {
    let s = start(&["--max-thresholds", "5", "--max-listed-exposures", "1000"]).await;
    let cases: Vec<(Value, u16, &str)> = vec![
        (json!({"portfolio": {"probabilities": [0.1, 1.5]}, "thresholds": [1]}), 422, "/portfolio/probabilities/1"),
        (json!({"portfolio": {"probabilities": [0.1, -0.2]}, "thresholds": [1]}), 422, "/portfolio/probabilities/1"),
        (json!({"portfolio": {"probabilities": [0.1, "x"]}, "thresholds": [1]}), 422, "/portfolio/probabilities/1"),
        (
            json!({"portfolio": {"groups": [{"size": -3, "probability": 0.1}]}, "thresholds": [1]}),
            422,
            "/portfolio/groups/0/size",
        ),
        (
            json!({"portfolio": {"groups": [{"size": 3, "probability": 2}]}, "thresholds": [1]}),
            422,
            "/portfolio/groups/0/probability",
        ),
        (json!({"portfolio": {"poisson_rates": [-1]}, "thresholds": [1]}), 422, "/portfolio/poisson_rates/0"),
        (json!({"portfolio": {"probabilities": [0.1]}, "thresholds": [-1]}), 422, "/thresholds/0"),
        (json!({"portfolio": {"probabilities": [0.1]}, "thresholds": [1, 2, 3, 4, 5, 6]}), 422, "/thresholds"),
        (json!({"portfolio": {"probabilities": [0.1]}, "thresholds": []}), 422, "/thresholds"),
        (json!({"portfolio": {"probabilities": [0.1]}, "thresholds": [1], "side": "sideways"}), 422, "/side"),
        (json!({"portfolio": {"probabilities": [0.1]}, "thresholds": [1], "methods": ["magic"]}), 422, "/methods/0"),
        (
            json!({"portfolio": {"families": [{"kind": "constant", "n": 5000, "probability": 0.1}]}, "thresholds": [1]}),
            422,
            "/portfolio",
        ),
        (
            json!({"portfolio": {"families": [{"kind": "geometric", "n": 5, "first": 0.5, "ratio": 3}]}, "thresholds": [1]}),
            422,
            "/portfolio/families/0/ratio",
        ),
        (
            json!({"portfolio": {"families": [{"kind": "ewens", "n": 5, "theta": 0}]}, "thresholds": [1]}),
            422,
            "/portfolio/families/0/theta",
        ),
        (
            json!({"portfolio": {"families": [{"kind": "nope", "n": 5}]}, "thresholds": [1]}),
            422,
            "/portfolio/families/0/kind",
        ),
        (json!({"portfolio": {"probabilities": [0.1]}, "thresholds": [1], "extra": true}), 422, ""),
        (
            json!({"portfolio": {"poisson_rates": [1e-9]}, "thresholds": [5, 18446744073709551615u64]}),
            422,
            "/thresholds/1",
        ),
    ];
    for (body, want, ptr) in cases {
        let (status, ct, v) = s.post_json("/v1/tail", &body).await;
        let ptr = if ptr.is_empty() { None } else { Some(ptr) };
        assert_problem(status, &ct, &v, want, ptr);
    }
    // Not JSON at all, NaN (not a JSON token), truncated document, trailing garbage.
    for raw in [
        "{",
        "{\"portfolio\": {\"probabilities\": [NaN]}, \"thresholds\": [1]}",
        "{\"portfolio\": {}, \"thresholds\": [1]} x",
        "",
    ] {
        let (status, ct, v) = s.post_raw("/v1/tail", "application/json", raw.as_bytes().to_vec()).await;
        assert_problem(status, &ct, &v, 400, None);
    }
    // A number beyond f64 is a bad value, pointed at.
    let (status, ct, v) = s
        .post_raw(
            "/v1/tail",
            "application/json",
            br#"{"portfolio": {"probabilities": [1e400]}, "thresholds": [1]}"#.to_vec(),
        )
        .await;
    assert_problem(status, &ct, &v, 422, Some("/portfolio/probabilities/0"));
    let (status, ct, v) = s.post_raw("/v1/tail", "text/plain", b"{}".to_vec()).await;
    assert_problem(status, &ct, &v, 415, None);
    let (status, ct, body) = s.get("/v1/tail").await;
    assert_problem(status, &ct, &serde_json::from_str(&body).unwrap(), 405, None);
    let (status, ct, body) = s.get("/nowhere").await;
    assert_problem(status, &ct, &serde_json::from_str(&body).unwrap(), 404, None);
}

#[tokio::test]
async fn body_and_work_limits_answer_413() {
    let s = start(&["--max-body-bytes", "2000", "--max-work", "1000"]).await;
    let big = json!({"portfolio": {"probabilities": vec![0.01; 1000]}, "thresholds": [1]});
    let (status, ct, v) = s.post_json("/v1/tail", &big).await;
    assert_problem(status, &ct, &v, 413, None);
    let heavy = json!({"portfolio": {"families": [{"kind": "constant", "n": 100, "probability": 0.1}]}, "thresholds": [1, 2, 3, 4, 5, 6, 7, 8]});
    let (status, ct, v) = s.post_json("/v1/tail", &heavy).await;
    assert_problem(status, &ct, &v, 413, None);
}

/// The server and the OpenAPI document agree where Schemathesis found them apart: JSON Schema's `integer`
/// takes 12.0 (so the server does), and the `independent` model is a closed object (so an unknown key is a
/// 422 at its pointer, as in every other object).
#[tokio::test]
async fn integral_floats_are_counts_and_the_independent_model_is_closed() {
    let s = start(&[]).await;
    let req = json!({"portfolio": {"probabilities": [0.1, 0.2], "groups": [{"size": 3.0, "probability": 0.5}],
                                   "families": [{"kind": "harmonic", "n": 2e0}]},
                     "thresholds": [1.0, 2]});
    let (status, _, v) = s.post_json("/v1/tail", &req).await;
    assert_eq!(status, 200, "{v}");
    assert_eq!(v["results"][0]["threshold"], 1);
    assert_eq!(v["summary"]["exposures"], 7);
    let (status, ct, v) =
        s.post_json("/v1/tail", &json!({"portfolio": {"probabilities": [0.5]}, "thresholds": [1.5]})).await;
    assert_problem(status, &ct, &v, 422, Some("/thresholds/0"));
    let req = json!({"portfolio": {"probabilities": [0.5]}, "thresholds": [1],
                     "dependence": {"model": "independent", "rho": 0.2}});
    let (status, ct, v) = s.post_json("/v1/tail", &req).await;
    assert_problem(status, &ct, &v, 422, Some("/dependence"));
    assert!(v["detail"].as_str().unwrap().contains("unknown field `rho`"), "{v}");
    // A tolerance must be > 0 (exclusiveMinimum in the document) for quantiles as for tails.
    let req = json!({"portfolio": {"probabilities": [0.5]}, "levels": [0.5], "methods": ["auto"],
                     "tolerance": {"relative": 0.0}});
    let (status, ct, v) = s.post_json("/v1/quantiles", &req).await;
    assert_problem(status, &ct, &v, 422, Some("/tolerance/relative"));
}
