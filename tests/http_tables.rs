//! Books as tables (multipart/form-data with the exposures as CSV or as an Arrow IPC stream), end to end:
//! the same answers as the JSON form, ids in contributions, bad rows pointed at by row and column, the row
//! and body limits (413) and the content types (415). The Arrow bytes are made here with arrow's own writer.

mod common;
use common::{assert_problem, start, Server};
use serde_json::{json, Value};
use std::sync::Arc;

const BOUNDARY: &str = "tailtally-test-7f3a9c";

/// A multipart body: (part name, Content-Type or none, bytes).
fn form(parts: &[(&str, Option<&str>, &[u8])]) -> Vec<u8> {
    let mut b = Vec::new();
    for (name, ct, data) in parts {
        b.extend_from_slice(format!("--{BOUNDARY}\r\nContent-Disposition: form-data; name=\"{name}\"").as_bytes());
        if *name == "exposures" {
            b.extend_from_slice(b"; filename=\"book\"");
        }
        b.extend_from_slice(b"\r\n");
        if let Some(ct) = ct {
            b.extend_from_slice(format!("Content-Type: {ct}\r\n").as_bytes());
        }
        b.extend_from_slice(b"\r\n");
        b.extend_from_slice(data);
        b.extend_from_slice(b"\r\n");
    }
    b.extend_from_slice(format!("--{BOUNDARY}--\r\n").as_bytes());
    b
}

fn multipart_type() -> String {
    format!("multipart/form-data; boundary={BOUNDARY}")
}

/// POST a multipart body; the status, content type and raw body.
async fn post_form(s: &Server, path: &str, body: Vec<u8>) -> (u16, String, Vec<u8>) {
    post_typed(s, path, &multipart_type(), body).await
}

async fn post_typed(s: &Server, path: &str, ctype: &str, body: Vec<u8>) -> (u16, String, Vec<u8>) {
    let res = s.client.post(format!("{}{path}", s.base)).header("content-type", ctype).body(body).send().await.unwrap();
    let status = res.status().as_u16();
    let ct = res.headers().get("content-type").map(|v| v.to_str().unwrap().to_string()).unwrap_or_default();
    (status, ct, res.bytes().await.unwrap().to_vec())
}

fn json_of(b: &[u8]) -> Value {
    serde_json::from_slice(b).unwrap_or_else(|_| Value::String(String::from_utf8_lossy(b).into()))
}

/// Timings are measurements, not answers: blanked as `scripts/answers_snapshot.py` does.
fn without_timings(b: &[u8]) -> String {
    let s = String::from_utf8(b.to_vec()).unwrap();
    let mut out = String::with_capacity(s.len());
    let mut rest = s.as_str();
    while let Some(i) = rest.find("\"elapsed_us\":") {
        out.push_str(&rest[..i]);
        out.push_str("\"elapsed_us\":0");
        rest = &rest[i + "\"elapsed_us\":".len()..];
        let end = rest.find(|c: char| !(c.is_ascii_digit() || "-.eE+".contains(c))).unwrap_or(rest.len());
        rest = &rest[end..];
    }
    out.push_str(rest);
    out
}

/// A book of `n` exposures with varied probabilities (a fixed linear congruential sequence), some 0 and 1.
fn book(n: usize) -> Vec<f64> {
    let mut x: u64 = 0x2545_f491_4f6c_dd1d;
    (0..n)
        .map(|i| {
            x = x.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
            match i % 97 {
                13 => 0.0,
                41 => 1.0,
                _ => (x >> 11) as f64 / (1u64 << 53) as f64 * 0.08,
            }
        })
        .collect()
}

fn ids(n: usize) -> Vec<String> {
    (0..n).map(|i| format!("L-{:05}", 3 * i + 1)).collect()
}

/// CSV with an id column, the probabilities written to the bit (shortest round trip), and a column to ignore.
fn csv(p: &[f64], ids: &[String]) -> Vec<u8> {
    let mut s = String::from("region,id,probability\r\n");
    for (i, (p, id)) in p.iter().zip(ids).enumerate() {
        s.push_str(&format!("\"north, {}\",{id},{p}\r\n", i % 3));
    }
    s.into_bytes()
}

