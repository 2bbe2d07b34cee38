//! Time every method on one portfolio (p_i ~ U(0, 0.2), fixed seed) at mean + 5 sd, median of repeated runs:
//!   cargo run --release --example time_methods -- 1000000
//! Prints one markdown row per method: the cost beyond parsing, including the moments pass.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use std::time::Instant;
use tailtally::engine::{self, MethodId, Prepared, Side, Tolerance};
use tailtally::portfolio::Model;

fn main() {
    let n: usize = std::env::args().nth(1).and_then(|s| s.parse().ok()).unwrap_or(1_000_000);
    let mut rng = ChaCha8Rng::seed_from_u64(42);
    let ps: Vec<f64> = (0..n).map(|_| rng.gen_range(0.0..0.2)).collect();
    let model = Model::from_parts(&ps, &[], 0.0);
    let prep = Prepared::new(&model);
    let k = (prep.moments.mean + 5.0 * prep.moments.sd()).ceil() as u64;
    println!("n = {n}, k = {k}\n\n| method | median ms | probability | error bound | kind |\n|---|---|---|---|---|");
    let methods = [
        (MethodId::Normal, None),
        (MethodId::Edgeworth, None),
        (MethodId::Poisson, None),
        (MethodId::Saddlepoint, None),
        (MethodId::Exact, None),
        (MethodId::Auto, Some(Tolerance::Absolute(1e-3))),
        (MethodId::Auto, Some(Tolerance::Relative(1e-3))),
    ];
    for (m, tol) in methods {
        let mut times = Vec::new();
        let mut last = None;
        for _ in 0..7 {
            let t0 = Instant::now();
            let prep = Prepared::new(&model);
            let e = engine::run(m, &prep, &[(k, Side::Upper)], tol).remove(0);
            times.push(t0.elapsed().as_secs_f64() * 1e3);
            last = Some(e);
        }
        times.sort_by(|a, b| a.partial_cmp(b).unwrap());
        let e = last.unwrap();
        let label = match tol {
            Some(t) => format!("{m:?} {t:?} -> {:?}", e.method),
            None => format!("{m:?}"),
        };
        println!("| {label} | {:.2} | {:.6e} | {:.2e} | {:?} |", times[3], e.probability, e.error_bound, e.bound_kind);
    }
}
