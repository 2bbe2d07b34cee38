//! Where a small request's CPU goes inside the service, phase by phase, for the body of
//! scripts/small_requests.sh (100 listed exposures, p ~ U(0, 0.2) from `random.Random(7)`'s stream stand-in
//! below, thresholds 12 and 20): decoding the JSON (`api::extract::parse`, and serde_json alone for
//! comparison), the question (`analytics::run`) and encoding the answer (serde_json). Medians of 20,001
//! runs, in microseconds:
//!   cargo run --release --example small_request_phases
//! The HTTP side (hyper, middleware, the socket) is not here: see scripts/small_requests.sh and the perf
//! summaries in benches/README.md.

#[path = "common/timing.rs"]
mod timing;
use tailtally::analytics::cancel::Cancel;
use tailtally::analytics::tail::{Tail, TailRequest};
use tailtally::config::ServiceLimits;

fn main() {
    // A fixed pseudo-random book: full 17-digit decimals, as a client's doubles usually are.
    let mut x: u64 = 0x9e37_79b9_7f4a_7c15;
    let ps: Vec<f64> = (0..100)
        .map(|_| {
            x ^= x << 13;
            x ^= x >> 7;
            x ^= x << 17;
            0.2 * (x >> 11) as f64 / (1u64 << 53) as f64
        })
        .collect();
    let body =
        serde_json::to_vec(&serde_json::json!({"portfolio": {"probabilities": ps}, "thresholds": [12, 20]})).unwrap();
    let limits = ServiceLimits::from_options(&tailtally::config::Options::default());
    let parse = timing::median_us(20_001, || {
        std::hint::black_box(tailtally::api::extract::parse::<TailRequest>(&body).unwrap());
    });
    let plain = timing::median_us(20_001, || {
        std::hint::black_box(serde_json::from_slice::<TailRequest>(&body).unwrap());
    });
    let req: TailRequest = serde_json::from_slice(&body).unwrap();
    let question = timing::median_us(20_001, || {
        std::hint::black_box(tailtally::analytics::run::<Tail>(&req, &limits, &Cancel::never()).unwrap());
    });
    let answer = tailtally::analytics::run::<Tail>(&req, &limits, &Cancel::never()).unwrap();
    let encode = timing::median_us(20_001, || {
        std::hint::black_box(serde_json::to_vec(&answer).unwrap());
    });
    let len = serde_json::to_vec(&answer).unwrap().len();
    println!("body {} bytes, answer {len} bytes\n", body.len());
    println!("| phase | median us |\n|---|---|");
    println!("| decode (`api::extract::parse`) | {parse:.2} |");
    println!("| decode (serde_json alone, no pointer tracking) | {plain:.2} |");
    println!("| question (`analytics::run`) | {question:.2} |");
    println!("| encode (serde_json::to_vec) | {encode:.2} |");
}
