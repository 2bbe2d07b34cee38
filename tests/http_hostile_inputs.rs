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
