//! The real binary over plain sockets: graceful shutdown on SIGTERM, the request timeout, admission control
//! and responsiveness under load. Requests are held in flight by withholding their last body byte, so no
//! test depends on how fast the machine computes; waits have only a generous hang guard.

mod common;
use common::{Process, RawRequest};
use serde_json::{json, Value};

/// A request whose exact answer takes a while: 10^6 generated exposures, `thresholds` tail points around
/// mean + 0..3 sd (mean 1e5, sd about 294). The body stays small.
fn heavy_body(thresholds: usize) -> Vec<u8> {
    let ks: Vec<u64> = (0..thresholds).map(|i| 100_000 + (i as u64 * 900) / thresholds.max(1) as u64).collect();
    serde_json::to_vec(&json!({
        "portfolio": {"families": [{"kind": "linear", "n": 1_000_000, "first": 0.0, "last": 0.2}]},
        "thresholds": ks,
    }))
    .unwrap()
}

fn assert_full_answer(v: &Value, thresholds: usize) {
    assert_eq!(v["summary"]["exposures"], 1_000_000, "{v}");
    let results = v["results"].as_array().expect("results");
    assert_eq!(results.len(), thresholds);
    let mut last = 1.0;
    for r in results {
        let e = &r["estimates"][0];
        assert_eq!(e["method"], "exact");
        let p = e["probability"].as_f64().unwrap();
        assert!(p > 0.0 && p <= last, "upper tails decrease: {p} after {last}");
        assert!(e["error_bound"].as_f64().unwrap() <= 1e-6 * p, "{e}");
        last = p;
    }
}

fn assert_problem(r: &common::RawResponse, status: u16, kind: &str) {
    assert_eq!(r.status, status, "{}", r.body);
    assert!(r.header("content-type").unwrap_or("").starts_with("application/problem+json"), "{:?}", r.headers);
    let v = r.json();
    assert_eq!(v["status"], status);
    assert_eq!(v["type"], kind);
    assert!(v["title"].is_string() && v["detail"].is_string());
}

#[test]
fn sigterm_finishes_the_request_in_flight_refuses_new_connections_and_exits_0() {
    let mut p = Process::start(&[]);
    let body = heavy_body(8);
    let mut held = RawRequest::send_head(p.addr, "POST", "/v1/tail", &body, 1);
    // The server has the request (not merely the connection) before the signal: a connection whose request
    // has not arrived yet may rightly be closed by a graceful shutdown. (It is reading the body, which comes
    // before the computing turn.)
    p.wait_for_metric("tailtally_http_requests_in_flight{route=\"/v1/tail\"} ", 1.0);
    p.sigterm();
    p.wait_for_log("shutdown signal received");
    let deadline = std::time::Instant::now() + common::HANG_GUARD;
    loop {
        match std::net::TcpStream::connect(p.addr) {
            Err(e) => {
                assert_eq!(e.kind(), std::io::ErrorKind::ConnectionRefused, "{e}");
                break;
            }
            Ok(_) => assert!(std::time::Instant::now() < deadline, "the listener stayed open after SIGTERM"),
        }
        std::thread::sleep(std::time::Duration::from_millis(10));
    }
    // Refused while the process lives: it waits for our request, whose last byte it has not seen.
    assert!(p.is_running(), "the process exited with a request in flight");
    let r = held.finish();
    assert_eq!(r.status, 200, "{}", r.body);
    assert_full_answer(&r.json(), 8);
    let status = p.wait_exit();
    assert_eq!(status.code(), Some(0), "{status}");
    p.wait_for_log("stopped");
}

