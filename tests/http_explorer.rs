//! GET / end to end: the explorer page is self-contained HTML (no resource from elsewhere, a strict content
//! security policy) that states the model's assumptions. Its behaviour in a browser is tests/e2e.

mod common;
use common::start;

#[tokio::test]
async fn explorer_page_is_self_contained_html() {
    let s = start(&[]).await;
    let res = s.client.get(format!("{}/", s.base)).send().await.unwrap();
    assert_eq!(res.status().as_u16(), 200);
    let ct = res.headers()["content-type"].to_str().unwrap().to_string();
    assert!(ct.starts_with("text/html"), "{ct}");
    let csp = res.headers()["content-security-policy"].to_str().unwrap().to_string();
    assert!(csp.contains("default-src 'none'") && csp.contains("connect-src 'self'"), "{csp}");
    let html = res.text().await.unwrap();
    assert!(html.trim_start().to_ascii_lowercase().starts_with("<!doctype html>"));
    // No resource from elsewhere: the only absolute URL is the SVG namespace name, which is never fetched.
    let mut rest = html.as_str();
    while let Some(i) = rest.find("http") {
        let tail = &rest[i..];
        if tail.starts_with("http://") || tail.starts_with("https://") {
            assert!(
                tail.starts_with("http://www.w3.org/2000/svg"),
                "external URL in the page: {}",
                &tail[..60.min(tail.len())]
            );
        }
        rest = &rest[i + 4..];
    }
    let lower = html.to_ascii_lowercase();
    for banned in ["@import", "<link", "<iframe", "<script src", "src=\"//", "href=\"//"] {
        assert!(!lower.contains(banned), "page contains {banned}");
    }
    // It states the model's assumption and the caution.
    assert!(html.contains("independent") && html.contains("qualified actuary or engineer"));
    assert!(html.contains("/v1/tail"));
}
