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
