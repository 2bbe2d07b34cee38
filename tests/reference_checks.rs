//! The exact engine against references from outside the project. Each check names its source.

#[path = "common/bignum.rs"]
mod bignum;

use serde_json::Value;
use tailtally::engine::{exact, numerics::moments::Moments, Side};
use tailtally::portfolio::families::expand;
use tailtally::portfolio::{FamilySpec, Model};

fn eval(model: &Model, queries: &[(u64, Side)]) -> Vec<tailtally::engine::Value> {
    exact::evaluate(model, &Moments::of(model), queries).0
}

/// Portfolios of fixtures/reference/large_n.json, rebuilt from the formula recorded there.
fn reference_model(name: &str, n: usize) -> Model {
    let ps: Vec<f64> = (0..n as u64)
        .map(|i| {
            if name.starts_with("wide") {
                ((104729 * i) % 9973 + 1) as f64 / 10000.0
            } else {
                ((7919 * i) % 1000 + 1) as f64 / 5000.0
            }
        })
        .collect();
    Model::from_parts(&ps, &[], 0.0)
}

/// Source: fixtures/reference/large_n.json, made by fixtures/reference/make_large_n.py with FLINT ball
/// arithmetic (python-flint) at 256+ bits on a tilted window, cross-checked against an untilted exact product;
/// every value there is good to 1e-30 relative. n = 2,000 to 100,000, tails down to 1e-319 and far below.
#[test]
fn large_portfolios_match_high_precision_references() {
    let text =
        std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/fixtures/reference/large_n.json")).unwrap();
    let doc: Value = serde_json::from_str(&text).unwrap();
    let mut worst: f64 = 0.0;
    let mut count = 0;
    for case in doc["cases"].as_array().unwrap() {
        let name = case["name"].as_str().unwrap();
        let n = case["n"].as_u64().unwrap() as usize;
        let model = reference_model(name, n);
        let points = case["points"].as_array().unwrap();
        let mut queries = Vec::new();
        for pt in points {
            let k = pt["k"].as_u64().unwrap();
            queries.extend([(k, Side::Upper), (k, Side::Lower), (k, Side::Point)]);
        }
        let vals = eval(&model, &queries);
        for (i, pt) in points.iter().enumerate() {
            for (j, key) in ["upper", "lower", "point"].iter().enumerate() {
                let v = vals[3 * i + j];
                let ln_ref = pt[format!("ln_{key}")].as_f64().unwrap();
                let p_ref: f64 = pt[*key].as_str().unwrap().parse().unwrap();
                count += 1;
                if p_ref > 0.5 {
                    // Near 1 the logarithm is below f64's resolution: compare probabilities absolutely.
                    let err = (v.value - p_ref).abs();
                    assert!(
                        err <= v.abs_err + 1e-16,
                        "{name} k={} {key}: {} vs {p_ref}, bound {}",
                        pt["k"],
                        v.value,
                        v.abs_err
                    );
                    continue;
                }
                let rel = (v.ln_value - ln_ref).abs();
                worst = worst.max(rel);
                // Accuracy: 1e-12 relative at n <= 10^5 (the rigorous bound is looser and must hold too).
                assert!(
                    rel <= 1e-12 + 2.0 * f64::EPSILON * ln_ref.abs(),
                    "{name} k={} {key}: ln {} vs {ln_ref}",
                    pt["k"],
                    v.ln_value
                );
                assert!(
                    rel <= v.rel_err * 1.0001 + 2.0 * f64::EPSILON * ln_ref.abs(),
                    "{name} k={} {key}: observed {rel:e} > bound {:e}",
                    pt["k"],
                    v.rel_err
                );
            }
        }
    }
    assert!(count >= 100);
    eprintln!("{count} reference values, worst relative error {worst:e}");
}

/// Unsigned Stirling numbers of the first kind by their recurrence |s(n+1,k)| = n |s(n,k)| + |s(n,k-1)|, in
/// exact integers.
fn stirling_row(n: usize) -> Vec<num_bigint::BigUint> {
    use num_bigint::BigUint;
    let mut row = vec![BigUint::from(1u32)];
    for m in 0..n {
        let mut next = vec![BigUint::from(0u32); row.len() + 1];
        for (k, c) in row.iter().enumerate() {
            next[k] += c * BigUint::from(m as u64);
            next[k + 1] += c;
        }
        row = next;
    }
    row
}

