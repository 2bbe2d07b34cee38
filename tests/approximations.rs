//! The approximations against the exact engine: rigorous bounds must never be violated, and the saddlepoint
//! must meet its accuracy target in the upper tail.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use tailtally::engine::{self, BoundKind, MethodId, Prepared, Side};
use tailtally::portfolio::Model;

fn random_model(rng: &mut ChaCha8Rng) -> Model {
    // Sizes log-uniform in 1..5000, probability ranges from tiny to near 1.
    let n = (10f64.powf(rng.gen_range(0.0..3.7)) as usize).max(1);
    let (lo, hi) = match rng.gen_range(0..5) {
        0 => (0.0, 1.0),
        1 => (0.0, 0.05),
        2 => (0.0, 0.001),
        3 => (0.3, 0.7),
        _ => (0.9, 1.0),
    };
    let ps: Vec<f64> = (0..n).map(|_| rng.gen_range(lo..hi)).collect();
    let mut groups = Vec::new();
    if rng.gen_bool(0.3) {
        groups.push((rng.gen_range(2..2000u64), rng.gen_range(0.0001..0.3)));
    }
    let lam = if rng.gen_bool(0.3) { rng.gen_range(0.0..20.0) } else { 0.0 };
    Model::from_parts(&ps, &groups, lam)
}

/// The thresholds both coverage tests ask of a random portfolio: the mean and -3, -1, 1, 3 and 6 standard
/// deviations from it, and both ends of the support, all on one side (the case number picks it in turn).
fn spread_queries(model: &Model, prep: &Prepared, case: usize) -> (Side, Vec<(u64, Side)>) {
    let (mean, sd) = (prep.moments.mean, prep.moments.sd());
    let mut ks: Vec<u64> =
        [-3.0, -1.0, 0.0, 1.0, 3.0, 6.0].iter().map(|z| (mean + z * sd).round().max(0.0) as u64).collect();
    ks.push(model.support_min());
    if let Some(m) = model.support_max() {
        ks.push(m);
    }
    ks.sort();
    ks.dedup();
    let side = [Side::Upper, Side::Lower, Side::Point][case % 3];
    (side, ks.iter().map(|&k| (k, side)).collect())
}

/// Bound coverage over 10,000 random portfolios: every rigorous bound of every method, at thresholds across the
/// support and every side, compared with the exact value (whose own error is added to the allowance).
#[test]
fn rigorous_bounds_are_never_violated() {
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    let (mut checked, mut violations) = (0usize, Vec::new());
    for case in 0..10_000 {
        let model = random_model(&mut rng);
        let prep = Prepared::new(&model);
        let (side, qs) = spread_queries(&model, &prep, case);
        let exact = engine::run(MethodId::Exact, &prep, &qs, None);
        for id in [MethodId::Normal, MethodId::Poisson] {
            for (e, x) in engine::run(id, &prep, &qs, None).iter().zip(&exact) {
                assert_eq!(e.bound_kind, BoundKind::Rigorous);
                checked += 1;
                let err = (e.probability - x.probability).abs();
                if err > e.error_bound + x.error_bound + 1e-15 {
                    violations.push(format!("case {case} {id:?} {side:?}: err {err:e} > bound {:e}", e.error_bound));
                }
            }
        }
    }
    assert!(checked > 100_000, "{checked}");
    assert!(
        violations.is_empty(),
        "{} violations of {checked}, e.g. {:?}",
        violations.len(),
        &violations[..violations.len().min(5)]
    );
}

/// Coverage of the estimated bounds (Edgeworth, saddlepoint) over the same 10,000 random portfolios: an
/// estimated bound must still cover the actual error in at least 99% of the cases (errors below 1e-15 of an
/// absolute, the exact value's own bound included, count as covered). The rate and the worst ratio are
/// printed for docs/accuracy.md.
#[test]
fn estimated_bounds_cover_the_error_in_at_least_99_percent_of_cases() {
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    let mut stats = std::collections::BTreeMap::<&str, (usize, usize, f64)>::new();
    for case in 0..10_000 {
        let model = random_model(&mut rng);
        let prep = Prepared::new(&model);
        let (side, qs) = spread_queries(&model, &prep, case);
        let (mean, sd) = (prep.moments.mean, prep.moments.sd());
        let exact = engine::run(MethodId::Exact, &prep, &qs, None);
        for (id, name) in [(MethodId::Edgeworth, "edgeworth"), (MethodId::Saddlepoint, "saddlepoint")] {
            for ((e, x), q) in engine::run(id, &prep, &qs, None).iter().zip(&exact).zip(&qs) {
                assert_eq!(e.bound_kind, BoundKind::Estimated);
                let err = (e.probability - x.probability).abs();
                let entry = stats.entry(name).or_insert((0, 0, f64::INFINITY));
                entry.0 += 1;
                if err <= e.error_bound + x.error_bound + 1e-15 {
                    entry.1 += 1;
                } else if std::env::var("COVERAGE_DEBUG").is_ok() {
                    let z = (q.0 as f64 - mean) / sd.max(1e-9);
                    eprintln!(
                        "MISS {name} n={} sd={sd:.2} side={side:?} z={:.2} exact={:e} est={:e} bound={:e}",
                        model.exposures, z, x.probability, e.probability, e.error_bound
                    );
                }
                if err > 1e-15 {
                    entry.2 = entry.2.min(e.error_bound / err);
                }
            }
        }
    }
    for (name, (n, covered, worst)) in &stats {
        eprintln!(
            "{name}: {covered} of {n} covered ({:.3}%), worst bound/error {worst:.3e}",
            100.0 * *covered as f64 / *n as f64
        );
    }
    for (name, (n, covered, _)) in &stats {
        let rate = *covered as f64 / *n as f64;
        assert!(rate >= 0.99, "{name}: the estimated bound covers only {:.2}% of {n} cases", 100.0 * rate);
    }
}

