//! The real binary against abusive clients, over plain sockets: partial heads, idle keep-alive connections,
//! more connections than the cap (and than the reserved places), bodies that trickle, bodies beyond the in-flight budget, and SIGTERM while
//! a client holds an upload. Each test starts the server with small limits so that it is quick; what is
//! checked is the mechanism (cut off, refused, answered), with timing checks no tighter than "within three
//! times the limit".

mod common;
use common::{Process, RawRequest, HANG_GUARD};
use serde_json::Value;
use std::io::{Read, Write};
use std::net::TcpStream;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

const SMALL: &[u8] = br#"{"portfolio": {"probabilities": [0.1, 0.2, 0.3]}, "thresholds": [1, 2]}"#;

fn connect(p: &Process) -> TcpStream {
    let s = TcpStream::connect(p.addr).expect("connect");
    s.set_read_timeout(Some(HANG_GUARD)).unwrap();
    s
}

/// Read until the server closes the connection (end of file or reset); what arrived before.
fn read_until_closed(s: &mut TcpStream) -> Vec<u8> {
    let mut seen = Vec::new();
    let mut buf = [0u8; 4096];
    loop {
        match s.read(&mut buf) {
            Ok(0) => return seen,
            Ok(n) => seen.extend_from_slice(&buf[..n]),
            Err(e) if e.kind() == std::io::ErrorKind::ConnectionReset => return seen,
            Err(e) => panic!("read failed (hang guard?): {e}"),
        }
    }
}

/// One answer with a content length read off a connection that stays open: status, headers (lower case), body.
fn read_answer(s: &mut TcpStream) -> (u16, Vec<(String, String)>, String) {
    let mut seen = Vec::new();
    let mut buf = [0u8; 1];
    while !seen.ends_with(b"\r\n\r\n") {
        let n = s.read(&mut buf).expect("read the head");
        assert!(n > 0, "closed before a whole head: {:?}", String::from_utf8_lossy(&seen));
        seen.push(buf[0]);
    }
    let head = String::from_utf8(seen).unwrap();
    let mut lines = head.trim_end().split("\r\n");
    let status = lines.next().unwrap().split(' ').nth(1).unwrap().parse().unwrap();
    let headers: Vec<(String, String)> = lines
        .filter_map(|l| l.split_once(':'))
        .map(|(k, v)| (k.trim().to_ascii_lowercase(), v.trim().to_string()))
        .collect();
    let len: usize = headers.iter().find(|(k, _)| k == "content-length").expect("content-length").1.parse().unwrap();
    let mut body = vec![0u8; len];
    s.read_exact(&mut body).unwrap();
    (status, headers, String::from_utf8(body).unwrap())
}

fn status_of(raw: &[u8]) -> Option<u16> {
    let text = String::from_utf8_lossy(raw);
    text.strip_prefix("HTTP/1.1 ")?.get(..3)?.parse().ok()
}

fn body_json(raw: &[u8]) -> Value {
    let text = String::from_utf8_lossy(raw);
    let (_, body) = text.split_once("\r\n\r\n").expect("a head");
    serde_json::from_str(body).unwrap_or_else(|e| panic!("not JSON ({e}): {body}"))
}

/// A sample of /metrics, retried while the answer is a refusal (a reserved place may still be held by the
/// previous probe's connection for a moment after its answer).
fn metric(p: &Process, prefix: &str) -> f64 {
    let deadline = Instant::now() + HANG_GUARD;
    loop {
        let mut s = connect(p);
        s.write_all(b"GET /metrics HTTP/1.1\r\nhost: x\r\nconnection: close\r\n\r\n").unwrap();
        let raw = read_until_closed(&mut s);
        if status_of(&raw) == Some(200) {
            let text = String::from_utf8_lossy(&raw);
            let line = text.lines().find(|l| l.starts_with(prefix)).unwrap_or_else(|| panic!("no {prefix}"));
            return line.rsplit(' ').next().unwrap().parse().unwrap();
        }
        assert!(Instant::now() < deadline, "no /metrics answer: {}", String::from_utf8_lossy(&raw));
        std::thread::sleep(Duration::from_millis(20));
    }
}

fn wait_for(p: &Process, prefix: &str, want: impl Fn(f64) -> bool) {
    let deadline = Instant::now() + HANG_GUARD;
    while !want(metric(p, prefix)) {
        assert!(Instant::now() < deadline, "{prefix} never reached the value wanted");
        std::thread::sleep(Duration::from_millis(10));
    }
}

