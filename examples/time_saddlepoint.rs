//! The saddlepoint method at n exposures (p ~ U(0, 0.2), ChaCha8 seed 42, k = ceil(mean + 5 sd)): the
//! engine's own time (what the answer's `elapsed_us` counts: the solve, K and the formula; the moments are
//! taken once outside, as `Prepared` does before the method runs), and its passes one by one, median (minimum) in ms:
//!   cargo run --release --example time_saddlepoint -- [N=1000000] [R=25]
//! `perf record -g target/release/examples/time_saddlepoint 1000000 400` profiles the method alone.
#[path = "common/timing.rs"]
mod timing;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use std::hint::black_box;
use tailtally::engine::numerics::cgf;
use tailtally::engine::saddlepoint::Saddlepoint;
use tailtally::engine::{Prepared, Side, TailMethod};
use tailtally::portfolio::Model;
use timing::median_min_ms as median;

fn main() {
    let mut args = std::env::args().skip(1);
    let n: usize = args.next().and_then(|s| s.parse().ok()).unwrap_or(1_000_000);
    let r: usize = args.next().and_then(|s| s.parse().ok()).unwrap_or(25);
    let mut rng = ChaCha8Rng::seed_from_u64(42);
    let ps: Vec<f64> = (0..n).map(|_| rng.gen_range(0.0..0.2)).collect();
    let model = Model::from_parts(&ps, &[], 0.0);
    let prep = Prepared::new(&model);
    let m = &prep.moments;
    let k = (m.mean + 5.0 * m.sd()).ceil() as u64;
    let e = Saddlepoint.estimate(&prep, &[(k, Side::Upper)]).remove(0);
    println!("n = {n}, k = {k}, P = {:e}, ln P = {}, bound {:e}", e.probability, e.ln_probability, e.error_bound);
    let method = median(r, || {
        black_box(Saddlepoint.estimate(&prep, &[(k, Side::Upper)]));
    });
    let x = k as f64;
    // The method's tolerance.
    let tol = 1e-12 * m.sd().max(1.0);
    let t = cgf::solve(&model, m, x, tol).t;
    let solve = median(r, || {
        black_box(cgf::solve(&model, m, x, tol));
    });
    let eval = median(r, || {
        black_box(cgf::eval(&model, t));
    });
    let scale = median(r, || {
        black_box(cgf::scale_by_products(&model, t));
    });
    // The floor: one plain read of the probabilities.
    let read = median(r, || {
        black_box(model.bernoulli.iter().sum::<f64>());
    });
    println!("| method | solve | one K'..K'''' pass | K by block products | one plain read |");
    println!("|---|---|---|---|---|");
    println!("| {method} | {solve} | {eval} | {scale} | {read} |");
}