#[test]
fn timeout_answers_408_problem_and_the_probes_stay_up() {
    let p = Process::start(&["--request-timeout-ms", "1"]);
    // Held: the handler waits for the body, the clock runs out.
    let mut held = RawRequest::send_head(p.addr, "POST", "/v1/tail", &heavy_body(2), 1);
    assert_problem(&held.read_answer(), 408, "/problems/timeout");
    // Heavy: 10^6 exposures cannot be read, expanded and computed in a millisecond.
    let r = p.request("POST", "/v1/tail", Some(&heavy_body(4)));
    assert_problem(&r, 408, "/problems/timeout");
    // The probes are outside the computing routes' timeout and answer while the timed-out work finishes.
    let h = p.request("GET", "/healthz", None);
    assert_eq!(h.status, 200);
    assert_eq!(h.json()["status"], "ok");
    assert_eq!(p.request("GET", "/readyz", None).status, 200);
    assert_eq!(
        p.metric("tailtally_http_problems_total{route=\"/v1/tail\",type=\"/problems/timeout\",status=\"408\"}"),
        Some(2.0)
    );
}

#[test]
fn over_the_concurrency_and_queue_limits_answers_503_problem_and_probes_stay_up() {
    let p = Process::start(&["--max-concurrency", "1", "--max-queued", "1"]);
    let small = br#"{"portfolio": {"probabilities": [0.1, 0.2, 0.3]}, "thresholds": [1, 2]}"#;
    // A request's body is read before it asks for a turn, so what holds a turn here is a batch, which takes
    // its turn first and streams: its one line stays unfinished until the last byte.
    let line = br#"{"id": 1, "tail": {"portfolio": {"probabilities": [0.1, 0.2, 0.3]}, "thresholds": [1, 2]}}
"#;
    let ndjson = "application/x-ndjson";
    let mut running = RawRequest::send_head_as(p.addr, "POST", "/v1/batch", ndjson, line, 1);
    p.wait_for_metric("tailtally_compute_running ", 1.0);
    let mut waiting = RawRequest::send_head_as(p.addr, "POST", "/v1/batch", ndjson, line, 1);
    p.wait_for_metric("tailtally_compute_queued ", 1.0);
    // No place left: refused at once, with a hint when to retry.
    let r = p.request("POST", "/v1/tail", Some(small));
    assert_problem(&r, 503, "/problems/overloaded");
    assert_eq!(r.header("retry-after"), Some("1"));
    assert_eq!(p.request("GET", "/healthz", None).status, 200);
    assert_eq!(p.request("GET", "/openapi.json", None).status, 200);
    // The held ones complete once their bodies arrive, the queued one after the running one.
    let a = running.finish();
    assert_eq!(a.status, 200, "{}", a.body);
    assert!(a.body.contains("\"id\":1,\"tail\""), "{}", a.body);
    let b = waiting.finish();
    assert_eq!(b.status, 200, "{}", b.body);
    assert!(b.body.contains("\"id\":1,\"tail\""), "{}", b.body);
    assert_eq!(p.request("POST", "/v1/tail", Some(small)).status, 200);
    assert_eq!(p.metric("tailtally_compute_running "), Some(0.0));
    assert_eq!(p.metric("tailtally_compute_queued "), Some(0.0));
}

#[test]
fn probes_answer_while_every_core_computes() {
    // More heavy requests than the runtime has worker threads (one per core): were the work done on the
    // async threads, no thread would be left to answer /healthz until they finish.
    let n = std::thread::available_parallelism().map_or(2, |n| n.get()) + 1;
    let p = Process::start(&[]);
    let body = heavy_body(16);
    let workers: Vec<_> = (0..n)
        .map(|_| {
            let (addr, body) = (p.addr, body.clone());
            std::thread::spawn(move || RawRequest::send_head(addr, "POST", "/v1/tail", &body, 0).finish())
        })
        .collect();
    p.wait_for_metric("tailtally_compute_running ", n as f64);
    let h = p.request("GET", "/healthz", None);
    assert_eq!(h.status, 200);
    // Answered while they all still ran (each takes about a second of CPU; /healthz a few microseconds).
    assert_eq!(p.metric("tailtally_compute_running "), Some(n as f64), "the heavy requests ended too soon to tell");
    for w in workers {
        let r = w.join().unwrap();
        assert_eq!(r.status, 200, "{}", r.body);
        assert_full_answer(&r.json(), 16);
    }
}