/// One request on a connection beyond the full places, retried while the reserved place is still held by
/// the connection before (it is given back a moment after that one's answer); what came back.
fn on_reserved_place(p: &Process, request: &[u8]) -> Vec<u8> {
    let deadline = Instant::now() + HANG_GUARD;
    loop {
        let mut s = connect(p);
        let _ = s.write_all(request);
        let raw = read_until_closed(&mut s);
        let refused = raw.is_empty() || String::from_utf8_lossy(&raw).contains("(see --max-connections); retry later");
        if !refused {
            return raw;
        }
        assert!(Instant::now() < deadline, "the reserved place was never free");
        std::thread::sleep(Duration::from_millis(20));
    }
}

/// Time until the server closes `s`, reading (and discarding) whatever it sends.
fn time_to_close(mut s: TcpStream) -> Duration {
    let t = Instant::now();
    read_until_closed(&mut s);
    t.elapsed()
}

fn assert_cut_within(took: Duration, limit: Duration, what: &str) {
    assert!(took >= limit.mul_f64(0.9), "{what}: closed after {took:?}, before the limit {limit:?}");
    assert!(took <= limit * 3, "{what}: closed after {took:?}, not within 3 x {limit:?}");
}

/// Sends `head` and then `body` one byte every `every` on its own thread, until told to stop or the
/// connection fails; the connection's reading half is returned.
struct Trickle {
    reader: TcpStream,
    stop: Arc<AtomicBool>,
    writer: Option<std::thread::JoinHandle<usize>>,
}

impl Trickle {
    fn start(p: &Process, head: String, body: Vec<u8>, every: Duration) -> Trickle {
        let reader = connect(p);
        let mut w = reader.try_clone().unwrap();
        let stop = Arc::new(AtomicBool::new(false));
        let stop2 = stop.clone();
        w.write_all(head.as_bytes()).unwrap();
        let writer = std::thread::spawn(move || {
            let mut sent = 0;
            for b in body {
                std::thread::sleep(every);
                if stop2.load(Ordering::Relaxed) || w.write_all(&[b]).is_err() {
                    break;
                }
                sent += 1;
            }
            sent
        });
        Trickle { reader, stop, writer: Some(writer) }
    }

    /// Read until the server closes; the writer stops as soon as anything arrives.
    fn answer(&mut self) -> Vec<u8> {
        let mut seen = Vec::new();
        let mut buf = [0u8; 4096];
        loop {
            match self.reader.read(&mut buf) {
                Ok(0) => break,
                Ok(n) => {
                    self.stop.store(true, Ordering::Relaxed);
                    seen.extend_from_slice(&buf[..n]);
                }
                Err(e) if e.kind() == std::io::ErrorKind::ConnectionReset => break,
                Err(e) => panic!("read failed: {e}"),
            }
        }
        self.stop.store(true, Ordering::Relaxed);
        seen
    }
}

impl Drop for Trickle {
    fn drop(&mut self) {
        self.stop.store(true, Ordering::Relaxed);
        let _ = self.reader.shutdown(std::net::Shutdown::Both);
        if let Some(w) = self.writer.take() {
            let _ = w.join();
        }
    }
}

fn post_head(path: &str, ctype: &str, len: usize) -> String {
    format!("POST {path} HTTP/1.1\r\nhost: x\r\ncontent-type: {ctype}\r\ncontent-length: {len}\r\nconnection: close\r\n\r\n")
}

#[test]
fn partial_and_dribbled_heads_are_cut_off_after_the_header_timeout() {
    let limit = Duration::from_millis(500);
    let p = Process::start(&["--header-read-timeout-ms", "500"]);
    // Connected, says nothing.
    let silent = connect(&p);
    // Half a head, then nothing.
    let mut partial = connect(&p);
    partial.write_all(b"GET /healthz HTTP/1.1\r\nhost: x\r\n").unwrap();
    // A head that never ends, one byte every 100 ms (slowloris).
    let dribble =
        Trickle::start(&p, "GET /healthz HTTP/1.1\r\n".into(), b"x-a: b\r\n".repeat(100), Duration::from_millis(100));
    let dribbled = dribble.reader.try_clone().unwrap();
    let timers: Vec<_> =
        [silent, partial, dribbled].into_iter().map(|s| std::thread::spawn(move || time_to_close(s))).collect();
    let took: Vec<Duration> = timers.into_iter().map(|t| t.join().unwrap()).collect();
    for (what, t) in ["silent", "partial head", "dribbled head"].iter().zip(&took) {
        assert_cut_within(*t, limit, what);
    }
    drop(dribble);
    let h = p.request("GET", "/healthz", None);
    assert_eq!(h.status, 200);
    assert!(metric(&p, "tailtally_connections_closed_total{reason=\"header-timeout\"}") >= 3.0);
}

