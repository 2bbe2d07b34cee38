//! Shared helper of the end-to-end tests: start the real service on a free port and talk to it over HTTP.
#![allow(dead_code)]

use serde_json::Value;
use tailtally::config::{Cli, Options};
use tailtally::server::App;

pub struct Server {
    pub base: String,
    pub client: reqwest::Client,
    stop: Option<tokio::sync::oneshot::Sender<()>>,
    pub handle: Option<tokio::task::JoinHandle<std::io::Result<()>>>,
}

/// Options as the binary would parse them from these flags (defaults otherwise), listening on a free port.
pub fn options(flags: &[&str]) -> Options {
    use clap::Parser;
    let mut argv = vec!["tailtally", "--listen", "127.0.0.1:0"];
    argv.extend_from_slice(flags);
    Cli::parse_from(argv).options
}

pub async fn start(flags: &[&str]) -> Server {
    let app = App::bind(&options(flags)).await.expect("bind");
    let addr = app.local_addr();
    let (tx, rx) = tokio::sync::oneshot::channel::<()>();
    let handle = tokio::spawn(app.serve(async move {
        let _ = rx.await;
    }));
    Server { base: format!("http://{addr}"), client: reqwest::Client::new(), stop: Some(tx), handle: Some(handle) }
}

impl Server {
    pub async fn post_json(&self, path: &str, body: &Value) -> (u16, String, Value) {
        self.post_raw(path, "application/json", serde_json::to_vec(body).unwrap()).await
    }

    pub async fn post_raw(&self, path: &str, ctype: &str, body: Vec<u8>) -> (u16, String, Value) {
        let res = self
            .client
            .post(format!("{}{path}", self.base))
            .header("content-type", ctype)
            .body(body)
            .send()
            .await
            .expect("request");
        let status = res.status().as_u16();
        let ct = res.headers().get("content-type").map(|v| v.to_str().unwrap().to_string()).unwrap_or_default();
        let text = res.text().await.unwrap();
        let v = serde_json::from_str(&text).unwrap_or(Value::String(text));
        (status, ct, v)
    }

    pub async fn get(&self, path: &str) -> (u16, String, String) {
        let res = self.client.get(format!("{}{path}", self.base)).send().await.expect("request");
        let status = res.status().as_u16();
        let ct = res.headers().get("content-type").map(|v| v.to_str().unwrap().to_string()).unwrap_or_default();
        (status, ct, res.text().await.unwrap())
    }

    /// Ask the server to stop and wait until it has finished its requests in flight.
    pub async fn shutdown(mut self) -> std::io::Result<()> {
        let _ = self.stop.take().unwrap().send(());
        self.handle.take().unwrap().await.unwrap()
    }
}

/// Assert an RFC 9457 problem answer with this status that points at `pointer`.
pub fn assert_problem(status: u16, ct: &str, body: &Value, want: u16, pointer: Option<&str>) {
    assert_eq!(status, want, "body: {body}");
    assert!(ct.starts_with("application/problem+json"), "content type {ct}");
    assert_eq!(body["status"], want);
    assert!(body["title"].is_string() && body["detail"].is_string() && body["type"].is_string(), "{body}");
    if let Some(p) = pointer {
        let ptrs: Vec<&str> = body["errors"]
            .as_array()
            .map(|a| a.iter().filter_map(|e| e["pointer"].as_str()).collect())
            .unwrap_or_default();
        assert!(ptrs.contains(&p), "pointer {p} not in {ptrs:?}: {body}");
    }
}