fn arrow_stream(p: &[f64], ids: Option<arrow_array::ArrayRef>, batch: usize) -> Vec<u8> {
    use arrow_array::{ArrayRef, Float64Array, RecordBatch};
    use arrow_schema::{Field, Schema};
    let mut fields = vec![Field::new("probability", arrow_schema::DataType::Float64, true)];
    if let Some(a) = &ids {
        fields.push(Field::new("id", a.data_type().clone(), true));
    }
    let schema = Arc::new(Schema::new(fields));
    let mut out = Vec::new();
    let mut w = arrow_ipc::writer::StreamWriter::try_new(&mut out, &schema).unwrap();
    let mut start = 0;
    while start < p.len() {
        let len = batch.min(p.len() - start);
        let mut cols: Vec<ArrayRef> = vec![Arc::new(Float64Array::from(p[start..start + len].to_vec()))];
        if let Some(a) = &ids {
            cols.push(a.slice(start, len));
        }
        w.write(&RecordBatch::try_new(schema.clone(), cols).unwrap()).unwrap();
        start += len;
    }
    w.finish().unwrap();
    drop(w);
    out
}

fn string_ids(ids: &[String]) -> arrow_array::ArrayRef {
    Arc::new(arrow_array::StringArray::from(ids.to_vec()))
}

/// A question of each computing route; the portfolio's listed probabilities are left to the caller.
fn questions() -> Vec<(&'static str, Value)> {
    let groups = json!([{"size": 3000, "probability": 0.004}]);
    vec![
        (
            "/v1/tail",
            json!({"portfolio": {"groups": groups}, "thresholds": [20, 35, 60], "methods": ["exact", "normal", "saddlepoint", "auto"]}),
        ),
        ("/v1/quantiles", json!({"portfolio": {"groups": groups}, "levels": [0.5, 0.99, 0.995]})),
        ("/v1/distribution", json!({"portfolio": {"groups": groups}, "mass": 1e-9})),
        (
            "/v1/layers",
            json!({"portfolio": {"groups": groups}, "layers": [{"attachment": 30, "limit": 10}], "tail_levels": [0.99]}),
        ),
        (
            "/v1/contributions",
            json!({"portfolio": {"groups": groups}, "threshold": 40, "top": 25, "rank_by": "impact"}),
        ),
        ("/v1/chart", json!({"portfolio": {"groups": groups}, "threshold": 40, "methods": ["normal", "poisson"]})),
    ]
}

fn with_probabilities(q: &Value, p: &[f64]) -> Value {
    let mut q = q.clone();
    q["portfolio"]["probabilities"] = json!(p);
    q
}

#[tokio::test]
async fn csv_and_arrow_tables_answer_as_the_json_form_does() {
    let s = start(&[]).await;
    let (p, ids) = (book(600), ids(600));
    let csv = csv(&p, &ids);
    let arrow = arrow_stream(&p, Some(string_ids(&ids)), 250);
    for (path, q) in questions() {
        let json_form = with_probabilities(&q, &p);
        let (st, ct_json, want) =
            post_typed(&s, path, "application/json", serde_json::to_vec(&json_form).unwrap()).await;
        assert_eq!(st, 200, "{path}: {}", String::from_utf8_lossy(&want));
        let request = serde_json::to_vec(&q).unwrap();
        for (kind, table) in [("text/csv", &csv), ("application/vnd.apache.arrow.stream", &arrow)] {
            let body = form(&[("request", Some("application/json"), &request), ("exposures", Some(kind), table)]);
            let (st, ct, got) = post_form(&s, path, body).await;
            assert_eq!(st, 200, "{path} {kind}: {}", String::from_utf8_lossy(&got));
            assert_eq!(ct, ct_json, "{path} {kind}");
            if path == "/v1/contributions" {
                // The table's ids come back; the figures are the JSON form's.
                let (mut a, b) = (json_of(&got), json_of(&want));
                for c in a["contributions"].as_array_mut().unwrap() {
                    let index = c["index"].as_u64().unwrap() as usize;
                    assert_eq!(c["id"], json!(ids[index]), "{kind}");
                    c.as_object_mut().unwrap().remove("id");
                }
                assert_eq!(
                    without_timings(&serde_json::to_vec(&a).unwrap()),
                    without_timings(&serde_json::to_vec(&b).unwrap())
                );
            } else {
                assert!(without_timings(&got) == without_timings(&want), "{path} {kind}: the bodies differ");
            }
        }
    }
    s.shutdown().await.unwrap();
}

