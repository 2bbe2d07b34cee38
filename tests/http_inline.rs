//! Where a question runs: small ones on the async worker, the others on the blocking pool. Alone in its
//! own test binary because the counter it reads is process-wide: another test's request in the same
//! process would move it.

mod common;
use common::start;
use serde_json::json;

/// Small questions skip the blocking pool (`analytics::cost::inline_work` below `INLINE_WORK`), large ones,
/// those under a dependence model and by-mass distributions do not; the answers are the same either way.
#[tokio::test]
async fn small_questions_are_answered_inline_and_large_ones_on_the_pool() {
    let s = start(&[]).await;
    let inline = |m: String| -> u64 {
        let line = m.lines().find(|l| l.starts_with("tailtally_questions_inline_total")).expect("the counter");
        line.split_whitespace().nth(1).unwrap().parse().unwrap()
    };
    let small = json!({"portfolio": {"probabilities": [0.1, 0.2, 0.3]}, "thresholds": [1, 2]});
    let ps: Vec<f64> = (0..5000).map(|i| 0.01 + 0.1 * ((i % 10) as f64 / 10.0)).collect();
    let large = json!({"portfolio": {"probabilities": ps}, "thresholds": [300]});
    let factor = json!({"portfolio": {"probabilities": [0.1, 0.2]}, "thresholds": [1],
                        "dependence": {"model": "one_factor_gaussian", "rho": 0.2}});
    for (body, expect_inline) in [(small, true), (large, false), (factor, false)] {
        let before = inline(s.get("/metrics").await.2);
        let (st, _, v) = s.post_json("/v1/tail", &body).await;
        assert_eq!(st, 200, "{v}");
        let after = inline(s.get("/metrics").await.2);
        assert_eq!(after > before, expect_inline, "{body}");
    }
    // Inline or not, a small question's answer is the exact law: P(S >= 1) = 1 - 0.9 x 0.8 x 0.7 = 0.496.
    let body = json!({"portfolio": {"probabilities": [0.1, 0.2, 0.3]}, "thresholds": [1]});
    let (_, _, v) = s.post_json("/v1/tail", &body).await;
    let p = v["results"][0]["estimates"][0]["probability"].as_f64().unwrap();
    assert!((p - 0.496).abs() < 1e-15, "{p}");
    s.shutdown().await.unwrap();
}
