//! Where answering on the async worker beats a hand-off to the blocking pool: the whole question
//! (`analytics::run`, model building included) for a tail request of n exposures at 2 thresholds, against
//! the round trip of an empty `spawn_blocking` on the same runtime. Medians of 2001 runs, in microseconds:
//!   cargo run --release --example inline_crossover
//! The inline budget (`analytics::cost::INLINE_WORK`) is set where the question costs a few hand-offs.

#[path = "common/timing.rs"]
mod timing;
use std::time::Instant;
use tailtally::analytics::cancel::Cancel;
use tailtally::analytics::tail::{Tail, TailRequest};
use tailtally::config::ServiceLimits;

fn main() {
    let rt = tokio::runtime::Builder::new_multi_thread().worker_threads(2).enable_all().build().unwrap();
    // Timed on a worker thread of the runtime, as a request's hand-off is.
    let hand_off = rt.block_on(async {
        tokio::spawn(async {
            let mut v = Vec::new();
            for _ in 0..2001 {
                let t = Instant::now();
                tokio::task::spawn_blocking(|| 1u8).await.unwrap();
                v.push(t.elapsed().as_secs_f64() * 1e6);
            }
            v.sort_by(|a, b| a.total_cmp(b));
            v[1000]
        })
        .await
        .unwrap()
    });
    let limits = ServiceLimits::from_options(&tailtally::config::Options::default());
    println!("empty spawn_blocking round trip: {hand_off:.1} us\n");
    println!("| n | thresholds | question us | ratio to hand-off | cost::work |\n|---|---|---|---|---|");
    for n in [10usize, 30, 100, 300, 1000, 3000, 10_000] {
        let ps: Vec<f64> = (0..n).map(|i| 0.01 + 0.18 * ((i * 7919 % 1000) as f64 / 1000.0)).collect();
        let mean: f64 = ps.iter().sum();
        let body = serde_json::json!({"portfolio": {"probabilities": ps},
            "thresholds": [mean.ceil() as u64, (mean * 1.5).ceil() as u64 + 2]});
        let req: TailRequest = serde_json::from_value(body).unwrap();
        let t = timing::median_us(2001, || {
            tailtally::analytics::run::<Tail>(&req, &limits, &Cancel::never()).unwrap();
        });
        let w = tailtally::analytics::cost::inline_work::<Tail>(&req).unwrap_or(f64::INFINITY);
        println!("| {n} | 2 | {t:.1} | {:.2} | {w:.0} |", t / hand_off);
    }
}