/// The number of cycles of a uniform random permutation of n items has P(K = k) = |s(n, k)| / n!
/// (Abramowitz and Stegun, section 24.1.3 and table 24.3). Row n = 10 is recalled from memory of that table and
/// confirmed by its row sum 10! = 3628800 and by the recurrence; larger n come from the recurrence.
#[test]
fn harmonic_family_matches_stirling_numbers() {
    let recalled_row_10: [u64; 11] = [0, 362880, 1026576, 1172700, 723680, 269325, 63273, 9450, 870, 45, 1];
    assert_eq!(recalled_row_10.iter().sum::<u64>(), 3628800);
    let row = stirling_row(10);
    for (k, &c) in recalled_row_10.iter().enumerate() {
        assert_eq!(row[k], num_bigint::BigUint::from(c));
    }
    for n in [10usize, 60, 170] {
        let mut model = Model::default();
        expand(&FamilySpec::Harmonic { n: n as u64, loading: None, units: None }, |p| model.push_bernoulli(p));
        let row = stirling_row(n);
        let fact: num_bigint::BigUint = row.iter().sum();
        let queries: Vec<(u64, Side)> = (0..=n as u64).map(|k| (k, Side::Point)).collect();
        let vals = eval(&model, &queries);
        for (k, v) in vals.iter().enumerate() {
            let num = &row[k];
            if *num == num_bigint::BigUint::from(0u32) {
                assert_eq!(v.value, 0.0);
                continue;
            }
            let ln_ref = bignum::ln_ratio(num, &fact);
            assert!(
                (v.ln_value - ln_ref).abs() <= 1e-13 + 4.0 * f64::EPSILON * ln_ref.abs(),
                "n={n} k={k}: {} vs {ln_ref}",
                v.ln_value
            );
        }
        // Mean H_n and variance H_n - sum 1/k^2 (same section of Abramowitz and Stegun).
        let h: f64 = (1..=n).map(|k| 1.0 / k as f64).sum();
        let h2: f64 = (1..=n).map(|k| 1.0 / (k * k) as f64).sum();
        let m = Moments::of(&model);
        assert!((m.mean - h).abs() < 1e-12 && (m.variance - (h - h2)).abs() < 1e-12);
    }
}

/// Binomial(n, p) and Poisson(lambda) as special cases, against statrs (a general-purpose library).
#[test]
fn binomial_and_poisson_special_cases_match_statrs() {
    use statrs::distribution::{Binomial, Discrete, DiscreteCDF, Poisson};
    let model = Model::from_parts(&[], &[(1000, 0.03)], 0.0);
    let d = Binomial::new(0.03, 1000).unwrap();
    let qs: Vec<(u64, Side)> = (0..=80).flat_map(|k| [(k, Side::Point), (k, Side::Lower)]).collect();
    for (&(k, side), v) in qs.iter().zip(eval(&model, &qs)) {
        let r = if side == Side::Point { d.pmf(k) } else { d.cdf(k) };
        // statrs' binomial cdf comes from the regularised incomplete beta function and is good to about 1e-11
        // here, and its pmf from log-gamma is no better (measured: at k = 21 it gives 0.05185449868013816, the exact rational sum is
        // 0.05185449868021742 and this engine 0.05185449868021737), hence the tolerance; the
        // exact rational check below is the sharp one.
        let tol = 1e-10;
        assert!((v.value - r).abs() <= tol * r.max(1e-300) + 1e-15, "binomial k={k} {side:?}: {} vs {r}", v.value);
    }
    // The exact rational value above, computed with Python's fractions module (sum of comb(1000, j) p^j q^(1000-j)
    // for j <= 21 with p the double 0.03).
    let v = eval(&model, &[(21, Side::Lower)])[0];
    assert!(
        (v.value - 0.05185449868021742).abs() <= 2e-16 && (v.value - 0.05185449868021742).abs() <= v.abs_err + 1e-17
    );
    // The same binomial as 1000 separate Bernoulli exposures.
    let flat = Model::from_parts(&vec![0.03; 1000], &[], 0.0);
    for (a, b) in eval(&model, &qs).iter().zip(eval(&flat, &qs)) {
        assert!((a.ln_value - b.ln_value).abs() < 1e-12, "{} vs {}", a.ln_value, b.ln_value);
    }
    let model = Model::from_parts(&[], &[], 12.5);
    let d = Poisson::new(12.5).unwrap();
    let qs: Vec<(u64, Side)> = (0..=60).flat_map(|k| [(k, Side::Point), (k, Side::Lower)]).collect();
    for (&(k, side), v) in qs.iter().zip(eval(&model, &qs)) {
        let r = if side == Side::Point { d.pmf(k) } else { d.cdf(k) };
        assert!((v.value - r).abs() <= 1e-10 * r + 1e-15, "poisson k={k} {side:?}: {} vs {r}", v.value);
    }
    // Handbook value, recalled from memory of standard Poisson tables: P(X <= 2) for lambda = 1 is
    // e^-1 (1 + 1 + 1/2) = 0.9196986..., which is also the closed form.
    let v = eval(&Model::from_parts(&[], &[], 1.0), &[(2, Side::Lower)])[0];
    assert!((v.value - 2.5 * (-1f64).exp()).abs() < 1e-15 && (v.value - 0.9196986).abs() < 1e-7);
}

/// P(S >= k) for Poisson(lambda) far in the tail, where statrs' survival function is 1 - cdf and is 0:
/// the closed form sum_{j>=k} e^-lambda lambda^j / j! evaluated term by term in log space (terms decrease
/// geometrically beyond the mode, so the sum converges fast and every term is positive).
#[test]
fn poisson_far_tail_matches_closed_form_series() {
    let lam = 3.0f64;
    for k in [40u64, 120, 400] {
        let mut ln_term = -lam + k as f64 * lam.ln() - (1..=k).map(|j| (j as f64).ln()).sum::<f64>();
        let mut ln_sum = ln_term;
        for j in k + 1..k + 200 {
            ln_term += lam.ln() - (j as f64).ln();
            ln_sum = tailtally::engine::numerics::float::log_add(ln_sum, ln_term);
        }
        let v = eval(&Model::from_parts(&[], &[], lam), &[(k, Side::Upper)])[0];
        // The reference's own rounding grows with k (a sum of k logarithms), hence the tolerance.
        assert!((v.ln_value - ln_sum).abs() < 1e-13 * k as f64, "k={k}: {} vs {ln_sum}", v.ln_value);
    }
}