#[test]
fn an_idle_keep_alive_connection_is_closed_after_the_keep_alive_timeout() {
    let limit = Duration::from_millis(600);
    let p = Process::start(&["--keep-alive-timeout-ms", "600", "--header-read-timeout-ms", "10000"]);
    let mut s = connect(&p);
    // Kept alive: a second request on the same connection, each answer restarting the idle clock.
    for _ in 0..2 {
        s.write_all(b"GET /healthz HTTP/1.1\r\nhost: x\r\n\r\n").unwrap();
        let (status, _, body) = read_answer(&mut s);
        assert_eq!((status, body.as_str()), (200, r#"{"status":"ok"}"#));
        std::thread::sleep(Duration::from_millis(200));
    }
    s.write_all(b"GET /readyz HTTP/1.1\r\nhost: x\r\n\r\n").unwrap();
    assert_eq!(read_answer(&mut s).0, 200);
    assert_cut_within(time_to_close(s), limit, "idle keep-alive");
    assert!(metric(&p, "tailtally_connections_closed_total{reason=\"keep-alive-timeout\"}") >= 1.0);
}

#[test]
fn over_the_connection_cap_only_the_probes_answer_silent_ones_give_way_and_then_connections_are_refused() {
    let p = Process::start(&["--max-connections", "3", "--reserved-connections", "1"]);
    // Three idle connections take every full place (accepted in order, before any that follows).
    let idle: Vec<TcpStream> = (0..3).map(|_| connect(&p)).collect();
    wait_for(&p, "tailtally_connections_open{kind=\"full\"}", |v| v == 3.0);
    // The next one is on the reserved place: the probes answer, one request per connection...
    let raw = on_reserved_place(&p, b"GET /healthz HTTP/1.1\r\nhost: x\r\n\r\n");
    assert_eq!(status_of(&raw), Some(200), "{}", String::from_utf8_lossy(&raw));
    assert_eq!(body_json(&raw)["status"], "ok");
    // ...and anything else is told to come back.
    let raw =
        on_reserved_place(&p, &[post_head("/v1/tail", "application/json", SMALL.len()).as_bytes(), SMALL].concat());
    assert_eq!(status_of(&raw), Some(503), "{}", String::from_utf8_lossy(&raw));
    let v = body_json(&raw);
    assert_eq!(v["type"], "/problems/overloaded");
    assert!(v["detail"].as_str().unwrap().contains("only the probes answer"), "{v}");
    // A reserved place held by a connection that says nothing gives way to a newcomer (a probe speaks at
    // once, a flood of idle connections does not)...
    // (The connection that reads /metrics is on the reserved place itself.)
    wait_for(&p, "tailtally_connections_open{kind=\"reserved\"}", |v| v == 1.0);
    std::thread::sleep(Duration::from_millis(100));
    let mut silent = connect(&p);
    std::thread::sleep(Duration::from_millis(100));
    // (Another newcomer that says nothing is refused, and the holder keeps its place.)
    let mut mute = connect(&p);
    let raw = read_until_closed(&mut mute);
    assert!(raw.is_empty() || status_of(&raw) == Some(503), "{}", String::from_utf8_lossy(&raw));
    silent.set_nonblocking(true).unwrap();
    assert!(
        matches!(silent.read(&mut [0u8; 1]), Err(e) if e.kind() == std::io::ErrorKind::WouldBlock),
        "evicted by a mute newcomer"
    );
    silent.set_nonblocking(false).unwrap();
    let raw = on_reserved_place(&p, b"GET /healthz HTTP/1.1\r\nhost: x\r\n\r\n");
    assert_eq!(status_of(&raw), Some(200), "{}", String::from_utf8_lossy(&raw));
    assert!(time_to_close(silent) < Duration::from_millis(900), "the silent connection kept its place");
    assert!(metric(&p, "tailtally_connections_closed_total{reason=\"evicted\"}") >= 1.0);
    // ...but one that has begun its request keeps it, and then a connection is closed at once (after a
    // 503 when it gets through).
    wait_for(&p, "tailtally_connections_open{kind=\"reserved\"}", |v| v == 1.0);
    std::thread::sleep(Duration::from_millis(100));
    let mut speaking = connect(&p);
    speaking.write_all(b"GET /healthz HTTP/1.1\r\n").unwrap();
    std::thread::sleep(Duration::from_millis(100));
    let mut refused = connect(&p);
    let _ = refused.write_all(b"GET /healthz HTTP/1.1\r\nhost: x\r\n\r\n");
    let raw = read_until_closed(&mut refused);
    assert!(raw.is_empty() || status_of(&raw) == Some(503), "{}", String::from_utf8_lossy(&raw));
    drop(speaking);
    assert!(metric(&p, "tailtally_connections_refused_total ") >= 1.0);
    // A full place given back serves computing requests again.
    drop(idle);
    wait_for(&p, "tailtally_connections_open{kind=\"full\"}", |v| v <= 1.0);
    let r = p.request("POST", "/v1/tail", Some(SMALL));
    assert_eq!(r.status, 200, "{}", r.body);
}

#[test]
fn a_trickled_body_gets_408_and_holds_no_computing_turn() {
    let p = Process::start(&["--body-read-timeout-ms", "1000", "--max-concurrency", "1", "--max-queued", "0"]);
    let started = Instant::now();
    let mut slow = Trickle::start(
        &p,
        post_head("/v1/tail", "application/json", SMALL.len()),
        SMALL.to_vec(),
        Duration::from_millis(300),
    );
    p.wait_for_metric("tailtally_http_requests_in_flight{route=\"/v1/tail\"} ", 1.0);
    // The only turn is free while the slow body arrives: with no queue, a held turn would mean 503 here.
    let r = p.request("POST", "/v1/tail", Some(SMALL));
    assert_eq!(r.status, 200, "{}", r.body);
    let raw = slow.answer();
    let took = started.elapsed();
    assert_eq!(status_of(&raw), Some(408), "{}", String::from_utf8_lossy(&raw));
    let v = body_json(&raw);
    assert_eq!(v["type"], "/problems/body-timeout", "{v}");
    assert!(v["detail"].as_str().unwrap().contains("--body-read-timeout-ms"), "{v}");
    assert_cut_within(took, Duration::from_millis(1000), "trickled body");
    assert_eq!(p.metric("tailtally_compute_running "), Some(0.0));
}

#[test]
fn a_trickling_batch_is_cut_off_with_a_problem_line_and_gives_its_turn_back() {
    let p = Process::start(&[
        "--body-read-timeout-ms",
        "500",
        "--min-body-rate",
        "100",
        "--max-concurrency",
        "1",
        "--max-queued",
        "0",
    ]);
    let first = br#"{"id": 1, "tail": {"portfolio": {"probabilities": [0.5]}, "thresholds": [1]}}
"#;
    let second = br#"{"id": 2, "tail": {"portfolio": {"probabilities": [0.5]}, "thresholds": [1]}}
"#;
    let head = post_head("/v1/batch", "application/x-ndjson", first.len() + second.len());
    let mut s = connect(&p);
    s.write_all(&[head.as_bytes(), first].concat()).unwrap();
    // The rest at about 3 bytes a second, far below 100.
    let mut w = s.try_clone().unwrap();
    let stop = Arc::new(AtomicBool::new(false));
    let stop2 = stop.clone();
    let writer = std::thread::spawn(move || {
        for b in second.iter() {
            std::thread::sleep(Duration::from_millis(300));
            if stop2.load(Ordering::Relaxed) || w.write_all(&[*b]).is_err() {
                return;
            }
        }
    });
    let raw = read_until_closed(&mut s);
    stop.store(true, Ordering::Relaxed);
    writer.join().unwrap();
    let text = String::from_utf8_lossy(&raw);
    assert!(text.contains("\"id\":1,\"tail\""), "{text}");
    assert!(text.contains("the body came slower than 100 bytes per second"), "{text}");
    assert!(!text.contains("\"id\":2,\"tail\""), "{text}");
    p.wait_for_metric("tailtally_compute_running ", 0.0);
    assert_eq!(p.request("POST", "/v1/tail", Some(SMALL)).status, 200);
}

/// A valid tail request of exactly `len` bytes (JSON allows the trailing spaces).
fn padded(len: usize) -> Vec<u8> {
    let mut b = SMALL.to_vec();
    assert!(len >= b.len());
    b.resize(len, b' ');
    b
}

fn gzip(data: &[u8]) -> Vec<u8> {
    let mut e = flate2::write::GzEncoder::new(Vec::new(), flate2::Compression::best());
    e.write_all(data).unwrap();
    e.finish().unwrap()
}

#[test]
fn the_in_flight_body_budget_sheds_requests_over_it_and_counts_gzip_bodies_inflated() {
    let p = Process::start(&["--max-body-bytes-in-flight", "1000"]);
    let body = padded(900);
    // 899 bytes held by a request whose last byte is withheld.
    let mut held = RawRequest::send_head(p.addr, "POST", "/v1/tail", &body, 1);
    p.wait_for_metric("tailtally_body_bytes_in_flight ", 899.0);
    // No room for 200 more: a short wait, then 503 with a hint when to retry.
    let r = p.request("POST", "/v1/tail", Some(&padded(200)));
    assert_eq!(r.status, 503, "{}", r.body);
    assert_eq!(r.header("retry-after"), Some("1"));
    let v = r.json();
    assert_eq!(v["type"], "/problems/overloaded");
    assert!(v["detail"].as_str().unwrap().contains("--max-body-bytes-in-flight"), "{v}");
    // A body that could never fit is refused at once.
    let r = p.request("POST", "/v1/tail", Some(&padded(1500)));
    assert_eq!(r.status, 413, "{}", r.body);
    let a = held.finish();
    assert_eq!(a.status, 200, "{}", a.body);
    p.wait_for_metric("tailtally_body_bytes_in_flight ", 0.0);
    assert_eq!(p.request("POST", "/v1/tail", Some(&padded(200))).status, 200);
    // A gzip body of some 100 bytes that inflates to 5000 is counted as 5000.
    let bomb = gzip(&padded(5000));
    assert!(bomb.len() < 200, "{}", bomb.len());
    let mut s = connect(&p);
    let head = format!(
        "POST /v1/tail HTTP/1.1\r\nhost: x\r\ncontent-type: application/json\r\ncontent-encoding: gzip\r\ncontent-length: {}\r\nconnection: close\r\n\r\n",
        bomb.len()
    );
    s.write_all(&[head.as_bytes(), &bomb].concat()).unwrap();
    let raw = read_until_closed(&mut s);
    assert_eq!(status_of(&raw), Some(413), "{}", String::from_utf8_lossy(&raw));
    assert!(body_json(&raw)["detail"].as_str().unwrap().contains("--max-body-bytes-in-flight"));
    // Within the budget it is answered.
    let small = gzip(&padded(600));
    let mut s = connect(&p);
    let head = head.replace(&format!("content-length: {}", bomb.len()), &format!("content-length: {}", small.len()));
    s.write_all(&[head.as_bytes(), &small].concat()).unwrap();
    let raw = read_until_closed(&mut s);
    assert_eq!(status_of(&raw), Some(200), "{}", String::from_utf8_lossy(&raw));
    p.wait_for_metric("tailtally_body_bytes_in_flight ", 0.0);
}

#[test]
fn sigterm_with_a_client_holding_a_slow_upload_exits_0_within_the_grace() {
    let grace = Duration::from_secs(1);
    let mut p = Process::start(&["--shutdown-grace-secs", "1", "--body-read-timeout-ms", "60000"]);
    // An idle keep-alive connection, and an upload that would take half a minute.
    let mut idle = connect(&p);
    idle.write_all(b"GET /healthz HTTP/1.1\r\nhost: x\r\n\r\n").unwrap();
    assert_eq!(read_answer(&mut idle).0, 200);
    let _slow = Trickle::start(
        &p,
        post_head("/v1/tail", "application/json", SMALL.len()),
        SMALL.to_vec(),
        Duration::from_millis(300),
    );
    p.wait_for_metric("tailtally_http_requests_in_flight{route=\"/v1/tail\"} ", 1.0);
    let t = Instant::now();
    p.sigterm();
    // The idle connection is closed at once: it has no request to finish.
    assert!(time_to_close(idle) < grace, "the idle connection was kept");
    let status = p.wait_exit();
    let took = t.elapsed();
    assert_eq!(status.code(), Some(0), "{status}");
    assert!(took >= grace.mul_f64(0.9), "exited after {took:?}, before the grace");
    assert!(took <= grace * 3 + Duration::from_secs(1), "exited after {took:?}");
    p.wait_for_log("grace period over");
}
