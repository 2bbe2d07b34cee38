//! The OpenAPI document's examples are the service's own answers: every JSON operation's example request,
//! posted to the service, is answered 200 with the document's response example (timings aside; numbers to 1e-9
//! relative, the last bits of a sum being free to differ between machines). Regenerate the examples with
//! `python3 scripts/make_examples.py` and then the document.

mod common;

use serde_json::Value;

/// `got` equals `want` but for timings (`elapsed_us`) and numbers within 1e-9 relative; the first difference.
fn differs(want: &Value, got: &Value, at: &str) -> Option<String> {
    match (want, got) {
        (Value::Number(a), Value::Number(b)) => {
            let (a, b) = (a.as_f64().unwrap(), b.as_f64().unwrap());
            ((a - b).abs() > 1e-9 * a.abs().max(b.abs())).then(|| format!("{at}: {a} in the document, {b} served"))
        }
        (Value::Object(a), Value::Object(b)) => {
            if a.keys().ne(b.keys()) {
                return Some(format!("{at}: keys {:?} in the document, {:?} served", a.keys(), b.keys()));
            }
            a.iter().filter(|(k, _)| *k != "elapsed_us").find_map(|(k, v)| differs(v, &b[k], &format!("{at}/{k}")))
        }
        (Value::Array(a), Value::Array(b)) if a.len() == b.len() => {
            a.iter().zip(b).enumerate().find_map(|(i, (x, y))| differs(x, y, &format!("{at}/{i}")))
        }
        _ => (want != got).then(|| format!("{at}: {want} in the document, {got} served")),
    }
}

#[tokio::test]
async fn every_example_request_is_answered_with_the_documented_example() {
    let doc: Value = serde_json::from_str(&tailtally::api::openapi::pretty_json()).unwrap();
    let server = common::start(&[]).await;
    let mut answered = 0;
    for (path, ops) in doc["paths"].as_object().unwrap() {
        let Some(content) = ops["post"]["requestBody"]["content"]["application/json"].as_object() else { continue };
        let request = content.get("example").unwrap_or_else(|| panic!("{path}: no example request"));
        let (status, ct, body) = server.post_json(path, request).await;
        assert_eq!(status, 200, "{path}: {body}");
        let ok = &ops["post"]["responses"]["200"]["content"];
        match ok["application/json"].get("example") {
            Some(want) => {
                assert!(ct.starts_with("application/json"), "{path}: {ct}");
                if let Some(d) = differs(want, &body, "") {
                    panic!("{path}: the documented answer is not the service's: {d}");
                }
                answered += 1;
            }
            // The chart answers an image, which the document describes but does not show.
            None => assert!(ok.get("image/svg+xml").is_some() && ct.starts_with("image/svg+xml"), "{path}: {ct}"),
        }
    }
    assert_eq!(answered, 6, "tail, quantiles, distribution, layers, contributions and reverse-stress have examples");

    // The batch: its example lines, answered line by line with the documented answer lines.
    let batch = &doc["paths"]["/v1/batch"]["post"];
    let lines = batch["requestBody"]["content"]["application/x-ndjson"]["example"].as_str().unwrap();
    let want = batch["responses"]["200"]["content"]["application/x-ndjson"]["example"].as_str().unwrap();
    let (status, _, body) = server.post_raw("/v1/batch", "application/x-ndjson", lines.as_bytes().to_vec()).await;
    assert_eq!(status, 200, "{body}");
    let parse = |text: &str| -> Vec<Value> { text.lines().map(|l| serde_json::from_str(l).unwrap()).collect() };
    let got = Value::Array(parse(body.as_str().unwrap()));
    if let Some(d) = differs(&Value::Array(parse(want)), &got, "") {
        panic!("/v1/batch: the documented answer is not the service's: {d}");
    }
    server.shutdown().await.unwrap();
}
