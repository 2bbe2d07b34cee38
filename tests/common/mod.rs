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
