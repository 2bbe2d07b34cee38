//! Where a request's CPU goes inside the service, phase by phase: decoding the JSON (`api::extract::parse`,
//! and serde_json alone for comparison), the question (`analytics::run`, of which the engine's own
//! `elapsed_us` is shown apart) and encoding the answer (serde_json). Medians in microseconds:
//!   cargo run --release --example small_request_phases                 # 100 exposures, 20,001 runs
//!   cargo run --release --example small_request_phases -- 10000 201    # n exposures, R runs
//! With the default n = 100 the body is that of scripts/small_requests.sh (p ~ U(0, 0.2) from a fixed
//! xorshift stream standing in for `random.Random(7)`, thresholds 12 and 20); for larger n it is that of
//! scripts/goals.py (one threshold, k = ceil(mean + 5 sd)).
//! The HTTP side (hyper, middleware, the socket) is not here: see scripts/small_requests.sh and the perf
//! summaries in benches/README.md.

#[path = "common/timing.rs"]
mod timing;
use tailtally::analytics::cancel::Cancel;
use tailtally::analytics::tail::{Tail, TailRequest};
use tailtally::config::ServiceLimits;

fn main() {
    let args: Vec<usize> = std::env::args().skip(1).filter_map(|a| a.parse().ok()).collect();
    let n = args.first().copied().unwrap_or(100);
    let runs = args.get(1).copied().unwrap_or(20_001).max(1);
    // A fixed pseudo-random book: full 17-digit decimals, as a client's doubles usually are.
    let mut x: u64 = 0x9e37_79b9_7f4a_7c15;
    let ps: Vec<f64> = (0..n)
        .map(|_| {
            x ^= x << 13;
            x ^= x >> 7;
            x ^= x << 17;
            0.2 * (x >> 11) as f64 / (1u64 << 53) as f64
        })
        .collect();
    let thresholds: Vec<u64> = if n == 100 {
        vec![12, 20]
    } else {
        let mean: f64 = ps.iter().sum();
        let var: f64 = ps.iter().map(|p| p * (1.0 - p)).sum();
        vec![(mean + 5.0 * var.sqrt()).ceil() as u64]
    };
    let body =
        serde_json::to_vec(&serde_json::json!({"portfolio": {"probabilities": ps}, "thresholds": thresholds})).unwrap();
    let limits = ServiceLimits::from_options(&tailtally::config::Options::default());
    let parse = timing::median_us(runs, || {
        std::hint::black_box(tailtally::api::extract::parse::<TailRequest>(&body).unwrap());
    });
    let plain = timing::median_us(runs, || {
        std::hint::black_box(serde_json::from_slice::<TailRequest>(&body).unwrap());
    });
    let req: TailRequest = serde_json::from_slice(&body).unwrap();
    let mut engine = Vec::with_capacity(runs);
    let question = timing::median_us(runs, || {
        let a = tailtally::analytics::run::<Tail>(&req, &limits, &Cancel::never()).unwrap();
        engine.push(a.results.iter().flat_map(|r| r.estimates.iter()).map(|e| e.elapsed_us).sum::<f64>());
        std::hint::black_box(a);
    });
    engine.sort_by(|a, b| a.total_cmp(b));
    let engine = engine[engine.len() / 2];
    let answer = tailtally::analytics::run::<Tail>(&req, &limits, &Cancel::never()).unwrap();
    let encode = timing::median_us(runs, || {
        std::hint::black_box(serde_json::to_vec(&answer).unwrap());
    });
    let len = serde_json::to_vec(&answer).unwrap().len();
    println!("n = {n}, body {} bytes, answer {len} bytes, medians of {runs}\n", body.len());
    println!("| phase | median us |\n|---|---|");
    println!("| decode (`api::extract::parse`) | {parse:.2} |");
    println!("| decode (serde_json alone, no pointer tracking) | {plain:.2} |");
    println!("| question (`analytics::run`) | {question:.2} |");
    println!("| - of which the engine (`elapsed_us`) | {engine:.2} |");
    println!("| encode (serde_json::to_vec) | {encode:.2} |");
}
