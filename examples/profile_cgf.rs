//! The passes behind the saddlepoint method, timed one by one at n = 10^6 (p ~ U(0, 0.2), k = mean + 5 sd),
//! minimum of 25 runs in ms:  cargo run --release --example profile_cgf
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use std::time::Instant;
use tailtally::engine::numerics::{cgf, moments::Moments};
use tailtally::portfolio::Model;
fn med(mut f: impl FnMut()) -> f64 {
    let mut v = vec![];
    for _ in 0..25 {
        let t = Instant::now();
        f();
        v.push(t.elapsed().as_secs_f64() * 1e3);
    }
    v.sort_by(|a, b| a.partial_cmp(b).unwrap());
    v[0]
}
fn main() {
    let n = 1_000_000;
    let mut rng = ChaCha8Rng::seed_from_u64(42);
    let ps: Vec<f64> = (0..n).map(|_| rng.gen_range(0.0..0.2)).collect();
    let model = Model::from_parts(&ps, &[], 0.0);
    let m = Moments::of(&model);
    let x = m.mean + 5.0 * m.sd();
    println!(
        "moments {:.2}",
        med(|| {
            std::hint::black_box(Moments::of(&model));
        })
    );
    println!(
        "solve {:.2}",
        med(|| {
            std::hint::black_box(cgf::solve(&model, &m, x, 1e-12 * m.sd()));
        })
    );
    let t = cgf::solve(&model, &m, x, 1e-12 * m.sd()).t;
    println!(
        "eval {:.2}",
        med(|| {
            std::hint::black_box(cgf::eval(&model, t));
        })
    );
    println!(
        "eval_var {:.2}",
        med(|| {
            std::hint::black_box(cgf::eval_var(&model, t));
        })
    );
    println!(
        "scale_by_products {:.2}",
        med(|| {
            std::hint::black_box(cgf::scale_by_products(&model, t));
        })
    );
    println!(
        "scale {:.2}",
        med(|| {
            std::hint::black_box(cgf::scale(&model, t));
        })
    );
}
