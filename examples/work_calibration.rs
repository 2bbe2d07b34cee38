//! The work budget against the clock: for each kind of question, the work the service estimates for a
//! request (`--max-work` units, read from the 413 it answers with a budget of 0) and the time it takes in
//! process (`analytics::run`, release build, one request at a time), medians of R runs:
//!   cargo run --release --example work_calibration -- [R=3] [SCALE=1]
//! SCALE multiplies the books' sizes. Prints one markdown row per request and the spread of ns per unit.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde::de::DeserializeOwned;
use serde_json::{json, Value};
use std::time::Instant;
use tailtally::analytics::{self, cancel::Cancel, Analytic, Error};
use tailtally::config::ServiceLimits;

fn work<A: Analytic>(req: &A::Request, limits: &ServiceLimits) -> f64 {
    let mut none = limits.clone();
    none.max_work = 0.0;
    match analytics::run::<A>(req, &none, &Cancel::pair().0) {
        Err(Error::TooLarge(m)) if m.starts_with("estimated work ") => {
            m.split_whitespace().nth(2).and_then(|w| w.parse().ok()).expect("the 413 states the work")
        }
        Err(e) => panic!("not a work 413: {e:?}"),
        Ok(_) => 0.0,
    }
}

fn time<A: Analytic>(body: &Value, limits: &ServiceLimits, runs: usize) -> (f64, f64)
where
    A::Request: DeserializeOwned,
{
    let req: A::Request = serde_json::from_value(body.clone()).expect("a request of this kind");
    let units = work::<A>(&req, limits);
    let mut v: Vec<f64> = (0..runs)
        .map(|_| {
            let t = Instant::now();
            let out = analytics::run::<A>(&req, limits, &Cancel::pair().0);
            assert!(out.is_ok(), "answered");
            t.elapsed().as_secs_f64()
        })
        .collect();
    v.sort_by(f64::total_cmp);
    (units, v[runs / 2])
}

fn row<A: Analytic>(name: &str, body: Value, limits: &ServiceLimits, runs: usize, out: &mut Vec<f64>)
where
    A::Request: DeserializeOwned,
{
    let (units, secs) = time::<A>(&body, limits, runs);
    let ns = secs * 1e9 / units;
    out.push(ns);
    println!("| {name} | {units:.3e} | {:.3} | {ns:.0} |", secs);
}

