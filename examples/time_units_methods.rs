//! Time the approximations on a book with loss units beside the exact method: n = 10^4 exposures with
//! p ~ U(0, 0.05) and units log-uniform in 1..=1000 (an invented book from a fixed seed, as in `time_units`),
//! P(S >= k) at k = mean + z sd for z = 3, 5, 8 (in units). The same book counted (every unit 1) for the
//! unweighted paths beside it.
//!
//! Usage: `cargo run --release --example time_units_methods [REPEATS=11]`. Prints medians and minimums in ms
//! per method (one call of one threshold, moments included); timings depend on the machine's load.

#[path = "common/units_book.rs"]
mod units_book;
use std::time::Instant;
use tailtally::engine::exact::lattice;
use tailtally::engine::{self, MethodId, Prepared, Side};
use tailtally::portfolio::Model;
use units_book::book;

fn main() {
    let repeats: usize = std::env::args().nth(1).and_then(|s| s.parse().ok()).unwrap_or(11);
    let n = 10_000;
    let (ps, us) = book(n, 0x9e37_79b9_7f4a_7c15 ^ n as u64);
    let weighted = units_book::model(&ps, &us);
    let count = Model::from_parts(&ps, &[], 0.0);
    for (name, m) in [("units", &weighted), ("count", &count)] {
        for z in [3.0, 5.0, 8.0] {
            let prep = Prepared::new(m);
            let k = (prep.moments.mean + z * prep.moments.sd()).ceil() as u64;
            let q = lattice::query(m, k, Side::Upper).unwrap_or((k, Side::Upper));
            for id in [MethodId::Normal, MethodId::Edgeworth, MethodId::Saddlepoint, MethodId::Exact] {
                let mut ms = Vec::new();
                let mut p = 0.0;
                for _ in 0..repeats {
                    let t = Instant::now();
                    let prep = Prepared::new(m);
                    p = engine::run(id, &prep, &[q], None)[0].probability;
                    ms.push(t.elapsed().as_secs_f64() * 1e3);
                }
                ms.sort_by(f64::total_cmp);
                println!(
                    "{{\"book\": \"{name}\", \"n\": {n}, \"z\": {z}, \"method\": \"{id:?}\", \"p\": {p:e}, \"ms_median\": {:.3}, \"ms_min\": {:.3}}}",
                    ms[ms.len() / 2],
                    ms[0]
                );
            }
        }
    }
}