#[tokio::test]
async fn tail_bodies_are_byte_identical_across_the_three_forms() {
    let s = start(&[]).await;
    let p = book(2000);
    let q = json!({"portfolio": {"poisson_rates": [1.5]}, "thresholds": [40, 80, 140], "methods": ["exact", "saddlepoint"]});
    let (_, _, want) =
        post_typed(&s, "/v1/tail", "application/json", serde_json::to_vec(&with_probabilities(&q, &p)).unwrap()).await;
    let request = serde_json::to_vec(&q).unwrap();
    let mut csv = String::from("probability\n");
    p.iter().for_each(|x| csv.push_str(&format!("{x}\n")));
    // Without ids, one batch and many, and with a request part that has no Content-Type.
    for (ct, table) in [
        ("text/csv", csv.into_bytes()),
        ("application/vnd.apache.arrow.stream", arrow_stream(&p, None, 2000)),
        ("application/vnd.apache.arrow.stream", arrow_stream(&p, None, 7)),
    ] {
        let (st, _, got) =
            post_form(&s, "/v1/tail", form(&[("request", None, &request), ("exposures", Some(ct), &table)])).await;
        assert_eq!(st, 200, "{}", String::from_utf8_lossy(&got));
        assert_eq!(without_timings(&got), without_timings(&want), "{ct}");
    }
    // A table appends to the JSON's probabilities: half in each gives the same law too.
    let mut half = with_probabilities(&q, &p[..1000]);
    half["table"] = json!({"probability": "p"});
    let mut csv = String::from("p\n");
    p[1000..].iter().for_each(|x| csv.push_str(&format!("{x}\n")));
    let body = form(&[
        ("request", None, &serde_json::to_vec(&half).unwrap()),
        ("exposures", Some("text/csv"), csv.as_bytes()),
    ]);
    let (st, _, got) = post_form(&s, "/v1/tail", body).await;
    assert_eq!(st, 200, "{}", String::from_utf8_lossy(&got));
    assert_eq!(without_timings(&got), without_timings(&want));
    s.shutdown().await.unwrap();
}

#[tokio::test]
async fn ids_come_back_in_contributions_from_every_form() {
    let s = start(&[]).await;
    let p = [0.3, 0.05, 0.6, 0.2, 0.0];
    let q = json!({"portfolio": {}, "threshold": 2});
    // Arrow Int64 ids come back as integers, with a null for the row that has none.
    let int_ids: arrow_array::ArrayRef =
        Arc::new(arrow_array::Int64Array::from(vec![Some(101), Some(102), None, Some(104), Some(105)]));
    let body = form(&[
        ("request", None, &serde_json::to_vec(&q).unwrap()),
        ("exposures", Some("application/vnd.apache.arrow.stream"), &arrow_stream(&p, Some(int_ids), 2)),
    ]);
    let (st, _, got) = post_form(&s, "/v1/contributions", body).await;
    let v = json_of(&got);
    assert_eq!(st, 200, "{v}");
    for c in v["contributions"].as_array().unwrap() {
        let want = [json!(101), json!(102), Value::Null, json!(104), json!(105)][c["index"].as_u64().unwrap() as usize]
            .clone();
        assert_eq!(c.get("id").cloned().unwrap_or(Value::Null), want, "{c}");
    }
    // Named columns in another order, a semicolon delimiter, extra columns ignored.
    let csv = b"loan;branch;pd;score\nA-1;x;0.3;9\nA-2;y;0.05;1\nA-3;x;0.6;3\nA-4;z;0.2;2\nA-5;y;0;0\n";
    let mut named = q.clone();
    named["table"] = json!({"probability": "pd", "id": "loan", "delimiter": ";"});
    named["rank_by"] = json!("impact");
    let body = form(&[
        ("request", None, &serde_json::to_vec(&named).unwrap()),
        ("exposures", Some("text/csv; charset=utf-8"), csv),
    ]);
    let (st, _, got) = post_form(&s, "/v1/contributions", body).await;
    let v = json_of(&got);
    assert_eq!(st, 200, "{v}");
    let top = &v["contributions"][0];
    assert_eq!((top["index"].clone(), top["id"].clone()), (json!(2), json!("A-3")), "{v}");
    // The JSON form carries ids too.
    let json_form = json!({"portfolio": {"probabilities": p, "ids": ["a", 7, null, "d", "e"]}, "threshold": 2});
    let (st, _, v) = s.post_json("/v1/contributions", &json_form).await;
    assert_eq!(st, 200, "{v}");
    let by_index: Vec<Value> = {
        let mut c = v["contributions"].as_array().unwrap().clone();
        c.sort_by_key(|c| c["index"].as_u64());
        c.iter().map(|c| c.get("id").cloned().unwrap_or(Value::Null)).collect()
    };
    assert_eq!(by_index, vec![json!("a"), json!(7), Value::Null, json!("d"), json!("e")]);
    // Without ids there is no `id` field at all.
    let (_, _, v) = s.post_json("/v1/contributions", &json!({"portfolio": {"probabilities": p}, "threshold": 2})).await;
    assert!(v["contributions"].as_array().unwrap().iter().all(|c| c.get("id").is_none()), "{v}");
    s.shutdown().await.unwrap();
}

