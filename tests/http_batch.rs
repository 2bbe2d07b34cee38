//! POST /v1/batch end to end on the real server, and `tailtally eval` as the real binary on the same input.

mod common;
use common::{assert_problem, start, Process};
use serde_json::{json, Value};

const NDJSON: &str = "application/x-ndjson";

fn lines(text: &str) -> Vec<Value> {
    assert!(text.is_empty() || text.ends_with('\n'), "every answer ends its line: {text:?}");
    text.lines()
        .map(|l| serde_json::from_str(l).unwrap_or_else(|e| panic!("answer line not JSON ({e}): {l}")))
        .collect()
}

async fn post_batch(s: &common::Server, body: &str) -> (u16, String, String) {
    let res = s
        .client
        .post(format!("{}/v1/batch", s.base))
        .header("content-type", NDJSON)
        .body(body.to_string())
        .send()
        .await
        .expect("request");
    let status = res.status().as_u16();
    let ct = res.headers().get("content-type").map(|v| v.to_str().unwrap().to_string()).unwrap_or_default();
    (status, ct, res.text().await.unwrap())
}

fn pointers(v: &Value) -> Vec<&str> {
    v["problem"]["errors"]
        .as_array()
        .map(|a| a.iter().filter_map(|e| e["pointer"].as_str()).collect())
        .unwrap_or_default()
}

