//! The operations routes end to end: /metrics (Prometheus text format), /docs (offline documentation), the
//! probes and the served OpenAPI document (equal to the committed one).

mod common;
use common::start;
use serde_json::json;

/// The value of the sample line that starts with `prefix`.
fn sample(text: &str, prefix: &str) -> Option<f64> {
    text.lines().find(|l| l.starts_with(prefix)).and_then(|l| l.rsplit(' ').next()).and_then(|v| v.parse().ok())
}

#[tokio::test]
async fn metrics_count_requests_by_route_template_problems_by_type_and_exposures() {
    // The registry is per process and other tests of this file run in parallel: compare before and after.
    let s = start(&[]).await;
    let (_, _, before) = s.get("/metrics").await;
    let ok = json!({"portfolio": {"probabilities": [0.1, 0.2], "groups": [{"size": 40, "probability": 0.01}]}, "thresholds": [1]});
    assert_eq!(s.post_json("/v1/tail", &ok).await.0, 200);
    let bad = json!({"portfolio": {"probabilities": [2.0]}, "thresholds": [1]});
    assert_eq!(s.post_json("/v1/tail", &bad).await.0, 422);
    // Distinct raw paths share the one `unmatched` label.
    assert_eq!(s.get("/no/such/path/1").await.0, 404);
    assert_eq!(s.get("/no/such/path/2").await.0, 404);
    let (status, ct, after) = s.get("/metrics").await;
    assert_eq!(status, 200);
    assert!(ct.starts_with("text/plain; version=0.0.4"), "{ct}");
    let delta = |prefix: &str| sample(&after, prefix).unwrap_or(0.0) - sample(&before, prefix).unwrap_or(0.0);
    assert_eq!(delta("tailtally_http_requests_total{route=\"/v1/tail\",method=\"POST\",status=\"200\"}"), 1.0);
    assert_eq!(delta("tailtally_http_requests_total{route=\"/v1/tail\",method=\"POST\",status=\"422\"}"), 1.0);
    assert_eq!(delta("tailtally_http_requests_total{route=\"unmatched\",method=\"GET\",status=\"404\"}"), 2.0);
    assert!(!after.contains("/no/such/path"), "raw paths must not become labels");
    assert_eq!(
        delta("tailtally_http_problems_total{route=\"/v1/tail\",type=\"/problems/invalid-request\",status=\"422\"}"),
        1.0
    );
    assert_eq!(
        delta("tailtally_http_problems_total{route=\"unmatched\",type=\"/problems/not-found\",status=\"404\"}"),
        2.0
    );
    // Only the validated portfolio counts, group members included: 2 + 40.
    assert_eq!(delta("tailtally_exposures_processed_total"), 42.0);
    let count = "tailtally_http_request_duration_seconds_count{route=\"/v1/tail\",method=\"POST\"}";
    assert_eq!(delta(count), 2.0);
    let inf = "tailtally_http_request_duration_seconds_bucket{route=\"/v1/tail\",method=\"POST\",le=\"+Inf\"}";
    assert_eq!(sample(&after, inf), sample(&after, count));
    assert!(after.contains("le=\"0.0005\"") && after.contains("le=\"60\""));
    // Every sample line is `name{labels} value` or `name value` with a number.
    for line in after.lines().filter(|l| !l.starts_with('#')) {
        let (series, value) = line.rsplit_once(' ').unwrap();
        assert!(series.starts_with("tailtally_"), "{line}");
        assert!(value.parse::<f64>().is_ok(), "{line}");
    }
}

#[tokio::test]
async fn docs_page_is_self_contained_html_reading_the_served_spec() {
    let s = start(&[]).await;
    let (status, ct, page) = s.get("/docs").await;
    assert_eq!(status, 200);
    assert!(ct.starts_with("text/html"), "{ct}");
    assert!(page.starts_with("<!doctype html>"));
    // Nothing is fetched from elsewhere: no absolute URL at all, no external script or stylesheet.
    assert!(!page.contains("http://") && !page.contains("https://"), "the page names an absolute URL");
    assert!(!page.contains("<script src") && !page.contains("<link"), "the page loads an external asset");
    assert!(page.contains("fetch(\"openapi.json\")"));
    let (_, _, spec) = s.get("/openapi.json").await;
    let spec: serde_json::Value = serde_json::from_str(&spec).unwrap();
    for path in ["/v1/tail", "/metrics", "/docs", "/healthz", "/readyz"] {
        assert!(spec["paths"][path].is_object(), "{path} missing from the OpenAPI document");
    }
}

#[tokio::test]
async fn health_and_openapi_are_served() {
    let s = start(&[]).await;
    assert_eq!(s.get("/healthz").await.0, 200);
    assert_eq!(s.get("/readyz").await.0, 200);
    let (status, _, spec) = s.get("/openapi.json").await;
    assert_eq!(status, 200);
    let committed = std::fs::read_to_string("openapi/openapi.json").unwrap();
    assert_eq!(spec, committed);
}