#[tokio::test]
async fn bad_rows_point_at_row_and_column() {
    let s = start(&[]).await;
    let q = serde_json::to_vec(&json!({"portfolio": {}, "thresholds": [3]})).unwrap();
    let (mut p, ids) = (book(1100), ids(1100));
    p[1043] = 1.7;
    let (st, ct, got) =
        post_form(&s, "/v1/tail", form(&[("request", None, &q), ("exposures", Some("text/csv"), &csv(&p, &ids))]))
            .await;
    let v = json_of(&got);
    assert_problem(st, &ct, &v, 422, Some("/exposures/1043/probability"));
    let detail = v["errors"][0]["detail"].as_str().unwrap();
    assert_eq!(detail, "row 1043 (line 1045, id \"L-03130\"), column probability: 1.7 is not in [0, 1]");
    // Arrow: an out-of-range value and a null, in the second batch.
    p[1043] = 0.5;
    p[700] = -0.25;
    let probs: arrow_array::ArrayRef = Arc::new(arrow_array::Float64Array::from(
        p.iter().enumerate().map(|(i, &x)| if i == 900 { None } else { Some(x) }).collect::<Vec<_>>(),
    ));
    let stream = {
        use arrow_array::RecordBatch;
        let schema = Arc::new(arrow_schema::Schema::new(vec![
            arrow_schema::Field::new("probability", arrow_schema::DataType::Float64, true),
            arrow_schema::Field::new("id", arrow_schema::DataType::Utf8, false),
        ]));
        let mut out = Vec::new();
        let mut w = arrow_ipc::writer::StreamWriter::try_new(&mut out, &schema).unwrap();
        for (a, b) in [(0, 500), (500, 600)] {
            w.write(
                &RecordBatch::try_new(schema.clone(), vec![probs.slice(a, b), string_ids(&ids).slice(a, b)]).unwrap(),
            )
            .unwrap();
        }
        w.finish().unwrap();
        drop(w);
        out
    };
    let (st, ct, got) = post_form(
        &s,
        "/v1/tail",
        form(&[("request", None, &q), ("exposures", Some("application/vnd.apache.arrow.stream"), &stream)]),
    )
    .await;
    let v = json_of(&got);
    assert_problem(st, &ct, &v, 422, Some("/exposures/700/probability"));
    assert_problem(st, &ct, &v, 422, Some("/exposures/900/probability"));
    assert_eq!(v["errors"][0]["detail"], "row 700 (id \"L-02101\"), column probability: -0.25 is not in [0, 1]");
    // Not a number, a missing column, a wrong Arrow type.
    let semi = serde_json::to_vec(&json!({"portfolio": {}, "thresholds": [3], "table": {"delimiter": ";"}})).unwrap();
    let european = b"id;probability\na;0.1\nb;0,2\n".as_slice();
    let (st, ct, got) =
        post_form(&s, "/v1/tail", form(&[("request", None, &semi), ("exposures", Some("text/csv"), european)])).await;
    let v = json_of(&got);
    assert_problem(st, &ct, &v, 422, Some("/exposures/1/probability"));
    assert!(v["detail"].as_str().unwrap().contains("decimal separator"), "{v}");
    let (st, ct, got) =
        post_form(&s, "/v1/tail", form(&[("request", None, &q), ("exposures", Some("text/csv"), european)])).await;
    let v = json_of(&got);
    assert_problem(st, &ct, &v, 422, Some("/table/probability"));
    assert!(v["detail"].as_str().unwrap().contains("table.delimiter"), "{v}");
    let (st, ct, got) =
        post_form(&s, "/v1/tail", form(&[("request", None, &q), ("exposures", Some("text/csv"), b"pd,id\n0.1,a\n")]))
            .await;
    let v = json_of(&got);
    assert_problem(st, &ct, &v, 422, Some("/table/probability"));
    assert!(v["detail"].as_str().unwrap().contains("\"pd\""), "{v}");
    let f32s = {
        let schema = Arc::new(arrow_schema::Schema::new(vec![arrow_schema::Field::new(
            "probability",
            arrow_schema::DataType::Float32,
            false,
        )]));
        let mut out = Vec::new();
        let mut w = arrow_ipc::writer::StreamWriter::try_new(&mut out, &schema).unwrap();
        let col: arrow_array::ArrayRef = Arc::new(arrow_array::Float32Array::from(vec![0.5f32]));
        w.write(&arrow_array::RecordBatch::try_new(schema.clone(), vec![col]).unwrap()).unwrap();
        w.finish().unwrap();
        drop(w);
        out
    };
    let (st, ct, got) = post_form(
        &s,
        "/v1/tail",
        form(&[("request", None, &q), ("exposures", Some("application/vnd.apache.arrow.stream"), &f32s)]),
    )
    .await;
    assert_problem(st, &ct, &json_of(&got), 422, Some("/exposures/probability"));
    // The request part's own problems keep their pointers; the JSON form names ids in its problems.
    let bad_q = serde_json::to_vec(&json!({"portfolio": {}, "thresholds": [-1]})).unwrap();
    let (st, ct, got) = post_form(
        &s,
        "/v1/tail",
        form(&[("request", None, &bad_q), ("exposures", Some("text/csv"), b"probability\n0.1\n")]),
    )
    .await;
    assert_problem(st, &ct, &json_of(&got), 422, Some("/thresholds/0"));
    let (st, ct, v) = s
        .post_json(
            "/v1/tail",
            &json!({"portfolio": {"probabilities": [0.1, 2.0], "ids": ["ok", "K-9"]}, "thresholds": [1]}),
        )
        .await;
    assert_problem(st, &ct, &v, 422, Some("/portfolio/probabilities/1"));
    assert!(v["errors"][0]["detail"].as_str().unwrap().contains("\"K-9\""), "{v}");
    let (st, ct, v) = s
        .post_json("/v1/tail", &json!({"portfolio": {"probabilities": [0.1, 0.2], "ids": ["a"]}, "thresholds": [1]}))
        .await;
    assert_problem(st, &ct, &v, 422, Some("/portfolio/ids"));
    let mut spec = json!({"portfolio": {}, "thresholds": [1], "table": {"delimiter": "ab"}});
    let (st, ct, got) = post_form(
        &s,
        "/v1/tail",
        form(&[
            ("request", None, &serde_json::to_vec(&spec).unwrap()),
            ("exposures", Some("text/csv"), b"probability\n0.1\n"),
        ]),
    )
    .await;
    assert_problem(st, &ct, &json_of(&got), 422, Some("/table/delimiter"));
    spec["table"] = json!({"probability": "p"});
    let (st, ct, got) =
        post_form(&s, "/v1/tail", form(&[("request", None, &serde_json::to_vec(&spec).unwrap())])).await;
    assert_problem(st, &ct, &json_of(&got), 422, Some("/table"));
    s.shutdown().await.unwrap();
}