/// Target: relative error under 0.5% in the upper tail beyond mean + 3 sd for portfolios of 50 or more exposures.
#[test]
fn saddlepoint_is_within_half_a_percent_in_the_upper_tail() {
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    let mut worst: f64 = 0.0;
    let (mut near_max, mut est_misses) = (0, 0);
    for _ in 0..300 {
        let n = rng.gen_range(50..3000);
        let scale = [1.0, 0.2, 0.01][rng.gen_range(0..3)];
        let ps: Vec<f64> = (0..n).map(|_| rng.gen_range(0.0..scale)).collect();
        let model = Model::from_parts(&ps, &[], 0.0);
        let prep = Prepared::new(&model);
        let (mean, sd) = (prep.moments.mean, prep.moments.sd());
        let qs: Vec<(u64, Side)> = [3.0, 5.0, 10.0, 20.0, 40.0]
            .iter()
            .map(|z| ((mean + z * sd).ceil() as u64, Side::Upper))
            .filter(|&(k, _)| k < n as u64)
            .collect();
        let ex = engine::run(MethodId::Exact, &prep, &qs, None);
        let sp = engine::run(MethodId::Saddlepoint, &prep, &qs, None);
        for ((x, s), q) in ex.iter().zip(&sp).zip(&qs) {
            let rel = (s.ln_probability - x.ln_probability).exp_m1().abs();
            let est = s.relative_error_bound.unwrap();
            if q.0 + 20 > n as u64 {
                // Within 20 counts of the support maximum the lattice corrections degrade (about 1% at 6 counts);
                // there the estimated bound must cover the error instead.
                near_max += 1;
                if rel > est {
                    est_misses += 1;
                    eprintln!("near max n={n} k={} rel {rel:e} est {est:e}", q.0);
                }
                continue;
            }
            assert!(
                rel < 5e-3,
                "n={n} scale={scale} k={}: saddlepoint {:e} vs exact {:e} (rel {rel:e})",
                q.0,
                s.probability,
                x.probability
            );
            worst = worst.max(rel);
            // The Chernoff bound is rigorous.
            assert!(s.chernoff_ln_bound.unwrap() >= x.ln_probability - 1e-9);
        }
    }
    eprintln!("worst saddlepoint relative error beyond mean + 3 sd: {worst:e}; near the maximum: {near_max}, estimate missed {est_misses}");
    assert_eq!(est_misses, 0, "the estimated bound must cover the error near the support maximum");
}

/// `auto` meets the tolerance it was given, checked against exact.
#[test]
fn auto_meets_its_tolerance() {
    use tailtally::engine::Tolerance;
    let mut rng = ChaCha8Rng::seed_from_u64(5);
    for _ in 0..300 {
        let model = random_model(&mut rng);
        let prep = Prepared::new(&model);
        let (mean, sd) = (prep.moments.mean, prep.moments.sd());
        let qs: Vec<(u64, Side)> =
            [0.0, 2.0, 8.0].iter().map(|z| ((mean + z * sd).round() as u64, Side::Upper)).collect();
        let ex = engine::run(MethodId::Exact, &prep, &qs, None);
        for tol in [Tolerance::Absolute(0.01), Tolerance::Relative(1e-6)] {
            for (a, x) in engine::run(MethodId::Auto, &prep, &qs, Some(tol)).iter().zip(&ex) {
                let err = (a.probability - x.probability).abs();
                let ok = match tol {
                    Tolerance::Absolute(t) => err <= t + x.error_bound,
                    Tolerance::Relative(r) => err <= r * x.probability + x.error_bound,
                };
                assert!(ok, "{tol:?}: {:?} err {err:e}", a.method);
                assert!(!a.selection.as_ref().unwrap().checked.is_empty());
            }
        }
    }
}

/// Beyond the support every method answers from the support itself: exactly 0 or 1, with no error. (The Poisson
/// approximation once computed a Poisson tail at k = 2^64 - 1 here and tried to allocate its window.)
#[test]
fn thresholds_beyond_a_bounded_support_are_exact_for_every_method() {
    let model = Model::from_parts(&[0.1, 0.2, 0.3], &[], 0.0);
    let prep = Prepared::new(&model);
    let qs = [(u64::MAX, Side::Upper), (u64::MAX, Side::Point), (u64::MAX, Side::Lower), (4, Side::Upper)];
    for id in [MethodId::Poisson, MethodId::Saddlepoint, MethodId::Auto] {
        let got: Vec<(f64, f64)> =
            engine::run(id, &prep, &qs, None).iter().map(|e| (e.probability, e.error_bound)).collect();
        assert_eq!(got, vec![(0.0, 0.0), (0.0, 0.0), (1.0, 0.0), (0.0, 0.0)], "{id:?}");
    }
}
