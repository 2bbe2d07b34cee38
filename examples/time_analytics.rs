//! Time the analytics on one portfolio (p_i ~ U(0, 0.2), fixed seed), median of 5 runs in ms:
//!   cargo run --release --example time_analytics -- 100000
//! Prints one markdown row per analytic (engine only, no HTTP or parsing).

#[path = "common/timing.rs"]
mod timing;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use tailtally::analytics::dependence::Dependence;
use tailtally::analytics::distribution::{central_range, table};
use tailtally::analytics::law::Law;
use tailtally::analytics::layers::{layer, tail_expectation};
use tailtally::analytics::quantiles::quantiles;
use tailtally::engine::exact::leave_one_out::contributions;
use tailtally::engine::numerics::moments::Moments;
use tailtally::engine::{MethodId, Side};
use tailtally::portfolio::Model;

fn main() {
    let n: usize = std::env::args().nth(1).and_then(|s| s.parse().ok()).unwrap_or(100_000);
    let mut rng = ChaCha8Rng::seed_from_u64(42);
    let ps: Vec<f64> = (0..n).map(|_| rng.gen_range(0.0..0.2)).collect();
    let model = Model::from_parts(&ps, &[], 0.0);
    let m = Moments::of(&model);
    let k = (m.mean + 3.0 * m.sd()).ceil() as u64;
    println!("n = {n}, k = mean + 3 sd = {k}\n\n| analytic | median ms |\n|---|---|");
    let law = Law::independent(model.clone());
    let row = |name: &str, ms: f64| println!("| {name} | {ms:.1} |");
    row("exact tail P(S >= k)", timing::median_ms(5, || drop(law.exact(&[(k, Side::Upper)]))));
    row(
        "quantiles 0.95, 0.99, 0.995 (exact)",
        timing::median_ms(5, || drop(quantiles(&law, &[0.95, 0.99, 0.995], MethodId::Exact, None))),
    );
    let (a, b) = central_range(&law, 1e-12);
    row(
        &format!("distribution over the 1e-12 central range ({} counts)", b - a + 1),
        timing::median_ms(5, || drop(table(&law, a, b))),
    );
    row(
        "layer (k, k + 50]",
        timing::median_ms(5, || {
            std::hint::black_box(layer(&law, k, Some(50)));
        }),
    );
    row(
        "E[S | S > q_0.99]",
        timing::median_ms(5, || {
            std::hint::black_box(tail_expectation(&law, 0.99));
        }),
    );
    row("contributions at k (every exposure)", timing::median_ms(5, || drop(contributions(&model, &m, k))));
    let dep = Dependence::one_factor(0.1);
    row("one-factor model (rho 0.1): building the law", timing::median_ms(5, || drop(Law::new(model.clone(), dep))));
    let mixed = Law::new(model.clone(), dep);
    row("one-factor model (rho 0.1): exact tail at k", timing::median_ms(5, || drop(mixed.exact(&[(k, Side::Upper)]))));
}