#[tokio::test]
async fn oversize_tables_are_refused_with_413() {
    let s = start(&["--max-listed-exposures", "100", "--max-body-bytes", "20000"]).await;
    let q = serde_json::to_vec(&json!({"portfolio": {"probabilities": [0.1, 0.2]}, "thresholds": [3]})).unwrap();
    let p = book(99);
    let mut small = String::from("probability\n");
    p.iter().for_each(|x| small.push_str(&format!("{x}\n")));
    // 2 listed in the JSON + 99 rows > 100.
    for (ct, table) in
        [("text/csv", small.into_bytes()), ("application/vnd.apache.arrow.stream", arrow_stream(&p, None, 40))]
    {
        let (st, ctype, got) =
            post_form(&s, "/v1/tail", form(&[("request", None, &q), ("exposures", Some(ct), &table)])).await;
        let v = json_of(&got);
        assert_problem(st, &ctype, &v, 413, None);
        assert!(v["detail"].as_str().unwrap().contains("--max-listed-exposures"), "{v}");
    }
    // Over the body limit, whatever the rows.
    let big = vec![b'0'; 30_000];
    let (st, ctype, got) =
        post_form(&s, "/v1/tail", form(&[("request", None, &q), ("exposures", Some("text/csv"), &big)])).await;
    assert_problem(st, &ctype, &json_of(&got), 413, None);
    s.shutdown().await.unwrap();
}