/// The real binary as a child process, for what only a process shows: signals, exit status, the listener.
/// Its JSON log lines (stderr) are collected by a thread so that the pipe never fills.
/// Runs `tailtally eval -` with `input` on its standard input and returns what it printed and its status.
pub fn eval_stdin(input: &str) -> std::process::Output {
    use std::io::Write;
    let mut child = std::process::Command::new(env!("CARGO_BIN_EXE_tailtally"))
        .args(["eval", "-"])
        .stdin(std::process::Stdio::piped())
        .stdout(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    child.stdin.take().unwrap().write_all(input.as_bytes()).unwrap();
    child.wait_with_output().unwrap()
}

pub struct Process {
    pub child: std::process::Child,
    pub addr: std::net::SocketAddr,
    logs: std::sync::mpsc::Receiver<String>,
}

/// How long to wait for anything before calling it a hang (a guard, never a pass/fail timing).
pub const HANG_GUARD: std::time::Duration = std::time::Duration::from_secs(120);

impl Process {
    pub fn start(flags: &[&str]) -> Process {
        use std::io::BufRead;
        let mut child = std::process::Command::new(env!("CARGO_BIN_EXE_tailtally"))
            .args(["--listen", "127.0.0.1:0", "--log-format", "json"])
            .args(flags)
            .stdin(std::process::Stdio::null())
            .stdout(std::process::Stdio::null())
            .stderr(std::process::Stdio::piped())
            .spawn()
            .expect("start the binary");
        let stderr = child.stderr.take().unwrap();
        let (tx, rx) = std::sync::mpsc::channel();
        std::thread::spawn(move || {
            for line in std::io::BufReader::new(stderr).lines().map_while(Result::ok) {
                let _ = tx.send(line);
            }
        });
        let mut p = Process { child, addr: "0.0.0.0:0".parse().unwrap(), logs: rx };
        let line = p.wait_for_log("tailtally listening on");
        let v: Value = serde_json::from_str(&line).expect("a JSON log line");
        p.addr = v["fields"]["addr"].as_str().expect("addr field").parse().unwrap();
        p
    }

    /// The first log line (from now on) that contains `needle`.
    pub fn wait_for_log(&mut self, needle: &str) -> String {
        let deadline = std::time::Instant::now() + HANG_GUARD;
        loop {
            let left = deadline.saturating_duration_since(std::time::Instant::now());
            match self.logs.recv_timeout(left) {
                Ok(line) if line.contains(needle) => return line,
                Ok(_) => {}
                Err(e) => panic!("no log line with {needle:?}: {e}"),
            }
        }
    }

    pub fn sigterm(&self) {
        let ok = std::process::Command::new("kill").args(["-TERM", &self.child.id().to_string()]).status().unwrap();
        assert!(ok.success(), "kill -TERM failed");
    }

    pub fn is_running(&mut self) -> bool {
        self.child.try_wait().unwrap().is_none()
    }

    pub fn wait_exit(&mut self) -> std::process::ExitStatus {
        let deadline = std::time::Instant::now() + HANG_GUARD;
        loop {
            if let Some(s) = self.child.try_wait().unwrap() {
                return s;
            }
            assert!(std::time::Instant::now() < deadline, "the process did not exit");
            std::thread::sleep(std::time::Duration::from_millis(20));
        }
    }

    /// One request on a fresh connection (blocking), answered in full.
    pub fn request(&self, method: &str, path: &str, body: Option<&[u8]>) -> RawResponse {
        let mut r = RawRequest::send_head(self.addr, method, path, body.unwrap_or(b""), 0);
        r.finish()
    }

    /// The value of the first sample of /metrics whose line starts with `prefix`.
    pub fn metric(&self, prefix: &str) -> Option<f64> {
        let m = self.request("GET", "/metrics", None);
        assert_eq!(m.status, 200);
        m.body.lines().find(|l| l.starts_with(prefix)).and_then(|l| l.rsplit(' ').next()).and_then(|v| v.parse().ok())
    }

    /// Wait until the sample `prefix` of /metrics reads `want`.
    pub fn wait_for_metric(&self, prefix: &str, want: f64) {
        let deadline = std::time::Instant::now() + HANG_GUARD;
        while self.metric(prefix) != Some(want) {
            assert!(std::time::Instant::now() < deadline, "{prefix} never reached {want}");
            std::thread::sleep(std::time::Duration::from_millis(10));
        }
    }
}

impl Drop for Process {
    fn drop(&mut self) {
        if self.is_running() {
            let _ = self.child.kill();
            let _ = self.child.wait();
        }
    }
}

/// An HTTP/1.1 request over a plain socket whose last `held` body bytes are sent only by `finish`: the
/// request is then certainly in flight, however fast the machine, for as long as the test needs.
pub struct RawRequest {
    stream: std::net::TcpStream,
    rest: Vec<u8>,
}

pub struct RawResponse {
    pub status: u16,
    /// Header names in lower case.
    pub headers: Vec<(String, String)>,
    pub body: String,
}

impl RawResponse {
    pub fn header(&self, name: &str) -> Option<&str> {
        self.headers.iter().find(|(k, _)| k == name).map(|(_, v)| v.as_str())
    }

    pub fn json(&self) -> Value {
        serde_json::from_str(&self.body).unwrap_or_else(|e| panic!("not JSON ({e}): {}", self.body))
    }
}

impl RawRequest {
    pub fn send_head(addr: std::net::SocketAddr, method: &str, path: &str, body: &[u8], held: usize) -> RawRequest {
        RawRequest::send_head_as(addr, method, path, "application/json", body, held)
    }

    /// `send_head` with another content type (`application/x-ndjson` for a batch).
    pub fn send_head_as(
        addr: std::net::SocketAddr,
        method: &str,
        path: &str,
        ctype: &str,
        body: &[u8],
        held: usize,
    ) -> RawRequest {
        use std::io::Write;
        let mut stream = std::net::TcpStream::connect(addr).expect("connect");
        stream.set_read_timeout(Some(HANG_GUARD)).unwrap();
        let head = format!(
            "{method} {path} HTTP/1.1\r\nhost: {addr}\r\ncontent-type: {ctype}\r\ncontent-length: {}\r\nconnection: close\r\n\r\n",
            body.len()
        );
        let split = body.len() - held.min(body.len());
        stream.write_all(head.as_bytes()).unwrap();
        stream.write_all(&body[..split]).unwrap();
        stream.flush().unwrap();
        RawRequest { stream, rest: body[split..].to_vec() }
    }

    /// Send the held bytes and read the whole answer (the server closes the connection after it).
    pub fn finish(&mut self) -> RawResponse {
        use std::io::Write;
        if !self.rest.is_empty() {
            self.stream.write_all(&self.rest).unwrap();
        }
        self.read_answer()
    }

    /// Read the answer without sending the held bytes (for answers given before the body is complete).
    pub fn read_answer(&mut self) -> RawResponse {
        use std::io::Read;
        let mut raw = Vec::new();
        self.stream.read_to_end(&mut raw).expect("read the answer");
        let text = String::from_utf8(raw).expect("UTF-8 answer");
        let (head, body) = text.split_once("\r\n\r\n").unwrap_or_else(|| panic!("no header end: {text:?}"));
        let mut lines = head.split("\r\n");
        let status = lines.next().unwrap().split(' ').nth(1).unwrap().parse().unwrap();
        let headers: Vec<(String, String)> = lines
            .filter_map(|l| l.split_once(':'))
            .map(|(k, v)| (k.trim().to_ascii_lowercase(), v.trim().to_string()))
            .collect();
        let chunked = headers.iter().any(|(k, v)| k == "transfer-encoding" && v.contains("chunked"));
        let body = if chunked { dechunk(body) } else { body.to_string() };
        RawResponse { status, headers, body }
    }
}

fn dechunk(mut s: &str) -> String {
    let mut out = String::new();
    while let Some((size, rest)) = s.split_once("\r\n") {
        let n = usize::from_str_radix(size.trim(), 16).expect("chunk size");
        if n == 0 {
            break;
        }
        out.push_str(&rest[..n]);
        s = &rest[n + 2..];
    }
    out
}

/// One question asked in process on the default limits, its answer as JSON (what the route would encode).
pub fn ask_json<A: tailtally::analytics::Analytic>(req: Value) -> Result<Value, tailtally::analytics::Error>
where
    A::Request: serde::de::DeserializeOwned,
    A::Answer: serde::Serialize,
{
    let req: A::Request = serde_json::from_value(req).unwrap();
    let limits = tailtally::config::ServiceLimits::from_options(&Options::default());
    tailtally::analytics::run::<A>(&req, &limits, &tailtally::analytics::cancel::Cancel::never())
        .map(|a| serde_json::to_value(a).unwrap())
}
