//! Criterion benchmarks of the exact engine on the Poisson-binomial law with p_i ~ U(0, 0.2).
//!
//! Two groups, each for n = 10^3, 10^4, 10^5, 10^6 exposures drawn from a fixed seed:
//! * `exact_tail_5sd`: P(S >= ceil(mean + 5 sd)) through `exact::evaluate` (moments included, as a request
//!   computes them once);
//! * `exact_full_untilted`: the whole untilted law over its Bernstein window, `exact::tilted(&model, 0.0)`
//!   (all mass outside the window is below 1e-32).
//!
//! Small samples in flat sampling mode keep the run to a minute or two: `cargo bench --bench exact`.
//! Filter with e.g. `cargo bench --bench exact -- tail_5sd/1000000`.

use std::time::Duration;

use criterion::{black_box, criterion_group, criterion_main, BenchmarkId, Criterion, SamplingMode, Throughput};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

use tailtally::engine::exact;
use tailtally::engine::numerics::moments::Moments;
use tailtally::engine::Side;
use tailtally::portfolio::Model;

const SIZES: [usize; 4] = [1_000, 10_000, 100_000, 1_000_000];

/// n probabilities uniform on [0, 0.2), the same stream for every run (seed 42).
fn probabilities(n: usize) -> Vec<f64> {
    let mut rng = ChaCha8Rng::seed_from_u64(42);
    (0..n).map(|_| rng.gen_range(0.0..0.2)).collect()
}

fn configure<'a>(c: &'a mut Criterion, name: &str) -> criterion::BenchmarkGroup<'a, criterion::measurement::WallTime> {
    let mut g = c.benchmark_group(name);
    g.sample_size(10)
        .sampling_mode(SamplingMode::Flat)
        .warm_up_time(Duration::from_millis(500))
        .measurement_time(Duration::from_secs(3));
    g
}

fn tail_5sd(c: &mut Criterion) {
    let mut g = configure(c, "exact_tail_5sd");
    for n in SIZES {
        let model = Model::from_parts(&probabilities(n), &[], 0.0);
        let mom = Moments::of(&model);
        let k = (mom.mean + 5.0 * mom.sd()).ceil() as u64;
        g.throughput(Throughput::Elements(n as u64));
        g.bench_with_input(BenchmarkId::from_parameter(n), &model, |b, model| {
            b.iter(|| {
                let mom = Moments::of(model);
                let (vals, work) = exact::evaluate(model, &mom, &[(black_box(k), Side::Upper)]);
                black_box((vals[0].ln_value, work.max_window))
            })
        });
    }
    g.finish();
}

fn full_untilted(c: &mut Criterion) {
    let mut g = configure(c, "exact_full_untilted");
    for n in SIZES {
        let model = Model::from_parts(&probabilities(n), &[], 0.0);
        g.throughput(Throughput::Elements(n as u64));
        g.bench_with_input(BenchmarkId::from_parameter(n), &model, |b, model| {
            b.iter(|| {
                let law = exact::tilted(model, black_box(0.0));
                black_box((law.window.lo, law.window.w.len(), law.window.w[0]))
            })
        });
    }
    g.finish();
}

criterion_group!(benches, tail_5sd, full_untilted);
criterion_main!(benches);
