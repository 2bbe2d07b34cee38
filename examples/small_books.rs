//! Where the recursion of `exact::small` stops paying: the exact tail of a small book at 2 thresholds (the
//! mean + 2 sd and + 5 sd) by the recursion and by tilted laws, side by side, medians of many runs.
//!
//!   cargo run --release --example small_books
#[path = "common/timing.rs"]
mod timing;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use tailtally::engine::exact;
use tailtally::engine::numerics::moments::Moments;
use tailtally::engine::Side;
use tailtally::portfolio::Model;

fn main() {
    println!("| n | recursion us | tilted us | tilted / recursion | recursion rel. bound | tilted rel. bound |");
    println!("|---|---|---|---|---|---|");
    for n in [10usize, 25, 50, 100, 150, 200, 300, 400] {
        let mut rng = ChaCha8Rng::seed_from_u64(n as u64);
        let ps: Vec<f64> = (0..n).map(|_| rng.gen_range(0.0..0.2)).collect();
        let model = Model::from_parts(&ps, &[], 0.0);
        let m = Moments::of(&model);
        let qs: Vec<(u64, Side)> =
            [2.0, 5.0].iter().map(|z| ((m.mean + z * m.sd()).ceil() as u64, Side::Upper)).collect();
        let reps = 2001;
        let a = exact::small::evaluate(&model, &qs).expect("values above the floor");
        let b = exact::evaluate_tilted(&model, &m, &qs).0;
        let ta = timing::median_us(reps, || drop(std::hint::black_box(exact::small::evaluate(&model, &qs))));
        let tb = timing::median_us(reps, || drop(std::hint::black_box(exact::evaluate_tilted(&model, &m, &qs))));
        println!("| {n} | {ta:.2} | {tb:.2} | {:.2} | {:.1e} | {:.1e} |", tb / ta, a[1].rel_err, b[1].rel_err);
    }
}
