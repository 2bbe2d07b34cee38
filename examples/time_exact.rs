//! Time the exact engine on a file of probabilities, for `benches/compare_scipy.py`.
//!
//! Usage: `time_exact PROBS_FILE MODE [REPEATS]`
//!
//! * `PROBS_FILE`: one probability per line, as written by Python's `repr(float)` (shortest round-trip form, so
//!   Rust's `f64::from_str` recovers exactly the same doubles as the Python side).
//! * `MODE`:
//!   - `tail`: P(S >= k) with k = ceil(mean + 5 sd), through `exact::evaluate`;
//!   - `full`: the untilted law over its Bernstein window, through `exact::tilted(&model, 0.0)`;
//!   - `phases` (diagnostic): one `tail` computation split into its stages, to see where the time goes;
//!   - `compare`: the tilted law of the tail by the product tree and by the characteristic function,
//!     alternated, medians of each, and the tail and bound each gives;
//!   - `tightness`: here `PROBS_FILE` is fixtures/reference/tightness.json; for each case there (the "mod1000"
//!     portfolios, n up to 10^6, P(S >= ceil(mean + 5 sd)) from python-flint at 256 bits) it prints the exact
//!     method's value, observed relative error, rigorous relative bound and their ratio (docs/accuracy.md).
//! * `REPEATS`: number of timed runs (default 7); the median and the minimum are reported.
//!
//! Prints one JSON line. Timed work: building the `Model` from the slice, `Moments::of` and the engine call;
//! reading and parsing the file is not timed.

use std::time::Instant;

use tailtally::engine::exact::window::Window;
use tailtally::engine::exact::{self, convolve, leaf};
use tailtally::engine::numerics::cgf;
use tailtally::engine::numerics::moments::Moments;
use tailtally::engine::{Side, Value};
use tailtally::portfolio::Model;

fn usage() -> ! {
    eprintln!("usage: time_exact PROBS_FILE tail|full|phases|compare [REPEATS=7]");
    std::process::exit(2);
}

fn read_probs(path: &str) -> Vec<f64> {
    let text = std::fs::read_to_string(path).unwrap_or_else(|e| {
        eprintln!("cannot read {path}: {e}");
        std::process::exit(1);
    });
    text.lines()
        .map(str::trim)
        .filter(|l| !l.is_empty())
        .enumerate()
        .map(|(i, l)| {
            l.parse::<f64>().unwrap_or_else(|e| {
                eprintln!("line {}: cannot parse {l:?}: {e}", i + 1);
                std::process::exit(1);
            })
        })
        .collect()
}

/// JSON number, or null for non-finite values (JSON has no inf/NaN). `{:?}` prints the shortest string that
/// round-trips, so Python reads back the same double.
fn num(x: f64) -> String {
    if x.is_finite() {
        format!("{x:?}")
    } else {
        "null".to_string()
    }
}

fn ms(d: std::time::Duration) -> f64 {
    d.as_secs_f64() * 1e3
}

fn median(v: &mut [f64]) -> f64 {
    v.sort_by(|a, b| a.partial_cmp(b).unwrap());
    let m = v.len() / 2;
    if v.len() % 2 == 1 {
        v[m]
    } else {
        0.5 * (v[m - 1] + v[m])
    }
}

/// The threshold of the benchmark: ceil(mean + 5 sd).
fn threshold(mom: &Moments) -> u64 {
    (mom.mean + 5.0 * mom.sd()).ceil() as u64
}

