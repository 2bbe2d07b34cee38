//! The service's Prometheus metrics, served at `GET /metrics` in the text exposition format 0.0.4.
//!
//! A small registry of atomics instead of a metrics crate: the service needs four families (requests by
//! route, method and status; latency histograms by route and method; requests in flight; problems by type),
//! a counter of exposures processed, two gauges of the admission control (running, queued), and the
//! connection and body-budget figures of the guards (`server::connection`, `server::intake`). There is one
//! registry per process, like the default registry of a Prometheus client, so that handlers can count
//! without carrying state. Label values are bounded: the route is axum's matched template (or `unmatched`),
//! the method one of the standard ones (or `other`), the problem type one of the service's fixed slugs.

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::sync::atomic::{AtomicI64, AtomicU64, Ordering::Relaxed};
use std::sync::{Arc, LazyLock, RwLock};
use std::time::Duration;

/// Upper bounds of the latency buckets, in seconds: 0.5 ms to 60 s, about three per decade.
pub const LATENCY_BUCKETS: [f64; 16] =
    [0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0, 60.0];

/// Route label of requests that matched no route (the fallback), so that scanned paths add no series.
pub const UNMATCHED: &str = "unmatched";

/// Latency histogram. Buckets are stored non-cumulative (one increment per observation) and summed when
/// rendered; the last slot counts observations above the largest bound.
#[derive(Default)]
struct Histogram {
    buckets: [AtomicU64; LATENCY_BUCKETS.len() + 1],
    sum_ns: AtomicU64,
}

impl Histogram {
    fn observe(&self, d: Duration) {
        let s = d.as_secs_f64();
        let i = LATENCY_BUCKETS.iter().position(|&b| s <= b).unwrap_or(LATENCY_BUCKETS.len());
        self.buckets[i].fetch_add(1, Relaxed);
        self.sum_ns.fetch_add(u64::try_from(d.as_nanos()).unwrap_or(u64::MAX), Relaxed);
    }
}

/// Series keyed by their label values; the read lock is the common path, the write lock only creates series.
struct Family<K, V> {
    series: RwLock<BTreeMap<K, Arc<V>>>,
}

impl<K: Ord + Clone, V: Default> Family<K, V> {
    fn new() -> Self {
        Family { series: RwLock::new(BTreeMap::new()) }
    }

    fn get(&self, key: &K) -> Arc<V> {
        if let Some(v) = self.series.read().unwrap_or_else(|e| e.into_inner()).get(key) {
            return v.clone();
        }
        self.series.write().unwrap_or_else(|e| e.into_inner()).entry(key.clone()).or_default().clone()
    }

    fn snapshot(&self) -> Vec<(K, Arc<V>)> {
        self.series.read().unwrap_or_else(|e| e.into_inner()).iter().map(|(k, v)| (k.clone(), v.clone())).collect()
    }
}

