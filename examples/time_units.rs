//! Time the exact engine on books with loss units (the individual risk model), beside the same books counted
//! (every unit 1), measured side by side in one run.
//!
//! Usage: `cargo run --release --example time_units [REPEATS=5] [N...]` (default n = 10^4 and 10^5)
//!
//! Books: n exposures with p ~ U(0, 0.05) and units log-uniform in 1..=1000 (an invented book, drawn from a
//! fixed seed), n = 10^4 and 10^5. Figures: the exact P(S >= k) at k = mean + 5 sd (in units), and the
//! untilted law over its whole Bernstein window (the central range holding all but about 1e-32 of the mass:
//! what a distribution over the 1e-12 central range needs at most). Prints medians and minimums in ms, the
//! lattice width and the widest window. For the books in units it also times the two constructions of the
//! tilted law side by side in the same run, at the tail's tilt: the characteristic function
//! (`lattice::tilted`, which the service uses) and the product tree (`lattice::tilted_tree`), each with the tail
//! read from it, and prints both tails and bounds. Timings depend on the machine's load: say so beside any you
//! quote.

#[path = "common/units_book.rs"]
mod units_book;
use std::time::Instant;
use tailtally::engine::exact::{self, lattice};
use tailtally::engine::numerics::cgf;
use tailtally::engine::numerics::moments::Moments;
use tailtally::engine::Side;
use tailtally::portfolio::Model;
use units_book::{book, model};

fn median_min(mut v: Vec<f64>) -> (f64, f64) {
    v.sort_by(f64::total_cmp);
    (v[v.len() / 2], v[0])
}

/// CPU time of this thread in ms (the kernel's schedstat, in ns): on a loaded machine it moves far less than
/// the wall clock, which also counts the time spent waiting for a core.
fn cpu_ms() -> f64 {
    std::fs::read_to_string("/proc/thread-self/schedstat")
        .ok()
        .and_then(|s| s.split_whitespace().next().and_then(|x| x.parse::<f64>().ok()))
        .map_or(f64::NAN, |ns| ns * 1e-6)
}

/// Medians of the wall and the CPU time (ms), the minimum wall time, and what `f` returned last.
fn time(repeats: usize, mut f: impl FnMut() -> usize) -> (f64, f64, f64, usize) {
    let (mut ms, mut cpu) = (Vec::new(), Vec::new());
    let mut width = 0;
    for _ in 0..repeats {
        let (t, c) = (Instant::now(), cpu_ms());
        width = f();
        ms.push(t.elapsed().as_secs_f64() * 1e3);
        cpu.push(cpu_ms() - c);
    }
    let (med, min) = median_min(ms);
    (med, median_min(cpu).0, min, width)
}

fn main() {
    let repeats: usize = std::env::args().nth(1).and_then(|s| s.parse().ok()).unwrap_or(5);
    let sizes: Vec<usize> = std::env::args().skip(2).filter_map(|s| s.parse().ok()).collect();
    let sizes = if sizes.is_empty() { vec![10_000, 100_000] } else { sizes };
    for n in sizes {
        let (ps, us) = book(n, 0x9e37_79b9_7f4a_7c15 ^ n as u64);
        let weighted = model(&ps, &us);
        let count = Model::from_parts(&ps, &[], 0.0);
        for (name, m) in [("units", &weighted), ("count", &count)] {
            let mo = Moments::of(m);
            let k_units = (mo.mean + 5.0 * mo.sd()).ceil() as u64;
            let (j, side) = lattice::query(m, k_units, Side::Upper).unwrap_or((k_units, Side::Upper));
            let (mut p, mut bound) = (0.0, 0.0);
            let (tail_med, tail_cpu, tail_min, tail_w) = time(repeats, || {
                let mo = Moments::of(m);
                let (v, work) = exact::evaluate(m, &mo, &[(j, side)]);
                (p, bound) = (v[0].value, v[0].rel_err);
                work.max_window
            });
            let full = if n <= 10_000 {
                let (a, c, b, w) = time(repeats, || exact::tilted(m, 0.0).window.w.len());
                format!(", \"full_ms_median\": {a:.1}, \"full_cpu_ms_median\": {c:.1}, \"full_ms_min\": {b:.1}, \"full_window\": {w}")
            } else {
                String::new()
            };
            println!(
                "{{\"n\": {n}, \"book\": \"{name}\", \"lattice_width\": {}, \"threshold\": {k_units}, \"p\": {p:e}, \"rel_bound\": {bound:.3e}, \"tail_ms_median\": {tail_med:.1}, \"tail_cpu_ms_median\": {tail_cpu:.1}, \"tail_ms_min\": {tail_min:.1}, \"tail_window\": {tail_w}{full}}}",
                m.lattice_width()
            );
            if name == "units" {
                // The two constructions at the tail's tilt, alternately, in this run.
                let mo = Moments::of(m);
                let t = cgf::solve(m, &mo, j as f64, 0.05 * mo.sd().min(10.0)).t.max(0.0);
                let mut line = format!("{{\"n\": {n}, \"construction_at_tilt\": {t:e}");
                for (label, tree) in [("characteristic", false), ("tree", true)] {
                    let (mut v, mut b) = (0.0, 0.0);
                    let (med, cpu, min, _) = time(repeats, || {
                        let law = if tree { lattice::tilted_tree(m, t) } else { lattice::tilted(m, t) };
                        let val = exact::upper_tail_of(&law, j);
                        (v, b) = (val.value, val.rel_err);
                        law.window.w.len()
                    });
                    line += &format!(", \"{label}\": {{\"p\": {v:e}, \"rel_bound\": {b:.3e}, \"ms_median\": {med:.1}, \"cpu_ms_median\": {cpu:.1}, \"ms_min\": {min:.1}}}");
                }
                println!("{line}}}");
            }
        }
    }
}
