//! GET / end to end: the explorer page is self-contained HTML (no resource from elsewhere, a strict content
//! security policy) that states the model's assumptions and asks every question; the table fixtures of the
//! browser test agree. Its behaviour in a browser is tests/e2e.

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
    // Every question the page asks, in both request forms, under the scenario fields of the API.
    for route in ["/v1/tail", "/v1/quantiles", "/v1/contributions", "/v1/layers", "/v1/distribution"] {
        assert!(html.contains(route), "the page does not call {route}");
    }
    for word in ["FormData", "application/vnd.apache.arrow.stream", "text/csv", "probability_factor", "odds_factor"] {
        assert!(html.contains(word), "the page does not mention {word}");
    }
    assert!(html.contains("one_factor_gaussian") && html.contains("nodes_evaluated"));
    // Trade wording, and ordinals made by a function rather than a "th" after a number.
    assert!(html.contains("Number of events: how likely each count is") && !html.contains("Law of the count"));
    assert!(!html.contains("}th count"), "the chart note writes 2th and 3th");
}

/// The e2e test's table fixtures: `stations.csv` (an invented bike-share scheme's docking stations and their
/// yearly chance of a power outage) and its Arrow IPC stream twin `stations.arrow`, which this test writes when
/// `TAILTALLY_WRITE_E2E_FIXTURES=1` and otherwise checks byte for byte. Both uploads give the same drivers.
#[tokio::test]
async fn e2e_table_fixtures_agree() {
    use arrow_array::{ArrayRef, Float64Array, Int64Array, RecordBatch, StringArray};
    use arrow_schema::{DataType, Field, Schema};
    use std::sync::Arc;
    let dir = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/e2e/fixtures");
    let csv = std::fs::read_to_string(dir.join("stations.csv")).unwrap();
    let rows: Vec<Vec<&str>> = csv.lines().skip(1).map(|l| l.split(',').collect()).collect();
    assert!(rows.len() >= 20 && rows.iter().all(|r| r.len() == 4));
    let schema = Arc::new(Schema::new(vec![
        Field::new("station", DataType::Utf8, false),
        Field::new("district", DataType::Utf8, false),
        Field::new("docks", DataType::Int64, false),
        Field::new("p_outage", DataType::Float64, false),
    ]));
    let cols: Vec<ArrayRef> = vec![
        Arc::new(StringArray::from(rows.iter().map(|r| r[0]).collect::<Vec<_>>())),
        Arc::new(StringArray::from(rows.iter().map(|r| r[1]).collect::<Vec<_>>())),
        Arc::new(Int64Array::from(rows.iter().map(|r| r[2].parse::<i64>().unwrap()).collect::<Vec<_>>())),
        Arc::new(Float64Array::from(rows.iter().map(|r| r[3].parse::<f64>().unwrap()).collect::<Vec<_>>())),
    ];
    let mut arrow = Vec::new();
    {
        let mut w = arrow_ipc::writer::StreamWriter::try_new(&mut arrow, &schema).unwrap();
        w.write(&RecordBatch::try_new(schema.clone(), cols).unwrap()).unwrap();
        w.finish().unwrap();
    }
    let path = dir.join("stations.arrow");
    if std::env::var_os("TAILTALLY_WRITE_E2E_FIXTURES").is_some() {
        std::fs::write(&path, &arrow).unwrap();
    }
    assert_eq!(std::fs::read(&path).unwrap(), arrow, "stations.arrow is not the stream of stations.csv");

    let s = start(&[]).await;
    const CT: &str = "multipart/form-data; boundary=e2e-fixture-boundary";
    let ask = |kind: &str, table: &[u8]| {
        let request = serde_json::json!({"portfolio": {}, "threshold": 4, "top": 5, "rank_by": "impact",
                                         "table": {"probability": "p_outage", "id": "station"}});
        let mut body = Vec::new();
        let b = "e2e-fixture-boundary";
        body.extend_from_slice(format!("--{b}\r\nContent-Disposition: form-data; name=\"request\"\r\nContent-Type: application/json\r\n\r\n{request}\r\n").as_bytes());
        body.extend_from_slice(format!("--{b}\r\nContent-Disposition: form-data; name=\"exposures\"; filename=\"t\"\r\nContent-Type: {kind}\r\n\r\n").as_bytes());
        body.extend_from_slice(table);
        body.extend_from_slice(format!("\r\n--{b}--\r\n").as_bytes());
        s.post_raw("/v1/contributions", CT, body)
    };
    let (st_csv, _, from_csv) = ask("text/csv", csv.as_bytes()).await;
    let (st_arrow, _, from_arrow) = ask("application/vnd.apache.arrow.stream", &arrow).await;
    assert_eq!((st_csv, st_arrow), (200, 200), "{from_csv} {from_arrow}");
    let drivers = from_csv["contributions"].as_array().unwrap();
    assert_eq!(drivers.len(), 5);
    assert!(drivers.iter().all(|c| c["id"].as_str().is_some_and(|id| id.starts_with("DS-"))), "{from_csv}");
    assert_eq!(from_csv["contributions"], from_arrow["contributions"]);
    assert_eq!(from_csv["tail_probability"], from_arrow["tail_probability"]);
}
