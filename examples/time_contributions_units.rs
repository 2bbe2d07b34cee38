//! Time contributions in units (every exposure's sensitivity and tail without it) on the invented books of
//! `time_units` (p ~ U(0, 0.05), units log-uniform in 1..=1000), at k = mean + 4 sd in units: from one law's
//! samples divided by each exposure's factor (`characteristic_lattice::contributions`, what
//! `leave_one_out::contributions_in_units` takes for these books), beside the law per class of exposures it
//! replaced there, timed on 20 classes in the same run and multiplied by the number of classes (every class
//! costs about the same: one exact law of n - 1 exposures at two thresholds).
//!
//! Usage: `cargo run --release --example time_contributions_units [REPEATS=3] [N...]` (default 10^3, 10^4,
//! 10^5). `spectrum` says whether the engine took the samples (its cost model declines where the laws per
//! class are cheaper: then `ms_median` is theirs). Timings depend on the machine's load: say so beside any you quote.

#[path = "common/units_book.rs"]
mod units_book;
use std::time::Instant;
use tailtally::engine::exact::{characteristic_lattice, lattice, leave_one_out};
use tailtally::engine::numerics::moments::Moments;
use tailtally::engine::Side;
use units_book::{book, model};

fn main() {
    let repeats: usize = std::env::args().nth(1).and_then(|s| s.parse().ok()).unwrap_or(3);
    let sizes: Vec<usize> = std::env::args().skip(2).filter_map(|s| s.parse().ok()).collect();
    let sizes = if sizes.is_empty() { vec![1_000, 10_000, 100_000] } else { sizes };
    for n in sizes {
        let (ps, us) = book(n, 0x9e37_79b9_7f4a_7c15 ^ n as u64);
        let m = model(&ps, &us);
        let mo = Moments::of(&m);
        let k = (mo.mean + 4.0 * mo.sd()).ceil() as u64;
        let (x, _) = lattice::query(&m, k, Side::Upper).unwrap();
        let mut ms = Vec::new();
        let mut worst: f64 = 0.0;
        let spectral = characteristic_lattice::contributions(&m, &mo, x).is_some();
        for _ in 0..repeats {
            let t = Instant::now();
            let c = leave_one_out::contributions_in_units(&m, k);
            ms.push(t.elapsed().as_secs_f64() * 1e3);
            worst = c.iter().map(|c| c.sensitivity.rel_err.max(c.tail_without.rel_err)).fold(worst, f64::max);
        }
        ms.sort_by(f64::total_cmp);
        // The law per class: 20 classes, each the exact tails of the book without one exposure.
        let classes = leave_one_out::classes_in_units(&m);
        let t = Instant::now();
        for (i, &ui) in us.iter().enumerate().take(20) {
            let mut mi = m.clone();
            mi.bernoulli.remove(i);
            mi.units.remove(i);
            let mo = Moments::of(&mi);
            let u = mi.span() * ui;
            leave_one_out::upper_in_units(&mi, &mo, &[k.saturating_sub(u), k]);
        }
        let per_class = t.elapsed().as_secs_f64() * 1e3 / 20f64.min(n as f64);
        println!(
            "{{\"n\": {n}, \"k\": {k}, \"spectrum\": {spectral}, \"ms_median\": {:.1}, \"largest_rel_bound\": {worst:.2e}, \"classes\": {classes}, \"per_class_ms\": {per_class:.2}, \"per_class_projected_ms\": {:.0}}}",
            ms[ms.len() / 2],
            per_class * classes as f64
        );
    }
}