struct Registry {
    requests: Family<(String, &'static str, u16), AtomicU64>,
    latency: Family<(String, &'static str), Histogram>,
    in_flight: Family<String, AtomicI64>,
    problems: Family<(String, String, u16), AtomicU64>,
    exposures: AtomicU64,
    inline: AtomicU64,
    computing: AtomicI64,
    queued: AtomicI64,
    connections: [AtomicI64; 2],
    refused: AtomicU64,
    closed: [AtomicU64; CLOSE_REASONS.len()],
    body_bytes: AtomicI64,
}

/// Why the server closed a connection on its own (`connection_closed`), as label values.
pub const CLOSE_REASONS: [&str; 5] = ["header-timeout", "keep-alive-timeout", "send-timeout", "evicted", "shutdown"];

static REGISTRY: LazyLock<Registry> = LazyLock::new(|| Registry {
    requests: Family::new(),
    latency: Family::new(),
    in_flight: Family::new(),
    problems: Family::new(),
    exposures: AtomicU64::new(0),
    inline: AtomicU64::new(0),
    computing: AtomicI64::new(0),
    queued: AtomicI64::new(0),
    connections: [AtomicI64::new(0), AtomicI64::new(0)],
    refused: AtomicU64::new(0),
    closed: Default::default(),
    body_bytes: AtomicI64::new(0),
});

/// Holds one unit of a gauge until dropped.
pub struct GaugeGuard(&'static AtomicI64);

impl Drop for GaugeGuard {
    fn drop(&mut self) {
        self.0.fetch_sub(1, Relaxed);
    }
}

/// A computing request has its turn (admission control).
pub fn computing() -> GaugeGuard {
    REGISTRY.computing.fetch_add(1, Relaxed);
    GaugeGuard(&REGISTRY.computing)
}

/// A computing request waits for its turn.
pub fn queued() -> GaugeGuard {
    REGISTRY.queued.fetch_add(1, Relaxed);
    GaugeGuard(&REGISTRY.queued)
}

/// An open connection, served in full or (`reserved`) for the probes only.
pub fn connection_open(reserved: bool) -> GaugeGuard {
    let g = &REGISTRY.connections[usize::from(reserved)];
    g.fetch_add(1, Relaxed);
    GaugeGuard(g)
}

/// A connection closed at once because every connection, the reserved ones too, was taken.
pub fn connection_refused() {
    REGISTRY.refused.fetch_add(1, Relaxed);
}

/// A connection closed by the server for one of `CLOSE_REASONS` (others are ignored).
pub fn connection_closed(reason: &str) {
    if let Some(i) = CLOSE_REASONS.iter().position(|r| *r == reason) {
        REGISTRY.closed[i].fetch_add(1, Relaxed);
    }
}

/// Request body bytes now held in memory (`--max-body-bytes-in-flight`), changed by `delta`.
pub fn body_bytes_held(delta: i64) {
    REGISTRY.body_bytes.fetch_add(delta, Relaxed);
}

/// Count the exposures of a validated portfolio (group sizes included), once per request.
pub fn exposures_processed(n: u64) {
    REGISTRY.exposures.fetch_add(n, Relaxed);
}

/// A question answered on the async worker, its work being below the inline budget (`api::offload`).
pub fn count_inline() {
    REGISTRY.inline.fetch_add(1, Relaxed);
}

/// The method as a label value: the standard methods by name, any extension method as `other`.
pub fn method_label(m: &axum::http::Method) -> &'static str {
    use axum::http::Method;
    match *m {
        Method::GET => "GET",
        Method::POST => "POST",
        Method::HEAD => "HEAD",
        Method::PUT => "PUT",
        Method::DELETE => "DELETE",
        Method::PATCH => "PATCH",
        Method::OPTIONS => "OPTIONS",
        Method::CONNECT => "CONNECT",
        Method::TRACE => "TRACE",
        _ => "other",
    }
}

/// A request being served: counted in flight until `finish` (or drop, when the client goes away first).
pub struct InFlight {
    route: String,
    method: &'static str,
    gauge: Arc<AtomicI64>,
    started: std::time::Instant,
    done: bool,
}

impl InFlight {
    pub fn start(route: &str, method: &'static str) -> InFlight {
        let gauge = REGISTRY.in_flight.get(&route.to_string());
        gauge.fetch_add(1, Relaxed);
        InFlight { route: route.to_string(), method, gauge, started: std::time::Instant::now(), done: false }
    }

    /// Record the answer: its status, its latency and, for 4xx and 5xx, the problem type (`None` when the
    /// answer is not a problem document, which the service does not send but a proxy layer might).
    pub fn finish(mut self, status: u16, problem_type: Option<&str>) {
        self.done = true;
        self.gauge.fetch_sub(1, Relaxed);
        REGISTRY.requests.get(&(self.route.clone(), self.method, status)).fetch_add(1, Relaxed);
        REGISTRY.latency.get(&(self.route.clone(), self.method)).observe(self.started.elapsed());
        if status >= 400 {
            let kind = problem_type.unwrap_or("none").to_string();
            REGISTRY.problems.get(&(self.route.clone(), kind, status)).fetch_add(1, Relaxed);
        }
    }
}

impl Drop for InFlight {
    fn drop(&mut self) {
        if !self.done {
            self.gauge.fetch_sub(1, Relaxed);
        }
    }
}

/// Label value escaping of the exposition format: backslash, double quote and line feed.
fn escape(s: &str) -> String {
    s.replace('\\', "\\\\").replace('"', "\\\"").replace('\n', "\\n")
}

fn header(out: &mut String, name: &str, kind: &str, help: &str) {
    let _ = writeln!(out, "# HELP {name} {help}");
    let _ = writeln!(out, "# TYPE {name} {kind}");
}

/// Every metric in the text exposition format 0.0.4.
pub fn render() -> String {
    let r = &*REGISTRY;
    let mut out = String::with_capacity(4096);

    let name = "tailtally_http_requests_total";
    header(&mut out, name, "counter", "HTTP requests answered, by matched route template, method and status.");
    for ((route, method, status), c) in r.requests.snapshot() {
        let _ = writeln!(
            out,
            "{name}{{route=\"{}\",method=\"{method}\",status=\"{status}\"}} {}",
            escape(&route),
            c.load(Relaxed)
        );
    }

    let name = "tailtally_http_request_duration_seconds";
    header(&mut out, name, "histogram", "Time from receiving a request's head to having its answer, in seconds.");
    for ((route, method), h) in r.latency.snapshot() {
        let labels = format!("route=\"{}\",method=\"{method}\"", escape(&route));
        let mut cumulative = 0u64;
        for (i, bound) in LATENCY_BUCKETS.iter().enumerate() {
            cumulative += h.buckets[i].load(Relaxed);
            let _ = writeln!(out, "{name}_bucket{{{labels},le=\"{bound}\"}} {cumulative}");
        }
        // The count is the sum of the buckets read here, so +Inf and _count agree within one scrape.
        cumulative += h.buckets[LATENCY_BUCKETS.len()].load(Relaxed);
        let _ = writeln!(out, "{name}_bucket{{{labels},le=\"+Inf\"}} {cumulative}");
        let _ = writeln!(out, "{name}_sum{{{labels}}} {}", h.sum_ns.load(Relaxed) as f64 / 1e9);
        let _ = writeln!(out, "{name}_count{{{labels}}} {cumulative}");
    }

    let name = "tailtally_http_requests_in_flight";
    header(&mut out, name, "gauge", "Requests being served now, by matched route template.");
    for (route, g) in r.in_flight.snapshot() {
        let _ = writeln!(out, "{name}{{route=\"{}\"}} {}", escape(&route), g.load(Relaxed));
    }

    let name = "tailtally_http_problems_total";
    header(&mut out, name, "counter", "4xx and 5xx answers, by route, RFC 9457 problem type and status.");
    for ((route, kind, status), c) in r.problems.snapshot() {
        let _ = writeln!(
            out,
            "{name}{{route=\"{}\",type=\"{}\",status=\"{status}\"}} {}",
            escape(&route),
            escape(&kind),
            c.load(Relaxed)
        );
    }

    let name = "tailtally_compute_running";
    header(&mut out, name, "gauge", "Computing requests holding a turn (at most --max-concurrency).");
    let _ = writeln!(out, "{name} {}", r.computing.load(Relaxed));
    let name = "tailtally_compute_queued";
    header(&mut out, name, "gauge", "Computing requests waiting for a turn (at most --max-queued).");
    let _ = writeln!(out, "{name} {}", r.queued.load(Relaxed));

    let name = "tailtally_connections_open";
    header(&mut out, name, "gauge", "Open connections: served in full, or on a reserved place for the probes only.");
    let _ = writeln!(out, "{name}{{kind=\"full\"}} {}", r.connections[0].load(Relaxed));
    let _ = writeln!(out, "{name}{{kind=\"reserved\"}} {}", r.connections[1].load(Relaxed));
    let name = "tailtally_connections_refused_total";
    header(&mut out, name, "counter", "Connections closed on arrival: every place, reserved ones too, was taken.");
    let _ = writeln!(out, "{name} {}", r.refused.load(Relaxed));
    let name = "tailtally_connections_closed_total";
    header(&mut out, name, "counter", "Connections closed by the server, by reason.");
    for (reason, c) in CLOSE_REASONS.iter().zip(&r.closed) {
        let _ = writeln!(out, "{name}{{reason=\"{reason}\"}} {}", c.load(Relaxed));
    }
    let name = "tailtally_body_bytes_in_flight";
    header(&mut out, name, "gauge", "Request body bytes held in memory (at most --max-body-bytes-in-flight).");
    let _ = writeln!(out, "{name} {}", r.body_bytes.load(Relaxed));

    let name = "tailtally_exposures_processed_total";
    header(&mut out, name, "counter", "Exposures (group sizes included) in validated portfolios.");
    let _ = writeln!(out, "{name} {}", r.exposures.load(Relaxed));
    let name = "tailtally_questions_inline_total";
    header(
        &mut out,
        name,
        "counter",
        "Questions answered on the async worker (small enough to skip the blocking pool).",
    );
    let _ = writeln!(out, "{name} {}", r.inline.load(Relaxed));
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The value of the first sample line that starts with `prefix`.
    fn sample(text: &str, prefix: &str) -> Option<f64> {
        text.lines().find(|l| l.starts_with(prefix)).and_then(|l| l.rsplit(' ').next()).and_then(|v| v.parse().ok())
    }

    #[test]
    fn histogram_buckets_are_cumulative_and_agree_with_the_count() {
        // A route name of its own: the registry is shared by every test of this process.
        let route = "/test/histogram\"quoted\"";
        for ms in [0.1, 0.7, 3.0, 3.0, 70_000.0] {
            let mut f = InFlight::start(route, "GET");
            // Backdate the start instead of sleeping.
            f.started = f.started.checked_sub(Duration::from_secs_f64(ms / 1000.0)).unwrap();
            f.finish(200, None);
        }
        let text = render();
        let l = "route=\"/test/histogram\\\"quoted\\\"\",method=\"GET\"";
        let bucket =
            |le: &str| sample(&text, &format!("tailtally_http_request_duration_seconds_bucket{{{l},le=\"{le}\"}}"));
        // Backdating only adds to the elapsed time, so each observation is at least its nominal value.
        assert_eq!(bucket("0.0005"), Some(1.0), "{text}");
        assert_eq!(bucket("0.001"), Some(2.0));
        assert_eq!(bucket("60"), Some(4.0));
        assert_eq!(bucket("+Inf"), Some(5.0));
        assert_eq!(sample(&text, &format!("tailtally_http_request_duration_seconds_count{{{l}}}")), Some(5.0));
        let sum = sample(&text, &format!("tailtally_http_request_duration_seconds_sum{{{l}}}")).unwrap();
        assert!(sum >= 70.0068, "{sum}");
        assert_eq!(sample(&text, &format!("tailtally_http_requests_total{{{l},status=\"200\"}}")), Some(5.0));
        assert_eq!(
            sample(&text, "tailtally_http_requests_in_flight{route=\"/test/histogram\\\"quoted\\\"\"}"),
            Some(0.0)
        );
    }

    #[test]
    fn problems_are_counted_by_type_and_dropped_requests_leave_the_gauge() {
        let route = "/test/problems";
        let f = InFlight::start(route, "POST");
        let g = InFlight::start(route, "POST");
        assert_eq!(sample(&render(), "tailtally_http_requests_in_flight{route=\"/test/problems\"}"), Some(2.0));
        f.finish(422, Some("/problems/invalid-request"));
        drop(g);
        let text = render();
        assert_eq!(sample(&text, "tailtally_http_requests_in_flight{route=\"/test/problems\"}"), Some(0.0));
        assert_eq!(
            sample(
                &text,
                "tailtally_http_problems_total{route=\"/test/problems\",type=\"/problems/invalid-request\",status=\"422\"}"
            ),
            Some(1.0)
        );
        // Every family is announced with HELP and TYPE even when it has no series yet.
        for family in ["requests_total", "request_duration_seconds", "requests_in_flight", "problems_total"] {
            assert!(text.contains(&format!("# TYPE tailtally_http_{family} ")), "{family}");
        }
        let before = sample(&text, "tailtally_exposures_processed_total").unwrap();
        exposures_processed(7);
        assert!(sample(&render(), "tailtally_exposures_processed_total").unwrap() >= before + 7.0);
    }

    #[test]
    fn extension_methods_share_one_label() {
        let m = axum::http::Method::from_bytes(b"BREW").unwrap();
        assert_eq!(method_label(&m), "other");
        assert_eq!(method_label(&axum::http::Method::POST), "POST");
    }
}
