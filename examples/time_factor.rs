//! Time the one-factor model (median of 7 runs, ms, engine only):
//!   cargo run --release --example time_factor
//! A homogeneous group of 10^6 and 10^5 listed exposures (p_i ~ U(0, 0.2), fixed seed), one threshold each,
//! rho = 0.12, default tolerance (relative 1e-7, absolute 1e-13); a fresh law per run, so the time includes
//! placing the panels. Also prints the nodes evaluated and the value with its bound.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use std::time::Instant;
use tailtally::analytics::dependence::Dependence;
use tailtally::analytics::law::Law;
use tailtally::engine::Side;
use tailtally::portfolio::Model;

fn case(name: &str, model: &Model, k: u64, runs: usize) {
    let dep = Dependence::one_factor(0.12);
    let mut times = Vec::new();
    let mut last = None;
    for _ in 0..runs {
        let t = Instant::now();
        let law = Law::new(model.clone(), dep);
        let v = law.exact(&[(k, Side::Upper)])[0];
        times.push(t.elapsed().as_secs_f64() * 1e3);
        last = Some((v, law.nodes_used()));
    }
    times.sort_by(f64::total_cmp);
    let (v, nodes) = last.unwrap();
    println!(
        "| {name} | {k} | {:.1} | {:.1} | {:.1} | {} | {:.10e} | {:.2e} |",
        times[runs / 2],
        times[0],
        times[runs - 1],
        nodes.0,
        v.value,
        v.abs_err
    );
}

fn main() {
    println!(
        "| case | k | median ms | min ms | max ms | nodes | P(S >= k) | bound |\n|---|---|---|---|---|---|---|---|"
    );
    let g = Model::from_parts(&[], &[(1_000_000, 0.01)], 0.0);
    for k in [10_000u64, 50_000, 150_000] {
        case("group of 10^6, p = 0.01", &g, k, 7);
    }
    let mut rng = ChaCha8Rng::seed_from_u64(42);
    let ps: Vec<f64> = (0..100_000).map(|_| rng.gen_range(0.0..0.2)).collect();
    let listed = Model::from_parts(&ps, &[], 0.0);
    for k in [10_000u64, 30_000] {
        case("10^5 listed, p ~ U(0, 0.2)", &listed, k, 7);
    }
}