/// Observed error and rigorous bound against the committed references (the observed error is floored at U:
/// the reference is rounded to a double before the comparison).
fn tightness(path: &str) {
    let text = std::fs::read_to_string(path).unwrap_or_else(|e| {
        eprintln!("cannot read {path}: {e}");
        std::process::exit(1);
    });
    let doc: serde_json::Value = serde_json::from_str(&text).expect("tightness.json");
    for c in doc["cases"].as_array().expect("cases") {
        let n = c["n"].as_u64().expect("n");
        let k = c["k"].as_u64().expect("k");
        let p_ref: f64 = c["upper"].as_str().expect("upper").parse().expect("a decimal");
        let ps: Vec<f64> = (0..n).map(|i| ((7919 * i) % 1000 + 1) as f64 / 5000.0).collect();
        let start = Instant::now();
        let model = Model::from_parts(&ps, &[], 0.0);
        let v = exact::evaluate(&model, &Moments::of(&model), &[(k, Side::Upper)]).0[0];
        let elapsed = ms(start.elapsed());
        let observed = (v.value - p_ref).abs() / p_ref;
        let ratio = v.rel_err / observed.max(f64::EPSILON / 2.0);
        // The same tail from the product tree at the same tilt, for the table's "tree" columns.
        let mom = Moments::of(&model);
        let t = cgf::solve(&model, &mom, k as f64, 0.05 * mom.sd().clamp(1.0, 10.0)).t.max(0.0);
        let tree = exact::upper_tail_of(&exact::tilted_tree(&model, t), k);
        let tree_obs = (tree.value - p_ref).abs() / p_ref;
        println!(
            "{{\"mode\":\"tightness\",\"n\":{n},\"k\":{k},\"p\":{},\"reference\":{},\"observed_rel\":{},\
             \"rel_err_bound\":{},\"ratio\":{},\"ms\":{},\"tree_observed_rel\":{},\"tree_rel_err_bound\":{},\
             \"tree_ratio\":{}}}",
            num(v.value),
            num(p_ref),
            num(observed),
            num(v.rel_err),
            num(ratio),
            num(elapsed),
            num(tree_obs),
            num(tree.rel_err),
            num(tree.rel_err / tree_obs.max(f64::EPSILON / 2.0)),
        );
    }
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    if args.len() < 3 {
        usage();
    }
    let mode = args[2].as_str();
    if mode == "tightness" {
        tightness(&args[1]);
        return;
    }
    let probs = read_probs(&args[1]);
    let repeats: usize = match args.get(3) {
        Some(s) => s.parse().unwrap_or_else(|_| usage()),
        None => 7,
    };
    let repeats = repeats.max(1);
    let n = probs.len();
    let k = threshold(&Moments::of(&Model::from_parts(&probs, &[], 0.0)));

    match mode {
        "tail" => {
            let mut times = Vec::with_capacity(repeats);
            let mut last: Option<(Value, exact::Work)> = None;
            for _ in 0..repeats {
                let start = Instant::now();
                let model = Model::from_parts(&probs, &[], 0.0);
                let mom = Moments::of(&model);
                let (vals, work) = exact::evaluate(&model, &mom, &[(k, Side::Upper)]);
                times.push(ms(start.elapsed()));
                last = Some((std::hint::black_box(vals[0]), work));
            }
            let (v, work) = last.unwrap();
            let min = times.iter().copied().fold(f64::INFINITY, f64::min);
            let med = median(&mut times);
            println!(
                "{{\"mode\":\"tail\",\"n\":{n},\"k\":{k},\"median_ms\":{},\"min_ms\":{},\"ln_p\":{},\"p\":{},\
                 \"rel_err_bound\":{},\"abs_err_bound\":{},\"max_window\":{},\"tilts\":{},\"repeats\":{repeats}}}",
                num(med),
                num(min),
                num(v.ln_value),
                num(v.value),
                num(v.rel_err),
                num(v.abs_err),
                work.max_window,
                work.tilts,
            );
        }
        "full" => {
            let mut times = Vec::with_capacity(repeats);
            let mut last = None;
            for _ in 0..repeats {
                let start = Instant::now();
                let model = Model::from_parts(&probs, &[], 0.0);
                let law = exact::tilted(&model, 0.0);
                times.push(ms(start.elapsed()));
                last = Some(std::hint::black_box(law));
            }
            let law = last.unwrap();
            let w = &law.window;
            let min = times.iter().copied().fold(f64::INFINITY, f64::min);
            let med = median(&mut times);
            // Cross-check: the same tail summed from the untilted pmf (accurate only to ~1e-16 absolute, i.e.
            // relative 1e-16 / p, and with no tilt it cannot reach far tails; the `tail` mode is the real answer).
            let tail: f64 = w.w.iter().enumerate().filter(|(i, _)| w.lo + *i as u64 >= k).map(|(_, x)| x).sum();
            let total: f64 = w.w.iter().sum();
            println!(
                "{{\"mode\":\"full\",\"n\":{n},\"k\":{k},\"median_ms\":{},\"min_ms\":{},\"ln_p\":{},\"p\":{},\
                 \"rel_err_bound\":null,\"window_rel\":{},\"window_abs\":{},\"max_window\":{},\"pmf_lo\":{},\
                 \"pmf_len\":{},\"pmf_sum\":{},\"repeats\":{repeats}}}",
                num(med),
                num(min),
                num(tail.ln()),
                num(tail),
                num(w.rel),
                num(w.abs),
                w.w.len(),
                w.lo,
                w.w.len(),
                num(total),
            );
        }
        "compare" => {
            // The two constructions of the same tilted law, alternated at the tilt of the tail: the product tree
            // (`exact::tilted_tree`) and the characteristic function (`characteristic::build`), medians of each,
            // and the tail each gives with its rigorous bound.
            let model = Model::from_parts(&probs, &[], 0.0);
            let mom = Moments::of(&model);
            let t = cgf::solve(&model, &mom, k as f64, 0.05 * mom.sd().clamp(1.0, 10.0)).t.max(0.0);
            let (mut tt, mut tc) = (Vec::new(), Vec::new());
            let (mut vt, mut vc) = (None, None);
            for _ in 0..repeats {
                let s = Instant::now();
                let law = exact::tilted_tree(&model, t);
                tt.push(ms(s.elapsed()));
                vt = Some(exact::upper_tail_of(&law, k));
                let s = Instant::now();
                let law = exact::characteristic::build(&model, t);
                tc.push(ms(s.elapsed()));
                vc = law.map(|l| exact::upper_tail_of(&l, k));
            }
            let vt = vt.unwrap();
            let (cf_p, cf_b) = vc.map_or((f64::NAN, f64::NAN), |v| (v.value, v.rel_err));
            println!(
                "{{\"mode\":\"compare\",\"n\":{n},\"k\":{k},\"t\":{},\"tree_median_ms\":{},\"cf_median_ms\":{},\
                 \"tree_p\":{},\"tree_rel_err_bound\":{},\"cf_p\":{},\"cf_rel_err_bound\":{},\"repeats\":{repeats}}}",
                num(t),
                num(median(&mut tt)),
                num(median(&mut tc)),
                num(vt.value),
                num(vt.rel_err),
                num(cf_p),
                num(cf_b),
            );
        }
        "phases" => {
            // The stages of one `tail` evaluation, redone with the public pieces: the moments, the saddlepoint
            // solve for the tilt (as `evaluate` does it: tolerance 0.05 sd capped at 0.5), the tilted variance,
            // the tilted law (leaves + products), the scale K(t) - t k; then the whole `evaluate` for reference.
            let model = Model::from_parts(&probs, &[], 0.0);
            let mut best = [f64::INFINITY; 7];
            let mut t_used = 0.0;
            let mut window = 0;
            for _ in 0..repeats {
                let s = Instant::now();
                let mom = Moments::of(&model);
                let t0 = ms(s.elapsed());

                let s = Instant::now();
                let sd = mom.sd().max(1.0);
                let t = cgf::solve(&model, &mom, k as f64, 0.05 * sd.min(10.0)).t.max(0.0);
                let t1 = ms(s.elapsed());

                let s = Instant::now();
                let v = std::hint::black_box(cgf::eval_var(&model, t));
                let t2 = ms(s.elapsed());

                let s = Instant::now();
                let law = exact::tilted(&model, t);
                let t3 = ms(s.elapsed());

                // `tilted` computes the scale itself; time it alone to split the leaves/products from it.
                let s = Instant::now();
                let sc = std::hint::black_box(cgf::scale(&model, t));
                let t4 = ms(s.elapsed());

                let s = Instant::now();
                let cv = std::hint::black_box(cgf::eval(&model, t));
                let t5 = ms(s.elapsed());

                let s = Instant::now();
                let (vals, _) = exact::evaluate(&model, &mom, &[(k, Side::Upper)]);
                let t6 = ms(s.elapsed());
                std::hint::black_box((vals, v, sc.phi, cv.k4));

                for (b, x) in best.iter_mut().zip([t0, t1, t2, t3, t4, t5, t6]) {
                    *b = b.min(x);
                }
                t_used = t;
                window = law.window.w.len();
            }
            let tree = merge_breakdown(&model, t_used, repeats);
            println!(
                "{{\"mode\":\"phases\",\"n\":{n},\"k\":{k},\"t\":{},\"window\":{window},\"min_ms\":{{\"moments\":{},\
                 \"solve_tilt\":{},\"eval_var\":{},\"tilted_total\":{},\"of_which_scale\":{},\"cgf_eval\":{},\
                 \"evaluate_total\":{}}},\"tree\":{tree},\"repeats\":{repeats}}}",
                num(t_used),
                num(best[0]),
                num(best[1]),
                num(best[2]),
                num(best[3]),
                num(best[4]),
                num(best[5]),
                num(best[6]),
            );
        }
        _ => usage(),
    }
}