#[tokio::test]
async fn wrong_content_types_are_refused_with_415_and_broken_bodies_with_400() {
    let s = start(&[]).await;
    let q = serde_json::to_vec(&json!({"portfolio": {}, "thresholds": [1]})).unwrap();
    let csv = b"probability\n0.5\n".as_slice();
    for body in [
        form(&[("request", None, &q), ("exposures", Some("application/octet-stream"), csv)]),
        form(&[("request", None, &q), ("exposures", None, csv)]),
        form(&[("request", None, &q), ("exposures", Some("application/vnd.apache.arrow.file"), csv)]),
        form(&[("request", Some("text/plain"), &q), ("exposures", Some("text/csv"), csv)]),
        form(&[("request", None, &q), ("exposures", Some("application/vnd.apache.arrow.stream"), b"ARROW1\0\0rest")]),
    ] {
        let (st, ct, got) = post_form(&s, "/v1/tail", body).await;
        assert_problem(st, &ct, &json_of(&got), 415, None);
    }
    let (st, ct, got) = post_typed(&s, "/v1/quantiles", "text/csv", csv.to_vec()).await;
    assert_problem(st, &ct, &json_of(&got), 415, None);
    let (st, ct, got) = post_typed(&s, "/v1/tail", "multipart/form-data", form(&[("request", None, &q)])).await;
    assert_problem(st, &ct, &json_of(&got), 400, None);
    for body in [
        b"not multipart at all".to_vec(),
        form(&[("exposures", Some("text/csv"), csv)]),
        form(&[("request", None, &q), ("request", None, &q)]),
        form(&[("request", None, &q), ("table", None, b"{}")]),
        form(&[("request", None, b"{\"portfolio\": ")]),
        form(&[
            ("request", None, &q),
            ("exposures", Some("application/vnd.apache.arrow.stream"), b"\xff\xff\xff\xff\x10\0\0\0garbage!"),
        ]),
        form(&[
            ("request", None, &q),
            ("exposures", Some("application/vnd.apache.arrow.stream"), &arrow_stream(&[0.5; 10], None, 10)[..200]),
        ]),
    ] {
        let (st, ct, got) = post_form(&s, "/v1/tail", body).await;
        assert_problem(st, &ct, &json_of(&got), 400, None);
    }
    // The service still answers.
    let (st, _, _) =
        post_form(&s, "/v1/tail", form(&[("request", None, &q), ("exposures", Some("text/csv"), csv)])).await;
    assert_eq!(st, 200);
    s.shutdown().await.unwrap();
}
