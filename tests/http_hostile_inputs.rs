//! Small hostile requests that once took the service down: each must be refused with a 4xx problem that
//! points at the field, before any memory it would size is allocated. (The server runs in this test's process,
//! so an allocation the size of the old failure would abort the test run, not just fail one assertion.)

mod common;
use common::{assert_problem, start};
use serde_json::json;

/// An explicit distribution range far out on a Poisson part once sized a window of about 200 GB
/// (`from` = `to` = 10^18 aborted the process).
#[tokio::test]
async fn a_far_distribution_range_with_a_poisson_part_is_refused() {
    let s = start(&[]).await;
    for k in [1_000_000_000_000_000_000u64, 1_000_000_000_000_000, 1_000_000_001] {
        let body = json!({"portfolio": {"poisson_rates": [3]}, "from": k, "to": k});
        let (st, ct, v) = s.post_json("/v1/distribution", &body).await;
        assert_problem(st, &ct, &v, 422, Some("/from"));
        assert_problem(st, &ct, &v, 422, Some("/to"));
    }
    // The largest count that is served still is.
    let body = json!({"portfolio": {"poisson_rates": [3]}, "from": 1_000_000_000u64, "to": 1_000_000_000u64});
    let (st, _, v) = s.post_json("/v1/distribution", &body).await;
    assert_eq!(st, 200, "{v}");
    // Without a Poisson part the support is bounded and a far range is just zeros.
    let body = json!({"portfolio": {"probabilities": [0.5]}, "from": 1_000_000_000_000u64, "to": 1_000_000_000_000u64});
    let (st, _, v) = s.post_json("/v1/distribution", &body).await;
    assert_eq!((st, v["pmf"][0].as_f64()), (200, Some(0.0)), "{v}");
    // The widest range there is: its count (2^64) does not fit a u64, and the refusal must not overflow
    // computing it (found by Schemathesis: a 500 in a debug build).
    let body = json!({"portfolio": {"probabilities": [0.5]}, "from": 0, "to": u64::MAX});
    let (st, ct, v) = s.post_json("/v1/distribution", &body).await;
    assert_problem(st, &ct, &v, 422, Some("/to"));
    assert!(v["detail"].as_str().unwrap().contains("18446744073709551616 counts"), "{v}");
    s.shutdown().await.unwrap();
}

/// A stress factor multiplies the Poisson rate after validation: 1e308 overflowed it to infinity (a panic in
/// the Poisson leaf, answered 500), and 1e9 x 1e9 ran for a minute at 6 GB. The stressed rate meets the same
/// limit as a listed one.
#[tokio::test]
async fn a_stress_that_takes_a_rate_past_its_limit_is_refused() {
    let s = start(&[]).await;
    let cases = [
        (
            "/v1/tail",
            json!({"portfolio": {"poisson_rates": [5]}, "thresholds": [3], "stress": {"odds_factor": 1e308}}),
            "/stress/odds_factor",
        ),
        (
            "/v1/quantiles",
            json!({"portfolio": {"poisson_rates": [5]}, "levels": [0.5], "stress": {"probability_factor": 1e308}}),
            "/stress/probability_factor",
        ),
        (
            "/v1/quantiles",
            json!({"portfolio": {"poisson_rates": [1e9]}, "levels": [0.5], "stress": {"probability_factor": 1e9}}),
            "/stress/probability_factor",
        ),
        (
            "/v1/distribution",
            json!({"portfolio": {"poisson_rates": [2]}, "stress": {"probability_factor": 1e300}}),
            "/stress/probability_factor",
        ),
        (
            "/v1/layers",
            json!({"portfolio": {"poisson_rates": [2]}, "layers": [{"attachment": 1}], "stress": {"odds_factor": 1e300}}),
            "/stress/odds_factor",
        ),
        (
            "/v1/contributions",
            json!({"portfolio": {"probabilities": [0.1], "poisson_rates": [2]}, "threshold": 1, "stress": {"odds_factor": 1e300}}),
            "/stress/odds_factor",
        ),
    ];
    for (path, body, pointer) in cases {
        let (st, ct, v) = s.post_json(path, &body).await;
        assert_problem(st, &ct, &v, 422, Some(pointer));
    }
    // Large factors on probabilities alone are fine: they saturate at 1.
    let body = json!({"portfolio": {"probabilities": [0.2, 0.3]}, "thresholds": [2], "stress": {"odds_factor": 1e308}});
    let (st, _, v) = s.post_json("/v1/tail", &body).await;
    assert_eq!(st, 200, "{v}");
    assert_eq!(v["results"][0]["estimates"][0]["probability"], 1.0, "{v}");
    s.shutdown().await.unwrap();
}

/// serde reads a struct from a JSON array of its fields in order, so `"tolerance": [null, null]` was
/// accepted (Schemathesis' coverage phase found it) and `"portfolio": [[0.1, 0.2]]` read as probabilities.
/// The document says object; every request object now takes an object only, refused at its pointer.
#[tokio::test]
async fn arrays_in_place_of_objects_are_refused_at_their_pointer() {
    let s = start(&[]).await;
    let p = json!({"probabilities": [0.1, 0.2]});
    let dep = |tol: serde_json::Value| json!({"model": "one_factor_gaussian", "rho": 0.1, "tolerance": tol});
    let cases = [
        ("/v1/tail", json!({"portfolio": [[0.1, 0.2]], "thresholds": [1]}), "/portfolio"),
        ("/v1/tail", json!({"portfolio": p, "thresholds": [1], "dependence": dep(json!([null, null]))}), "/dependence"),
        ("/v1/tail", json!({"portfolio": {"groups": [[10, 0.1]]}, "thresholds": [1]}), "/portfolio/groups/0"),
        ("/v1/layers", json!({"portfolio": p, "layers": [[0, 1]]}), "/layers/0"),
        ("/v1/tail", json!([p, [1]]), ""),
        ("/v1/quantiles", json!([p, [0.5]]), ""),
        ("/v1/distribution", json!([p]), ""),
        ("/v1/contributions", json!([p, 1]), ""),
    ];
    for (route, body, at) in cases {
        let (st, ct, v) = s.post_json(route, &body).await;
        assert_eq!(st, 422, "{route} {body}: {v}");
        assert_problem(st, &ct, &v, 422, None);
        let pointers: Vec<&str> =
            v["errors"].as_array().unwrap().iter().filter_map(|e| e["pointer"].as_str()).collect();
        assert!(pointers.iter().any(|q| q.starts_with(at)), "{route} {body}: {pointers:?}");
        assert!(v.to_string().contains("expected an object"), "{route} {body}: {v}");
    }
    // The objects themselves are still read.
    let body = json!({"portfolio": p, "thresholds": [1], "dependence": dep(json!({"relative": 1e-8}))});
    let (st, _, v) = s.post_json("/v1/tail", &body).await;
    assert_eq!(st, 200, "{v}");
    s.shutdown().await.unwrap();
}