/// Inside `exact::tilted`: the leaves, then the products, redone with the public pieces in the same order as
/// `convolve::product_all` (always merge the two shortest). Each product is attributed to direct convolution or
/// FFT by the same cost rule `convolve::product` applies. Best of `repeats` for the totals; the per-method split
/// and counts come from the last run. Returns a JSON object.
fn merge_breakdown(model: &Model, t: f64, repeats: usize) -> String {
    use std::cmp::Reverse;
    use std::collections::BinaryHeap;
    let c = tailtally::engine::numerics::cgf::TiltConsts::new(t);
    let (mut best_leaves, mut best_products) = (f64::INFINITY, f64::INFINITY);
    let mut split = (0.0, 0usize, 0.0, 0usize, 0.0f64); // direct ms, count, fft ms, count, largest direct cost
    for _ in 0..repeats {
        let s = Instant::now();
        let parts: Vec<Window> = model.bernoulli.chunks(leaf::BLOCK).map(|ch| leaf::bernoulli_block(ch, &c)).collect();
        best_leaves = best_leaves.min(ms(s.elapsed()));

        let mut heap: BinaryHeap<Reverse<(usize, usize)>> = BinaryHeap::new();
        let mut slots: Vec<Option<Window>> = Vec::with_capacity(parts.len() * 2);
        for w in parts {
            heap.push(Reverse((w.w.len(), slots.len())));
            slots.push(Some(w));
        }
        let mut cur = (0.0, 0usize, 0.0, 0usize, 0.0f64);
        let s_all = Instant::now();
        while heap.len() > 1 {
            let Reverse((_, i)) = heap.pop().unwrap();
            let Reverse((_, j)) = heap.pop().unwrap();
            let a = slots[i].take().unwrap();
            let b = slots[j].take().unwrap();
            let (la, lb) = (a.w.len(), b.w.len());
            let max = match (a.max, b.max) {
                (Some(x), Some(y)) => Some(x + y),
                _ => None,
            };
            let (klo, khi) = Window::keep_range(a.mean + b.mean, a.var + b.var, a.lo + b.lo, max);
            let klo = klo.max(a.lo + b.lo);
            let khi = khi.min(a.hi() + b.hi()).max(klo);
            let nfft = (la + lb - 1).next_power_of_two() as f64;
            let direct_cost = la.min(lb) as f64 * (khi - klo + 1) as f64;
            let is_direct = la.min(lb) <= 16 || direct_cost <= 3.0 * nfft * nfft.log2().max(1.0);
            let s = Instant::now();
            let prod = convolve::product(&a, &b);
            let dt = ms(s.elapsed());
            if is_direct {
                cur.0 += dt;
                cur.1 += 1;
                cur.4 = cur.4.max(direct_cost);
            } else {
                cur.2 += dt;
                cur.3 += 1;
            }
            heap.push(Reverse((prod.w.len(), slots.len())));
            slots.push(Some(prod));
        }
        best_products = best_products.min(ms(s_all.elapsed()));
        split = cur;
    }
    format!(
        "{{\"leaves_ms\":{},\"products_ms\":{},\"direct_ms\":{},\"direct_count\":{},\"largest_direct_cost\":{},\
         \"fft_ms\":{},\"fft_count\":{}}}",
        num(best_leaves),
        num(best_products),
        num(split.0),
        split.1,
        num(split.4),
        num(split.2),
        split.3
    )
}