fn main() {
    let mut args = std::env::args().skip(1);
    let runs: usize = args.next().and_then(|s| s.parse().ok()).unwrap_or(3);
    let scale: f64 = args.next().and_then(|s| s.parse().ok()).unwrap_or(1.0);
    let n = |k: f64| (k * scale) as usize;
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    let mut ps = |k: usize| -> Vec<f64> { (0..k).map(|_| rng.gen_range(0.001..0.2)).collect() };
    let (p5, p4, p3) = (ps(n(1e5)), ps(n(1e4)), ps(n(2e3)));
    let mut rng = ChaCha8Rng::seed_from_u64(8);
    let units5: Vec<u64> = (0..p5.len()).map(|_| rng.gen_range(1..=10)).collect();
    let opts = {
        use clap::Parser;
        tailtally::config::Cli::parse_from(["tailtally"]).options
    };
    let mut limits = ServiceLimits::from_options(&opts);
    limits.max_work = f64::INFINITY;
    limits.max_request_bytes = f64::INFINITY;
    let mean = |p: &[f64]| p.iter().sum::<f64>();
    let sd = |p: &[f64]| p.iter().map(|x| x * (1.0 - x)).sum::<f64>().sqrt();
    let at = |p: &[f64], z: f64| (mean(p) + z * sd(p)).ceil() as u64;
    let k5 = at(&p5, 4.0);
    let ks: Vec<u64> = (0..8).map(|i| at(&p5, 1.0 + i as f64)).collect();
    let k4 = at(&p4, 3.0);
    let k3 = at(&p3, 3.0);
    let groups = json!([{"size": n(2e6), "probability": 0.01}, {"size": n(5e5), "probability": 0.3}]);
    let rho = json!({"model": "one_factor_gaussian", "rho": 0.2});
    use analytics::{contributions, distribution, layers, quantiles, reverse_stress, tail};
    println!("| question | work units | seconds | ns per unit |\n|---|---|---|---|");
    let mut ns = Vec::new();
    let l = &limits;
    let o = &mut ns;
    row::<tail::Tail>("tail, 1 threshold", json!({"portfolio": {"probabilities": p5}, "thresholds": [k5]}), l, runs, o);
    row::<tail::Tail>("tail, 8 thresholds", json!({"portfolio": {"probabilities": p5}, "thresholds": ks}), l, runs, o);
    row::<tail::Tail>(
        "tail, 2 wide groups",
        json!({"portfolio": {"probabilities": p4, "groups": groups}, "thresholds": [n(2e6 * 0.01 + 5e5 * 0.3 + 2e3)]}),
        l,
        runs,
        o,
    );
    let many: Vec<Value> =
        (0..n(1e3)).map(|i| json!({"size": 1_000_000, "probability": 0.2 + 1e-4 * i as f64})).collect();
    let many_mean = (0..n(1e3)).map(|i| 1e6 * (0.2 + 1e-4 * i as f64)).sum::<f64>() as u64;
    row::<tail::Tail>(
        "tail, 1000 groups of 10^6",
        json!({"portfolio": {"groups": many}, "thresholds": [many_mean + 30_000]}),
        l,
        runs,
        o,
    );
    row::<tail::Tail>(
        "tail under stress",
        json!({"portfolio": {"probabilities": p5}, "thresholds": [k5], "stress": {"probability_factor": 1.2}}),
        l,
        runs,
        o,
    );
    row::<tail::Tail>(
        "tail in units (1..10)",
        json!({"portfolio": {"probabilities": p5, "units": units5}, "thresholds": [(5.5 * mean(&p5) * 1.05) as u64]}),
        l,
        runs,
        o,
    );
    let compound = json!([{"rate": 50.0 * scale, "severity": {"kind": "geometric", "first": 1, "step": 1, "largest": 200, "ratio": 0.97}}]);
    row::<tail::Tail>(
        "tail, compound source",
        json!({"portfolio": {"probabilities": p4, "compound_sources": compound}, "thresholds": [(1800.0 * scale) as u64]}),
        l,
        runs,
        o,
    );
    row::<tail::Tail>(
        "tail, one-factor",
        json!({"portfolio": {"probabilities": p4}, "thresholds": [k4], "dependence": rho}),
        l,
        runs,
        o,
    );
    row::<quantiles::Quantiles>(
        "quantiles, 2 levels",
        json!({"portfolio": {"probabilities": p5}, "levels": [0.99, 0.999]}),
        l,
        runs,
        o,
    );
    row::<quantiles::Quantiles>(
        "quantiles, one-factor",
        json!({"portfolio": {"probabilities": p4}, "levels": [0.99], "dependence": rho}),
        l,
        runs,
        o,
    );
    row::<distribution::Distribution>(
        "distribution, central range",
        json!({"portfolio": {"probabilities": p5}}),
        l,
        runs,
        o,
    );
    row::<layers::Layers>(
        "layers, 1 limited + 1 unlimited, 1 level",
        json!({"portfolio": {"probabilities": p5}, "layers": [{"attachment": k5, "limit": 50}, {"attachment": k5}], "tail_levels": [0.99]}),
        l,
        runs,
        o,
    );
    row::<layers::Layers>(
        "layers, 4 limited",
        json!({"portfolio": {"probabilities": p5}, "layers": [{"attachment": k5, "limit": 50}, {"attachment": k5 + 100, "limit": 50}, {"attachment": k5 + 200, "limit": 50}, {"attachment": k5 + 300, "limit": 50}]}),
        l,
        runs,
        o,
    );
    row::<layers::Layers>(
        "layers, 4 unlimited",
        json!({"portfolio": {"probabilities": p5}, "layers": [{"attachment": k5}, {"attachment": k5 + 100}, {"attachment": k5 + 200}, {"attachment": k5 + 300}]}),
        l,
        runs,
        o,
    );
    row::<layers::Layers>(
        "layers, 1 layer + 4 tail levels",
        json!({"portfolio": {"probabilities": p5}, "layers": [{"attachment": k5, "limit": 50}], "tail_levels": [0.9, 0.99, 0.999, 0.9999]}),
        l,
        runs,
        o,
    );
    row::<layers::Layers>(
        "layers, 2 unlimited on 2 wide groups",
        json!({"portfolio": {"probabilities": p4, "groups": groups}, "layers": [{"attachment": n(2e6 * 0.01 + 5e5 * 0.3)}, {"attachment": n(2e6 * 0.01 + 5e5 * 0.3 + 500.0)}]}),
        l,
        runs,
        o,
    );
    let big: Vec<Value> = (0..100).map(|i| json!({"size": n(7.4e4), "probability": 0.05 + 0.004 * i as f64})).collect();
    let mid = (n(7.4e4) as f64 * (0.05 * 100.0 + 0.004 * 4950.0) + 3000.0 * scale) as u64;
    row::<layers::Layers>(
        "layers, 2 unlimited on 100 groups of 7.4e4",
        json!({"portfolio": {"groups": big}, "layers": [{"attachment": mid}, {"attachment": mid + 2000}]}),
        l,
        runs,
        o,
    );
    row::<layers::Layers>(
        "layers, 2 unlimited, the same in units (3)",
        json!({"portfolio": {"groups": big.iter().map(|g| { let mut g = g.clone(); g["units"] = json!(3); g }).collect::<Vec<_>>()}, "layers": [{"attachment": 3 * mid}, {"attachment": 3 * mid + 6000}]}),
        l,
        runs,
        o,
    );
    row::<quantiles::Quantiles>(
        "quantiles, far levels (1e-9, 1 - 1e-12)",
        json!({"portfolio": {"probabilities": p5}, "levels": [1e-9, 0.999999999999]}),
        l,
        runs,
        o,
    );
    row::<quantiles::Quantiles>(
        "quantiles, 3 methods",
        json!({"portfolio": {"probabilities": p5}, "levels": [0.99], "methods": ["exact", "saddlepoint", "normal"]}),
        l,
        runs,
        o,
    );
    row::<quantiles::Quantiles>(
        "quantiles, units (1..10)",
        json!({"portfolio": {"probabilities": p5, "units": units5}, "levels": [0.99, 0.999]}),
        l,
        runs,
        o,
    );
    row::<contributions::Contributions>(
        "contributions",
        json!({"portfolio": {"probabilities": p4}, "threshold": k4, "top": 10}),
        l,
        runs,
        o,
    );
    row::<contributions::Contributions>(
        "contributions, one-factor",
        json!({"portfolio": {"probabilities": p3}, "threshold": k3, "top": 10, "dependence": rho}),
        l,
        runs,
        o,
    );
    row::<reverse_stress::ReverseStress>(
        "reverse stress (probability factor)",
        json!({"portfolio": {"probabilities": p5}, "threshold": k5, "level": 0.01, "which": "probability_factor"}),
        l,
        runs,
        o,
    );
    ns.sort_by(f64::total_cmp);
    println!(
        "\nns per unit: min {:.0}, median {:.0}, max {:.0} (max/min {:.1})",
        ns[0],
        ns[ns.len() / 2],
        ns[ns.len() - 1],
        ns[ns.len() - 1] / ns[0]
    );
}