/// Good and bad lines of every kind, with a blank line; the expected key or problem status of each answer.
fn mixed_batch() -> (String, Vec<(Value, &'static str, u16)>) {
    let input = [
        json!({"id": 1, "tail": {"portfolio": {"probabilities": [0.1, 0.2, 0.3]}, "thresholds": [1, 2]}}).to_string(),
        "{\"id\": 2, \"tail\": {\"portfolio\": ".to_string(),
        String::new(),
        json!({"id": "three", "chart": {"portfolio": {}, "threshold": 1}}).to_string(),
        json!({"id": 4, "tail": {"portfolio": {"probabilities": [0.1]}, "thresholds": [-3]}}).to_string(),
        json!({"id": "five", "quantiles": {"portfolio": {"groups": [{"size": 100, "probability": 0.05}]}, "levels": [0.5, 0.99]}}).to_string(),
        json!({"id": 6, "distribution": {"portfolio": {"probabilities": [0.5, 0.5]}, "from": 0, "to": 2}}).to_string(),
        json!({"id": 7, "layers": {"portfolio": {"probabilities": [0.5, 0.5]}, "layers": [{"attachment": 1}]}}).to_string(),
        json!({"id": 8, "quantiles": {"portfolio": {"probabilities": [0.5]}, "levels": [1.5]}}).to_string(),
    ]
    .join("\n");
    let want = vec![
        (json!(1), "tail", 200),
        (Value::Null, "problem", 400),
        (json!("three"), "problem", 422),
        (json!(4), "problem", 422),
        (json!("five"), "quantiles", 200),
        (json!(6), "distribution", 200),
        (json!(7), "layers", 200),
        (json!(8), "problem", 422),
    ];
    (input + "\n", want)
}

#[tokio::test]
async fn mixed_lines_are_answered_in_order_with_their_ids_and_problems_point_into_the_line() {
    let s = start(&[]).await;
    let (input, want) = mixed_batch();
    let (status, ct, text) = post_batch(&s, &input).await;
    assert_eq!(status, 200, "{text}");
    assert!(ct.starts_with(NDJSON), "{ct}");
    let got = lines(&text);
    assert_eq!(got.len(), want.len(), "{text}");
    for (v, (id, key, st)) in got.iter().zip(&want) {
        assert_eq!(&v["id"], id, "{v}");
        assert!(v.get(*key).is_some(), "expected `{key}`: {v}");
        assert_eq!(v.as_object().unwrap().len(), 2, "id and one answer: {v}");
        if *key == "problem" {
            let p = &v["problem"];
            assert_eq!(p["status"], *st, "{v}");
            assert!(p["type"].is_string() && p["title"].is_string(), "{v}");
        }
    }
    // S = B(0.1) + B(0.2) + B(0.3): P(S >= 2) = 0.1*0.2 + 0.1*0.3 + 0.2*0.3 - 2*0.1*0.2*0.3 = 0.098.
    let p2 = got[0]["tail"]["results"][1]["estimates"][0]["probability"].as_f64().unwrap();
    assert!((p2 - 0.098).abs() < 1e-12, "{p2}");
    assert_eq!(got[5]["distribution"]["pmf"], json!([0.25, 0.5, 0.25]));
    // Line numbers count the blank line: the answers name lines 2, 4, 5 and 9.
    let detail = |i: usize| got[i]["problem"]["detail"].as_str().unwrap().to_string();
    assert!(detail(1).starts_with("line 2, column"), "{}", detail(1));
    assert!(pointers(&got[2]).contains(&"/chart"), "{}", got[2]);
    assert!(detail(2).starts_with("line 4: "), "{}", detail(2));
    assert_eq!(pointers(&got[3]), ["/tail/thresholds/0"]);
    assert!(detail(3).starts_with("line 5: /tail/thresholds/0"), "{}", detail(3));
    assert_eq!(pointers(&got[7]), ["/quantiles/levels/0"]);
    assert!(detail(7).starts_with("line 9: "), "{}", detail(7));
}

#[tokio::test]
async fn ten_thousand_small_lines_stream_back_complete_and_in_order() {
    let s = start(&[]).await;
    let n = 10_000usize;
    let mut input = String::new();
    for i in 0..n {
        // Each portfolio differs, so an answer in the wrong place would show in its summary too.
        let line = json!({"id": i, "tail": {"portfolio": {"probabilities": [0.1, 0.2], "groups": [{"size": i + 1, "probability": 0.01}]}, "thresholds": [1]}});
        input.push_str(&line.to_string());
        input.push('\n');
    }
    let (status, _, text) = post_batch(&s, &input).await;
    assert_eq!(status, 200);
    let got = lines(&text);
    assert_eq!(got.len(), n);
    for (i, v) in got.iter().enumerate() {
        assert_eq!(v["id"], i, "answer {i} out of order");
        assert_eq!(v["tail"]["summary"]["exposures"], i + 3, "{v}");
    }
}

#[tokio::test]
async fn wrong_content_type_is_415_and_an_empty_batch_is_an_empty_answer() {
    let s = start(&[]).await;
    let (input, _) = mixed_batch();
    let (status, ct, v) = s.post_raw("/v1/batch", "application/json", input.into_bytes()).await;
    assert_problem(status, &ct, &v, 415, None);
    let (status, ct, text) = post_batch(&s, "\n\n").await;
    assert_eq!((status, ct.as_str(), text.as_str()), (200, NDJSON, ""));
}

#[tokio::test]
async fn a_line_over_the_body_limit_is_a_413_line_and_the_batch_goes_on() {
    let s = start(&["--max-body-bytes", "200"]).await;
    let small = json!({"id": "a", "tail": {"portfolio": {"probabilities": [0.5]}, "thresholds": [1]}}).to_string();
    let big =
        json!({"id": "b", "tail": {"portfolio": {"probabilities": vec![0.5; 100]}, "thresholds": [1]}}).to_string();
    assert!(small.len() <= 200 && big.len() > 200);
    // The whole body is over the limit too: a batch is limited line by line, not as a whole.
    let input = format!("{small}\n{big}\n{small}\n{small}");
    assert!(input.len() > 200);
    let (status, _, text) = post_batch(&s, &input).await;
    assert_eq!(status, 200, "{text}");
    let got = lines(&text);
    assert_eq!(got.len(), 4, "{text}");
    assert_eq!(got[1]["problem"]["status"], 413, "{}", got[1]);
    assert!(got[1]["problem"]["detail"].as_str().unwrap().starts_with("line 2: "), "{}", got[1]);
    for i in [0, 2, 3] {
        assert_eq!(got[i]["id"], "a");
        assert_eq!(got[i]["tail"]["results"][0]["estimates"][0]["probability"], 0.5, "{}", got[i]);
    }
}

#[tokio::test]
async fn beyond_max_batch_lines_the_stream_ends_with_one_413_line() {
    let s = start(&["--max-batch-lines", "3"]).await;
    let line =
        |i: usize| json!({"id": i, "tail": {"portfolio": {"probabilities": [0.5]}, "thresholds": [0]}}).to_string();
    let input: String = (0..6).map(|i| line(i) + "\n\n").collect();
    let (status, _, text) = post_batch(&s, &input).await;
    assert_eq!(status, 200);
    let got = lines(&text);
    assert_eq!(got.len(), 4, "{text}");
    for (i, v) in got.iter().take(3).enumerate() {
        assert_eq!(v["id"], i);
        assert!(v.get("tail").is_some(), "{v}");
    }
    assert_eq!(got[3]["id"], Value::Null);
    assert_eq!(got[3]["problem"]["status"], 413);
    // The fourth line is line 7 (each request line is followed by a blank one).
    assert!(got[3]["problem"]["detail"].as_str().unwrap().starts_with("line 7: "), "{}", got[3]);
}

#[tokio::test]
async fn a_line_over_the_request_timeout_is_a_408_line() {
    let s = start(&["--request-timeout-ms", "1"]).await;
    // 10^6 generated exposures at 8 thresholds: far more than a millisecond of work on any machine.
    let ks: Vec<u64> = (0..8).map(|i| 100_000 + i * 100).collect();
    let heavy = json!({"id": "slow", "tail": {"portfolio": {"families": [{"kind": "linear", "n": 1_000_000, "first": 0.0, "last": 0.2}]}, "thresholds": ks}});
    let (status, _, text) = post_batch(&s, &format!("{heavy}\n")).await;
    assert_eq!(status, 200);
    let got = lines(&text);
    assert_eq!(got.len(), 1, "{text}");
    assert_eq!(got[0]["id"], "slow");
    assert_eq!(got[0]["problem"]["status"], 408, "{}", got[0]);
}

/// An answer with its timings removed: they are the only figures that differ from run to run.
fn without_timings(mut v: Value) -> Value {
    fn strip(v: &mut Value) {
        match v {
            Value::Object(m) => {
                m.remove("elapsed_us");
                m.values_mut().for_each(strip);
            }
            Value::Array(a) => a.iter_mut().for_each(strip),
            _ => {}
        }
    }
    strip(&mut v);
    v
}

#[tokio::test]
async fn eval_on_a_file_answers_as_the_http_batch_does() {
    let s = start(&[]).await;
    let (input, want) = mixed_batch();
    let (_, _, http) = post_batch(&s, &input).await;
    let dir = std::env::temp_dir().join(format!("tailtally-eval-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let file = dir.join("batch.ndjson");
    std::fs::write(&file, &input).unwrap();
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_tailtally")).arg("eval").arg(&file).output().unwrap();
    std::fs::remove_dir_all(&dir).unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let cli = String::from_utf8(out.stdout).unwrap();
    let (a, b): (Vec<Value>, Vec<Value>) = (
        lines(&http).into_iter().map(without_timings).collect(),
        lines(&cli).into_iter().map(without_timings).collect(),
    );
    assert_eq!(a.len(), want.len());
    assert_eq!(a, b);
}

#[test]
fn eval_reads_standard_input_and_fails_only_on_io_errors() {
    let (input, want) = mixed_batch();
    let out = common::eval_stdin(&input);
    assert!(out.status.success(), "problem lines are answers, not failures");
    let got = lines(std::str::from_utf8(&out.stdout).unwrap());
    let ids: Vec<&Value> = got.iter().map(|v| &v["id"]).collect();
    assert_eq!(ids, want.iter().map(|w| &w.0).collect::<Vec<_>>());
    let missing = std::process::Command::new(env!("CARGO_BIN_EXE_tailtally"))
        .args(["eval", "/nonexistent/tailtally/batch.ndjson"])
        .output()
        .unwrap();
    assert!(!missing.status.success());
    assert!(String::from_utf8_lossy(&missing.stderr).contains("cannot open"));
}

#[test]
fn a_streaming_batch_holds_its_admission_turn_until_its_answer_ends() {
    use std::io::{Read, Write};
    let p = Process::start(&["--max-concurrency", "1", "--max-queued", "0"]);
    let first = json!({"id": 1, "tail": {"portfolio": {"probabilities": [0.5]}, "thresholds": [1]}}).to_string() + "\n";
    let second =
        json!({"id": 2, "tail": {"portfolio": {"probabilities": [0.5]}, "thresholds": [0]}}).to_string() + "\n";
    let mut stream = std::net::TcpStream::connect(p.addr).unwrap();
    stream.set_read_timeout(Some(common::HANG_GUARD)).unwrap();
    let head = format!(
        "POST /v1/batch HTTP/1.1\r\nhost: {}\r\ncontent-type: {NDJSON}\r\ncontent-length: {}\r\nconnection: close\r\n\r\n",
        p.addr,
        first.len() + second.len()
    );
    stream.write_all(head.as_bytes()).unwrap();
    stream.write_all(first.as_bytes()).unwrap();
    // The first answer arrives while the body is still incomplete: the batch is streaming, and its handler
    // has long returned.
    let mut seen = Vec::new();
    let mut buf = [0u8; 4096];
    while !String::from_utf8_lossy(&seen).contains("\"id\":1,\"tail\"") {
        let n = stream.read(&mut buf).unwrap();
        assert!(n > 0, "connection closed early: {}", String::from_utf8_lossy(&seen));
        seen.extend_from_slice(&buf[..n]);
    }
    assert_eq!(p.metric("tailtally_compute_running "), Some(1.0));
    let other = p.request("POST", "/v1/tail", Some(first.as_bytes()));
    assert_eq!(other.status, 503, "the only turn is the batch's: {}", other.body);
    stream.write_all(second.as_bytes()).unwrap();
    stream.read_to_end(&mut seen).unwrap();
    let text = String::from_utf8(seen).unwrap();
    assert!(text.contains("\"id\":2,\"tail\""), "{text}");
    p.wait_for_metric("tailtally_compute_running ", 0.0);
    let after =
        p.request("POST", "/v1/tail", Some(b"{\"portfolio\": {\"probabilities\": [0.5]}, \"thresholds\": [1]}"));
    assert_eq!(after.status, 200, "{}", after.body);
}

#[test]
fn a_client_that_expects_100_continue_is_told_to_send_the_body_before_any_answer() {
    use std::io::{Read, Write};
    let p = Process::start(&[]);
    let body = json!({"id": 1, "tail": {"portfolio": {"probabilities": [0.5]}, "thresholds": [1]}}).to_string() + "\n";
    let mut stream = std::net::TcpStream::connect(p.addr).unwrap();
    stream.set_read_timeout(Some(common::HANG_GUARD)).unwrap();
    let head = format!(
        "POST /v1/batch HTTP/1.1\r\nhost: {}\r\ncontent-type: {NDJSON}\r\ncontent-length: {}\r\nexpect: 100-continue\r\nconnection: close\r\n\r\n",
        p.addr,
        body.len()
    );
    stream.write_all(head.as_bytes()).unwrap();
    let mut seen = Vec::new();
    let mut buf = [0u8; 1024];
    while !seen.windows(4).any(|w| w == b"\r\n\r\n") {
        let n = stream.read(&mut buf).unwrap();
        assert!(n > 0, "closed: {}", String::from_utf8_lossy(&seen));
        seen.extend_from_slice(&buf[..n]);
    }
    let text = String::from_utf8_lossy(&seen).to_string();
    assert!(text.starts_with("HTTP/1.1 100 Continue\r\n"), "{text}");
    stream.write_all(body.as_bytes()).unwrap();
    stream.read_to_end(&mut seen).unwrap();
    let text = String::from_utf8(seen).unwrap();
    assert!(text.contains("HTTP/1.1 200 OK") && text.contains("\"id\":1,\"tail\""), "{text}");
}

#[test]
fn a_stalled_body_ends_the_batch_with_a_problem_line_and_frees_the_turn() {
    use std::io::{Read, Write};
    let p = Process::start(&["--request-timeout-ms", "300", "--max-concurrency", "1"]);
    let first = json!({"id": 1, "tail": {"portfolio": {"probabilities": [0.5]}, "thresholds": [1]}}).to_string() + "\n";
    let mut stream = std::net::TcpStream::connect(p.addr).unwrap();
    stream.set_read_timeout(Some(common::HANG_GUARD)).unwrap();
    // The body is announced longer than what is sent, and the rest never comes.
    let head = format!(
        "POST /v1/batch HTTP/1.1\r\nhost: {}\r\ncontent-type: {NDJSON}\r\ncontent-length: {}\r\nconnection: close\r\n\r\n",
        p.addr,
        first.len() + 1000
    );
    stream.write_all(head.as_bytes()).unwrap();
    stream.write_all(first.as_bytes()).unwrap();
    let mut seen = Vec::new();
    let _ = stream.read_to_end(&mut seen);
    let text = String::from_utf8_lossy(&seen).to_string();
    assert!(text.contains("\"id\":1,\"tail\""), "{text}");
    assert!(text.contains("line 2: the input could not be read further: no input for 300 ms"), "{text}");
    p.wait_for_metric("tailtally_compute_running ", 0.0);
}
