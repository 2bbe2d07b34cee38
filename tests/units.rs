//! Losses in units (the individual risk model) against exact references in rational arithmetic
//! (num-rational's BigRational; f64 inputs are dyadic rationals and convert without loss):
//! - De Pril's recursion for the individual life model (N. De Pril, "On the exact computation of the aggregate
//!   claims distribution in the individual life model", ASTIN Bulletin 16, 1986, Theorem 1), on random books
//!   with groups, a common factor in the units (span > 1) and certain exposures (an offset);
//! - brute-force enumeration of every outcome for tiny books.
//!
//! Every threshold from below the support to beyond it, every side, through the service's own path: the spec
//! validated into a lattice model, each question mapped onto the lattice, the exact engine.

use num_rational::BigRational;
use num_traits::{One, Signed, ToPrimitive, Zero};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use tailtally::engine::exact::{self, lattice};
use tailtally::engine::{numerics::moments::Moments, Side, Value};
use tailtally::portfolio::spec::{GroupSpec, PortfolioSpec};
use tailtally::portfolio::validate::{build_model, Limits};

#[path = "common/de_pril.rs"]
mod de_pril;
use de_pril::{de_pril, rat, Class};

/// Every outcome of a tiny book of (units, p), enumerated.
fn brute_force(book: &[(u64, f64)]) -> Vec<BigRational> {
    let top: u64 = book.iter().map(|b| b.0).sum();
    let mut f = vec![BigRational::zero(); top as usize + 1];
    for mask in 0u32..(1 << book.len()) {
        let (mut s, mut pr) = (0usize, BigRational::one());
        for (i, &(u, p)) in book.iter().enumerate() {
            if mask >> i & 1 == 1 {
                s += u as usize;
                pr *= rat(p);
            } else {
                pr *= BigRational::one() - rat(p);
            }
        }
        f[s] += pr;
    }
    f
}

/// The service's answer to (k, side) on a spec: validated into its lattice, mapped, evaluated exactly.
fn answers(spec: &PortfolioSpec, queries: &[(u64, Side)]) -> Vec<Value> {
    let model = build_model(spec, "/portfolio", &Limits::default()).expect("valid");
    let moments = Moments::of(&model);
    let mapped: Vec<_> = queries.iter().map(|&(k, s)| lattice::query(&model, k, s)).collect();
    let on: Vec<(u64, Side)> = mapped.iter().filter_map(|q| q.ok()).collect();
    let mut vals = exact::evaluate(&model, &moments, &on).0.into_iter();
    mapped.iter().map(|q| q.map_or_else(Value::certain, |_| vals.next().unwrap())).collect()
}

/// Compare every threshold and side with the pmf; returns the worst relative error.
fn check_all(case: &str, spec: &PortfolioSpec, pmf: &[BigRational]) -> f64 {
    let n = pmf.len() as u64;
    let mut queries = Vec::new();
    for k in 0..=n + 2 {
        queries.extend([(k, Side::Upper), (k, Side::Lower), (k, Side::Point)]);
    }
    let vals = answers(spec, &queries);
    let total: BigRational = pmf.iter().sum();
    assert!(total == BigRational::one(), "{case}: the reference pmf must sum to 1");
    let mut worst: f64 = 0.0;
    for (&(k, side), v) in queries.iter().zip(&vals) {
        let k = k as usize;
        let below: BigRational = pmf.iter().take(k).sum();
        let truth = match side {
            Side::Point => pmf.get(k).cloned().unwrap_or_else(BigRational::zero),
            Side::Lower => &below + pmf.get(k).cloned().unwrap_or_else(BigRational::zero),
            Side::Upper => &total - &below,
        };
        if truth.is_zero() {
            assert!(v.value <= v.abs_err, "{case} k={k} {side:?}: truth 0, got {} (bound {})", v.value, v.abs_err);
            continue;
        }
        let diff = (rat(v.value) - &truth).abs();
        assert!(diff <= rat(v.abs_err), "{case} k={k} {side:?}: |{} - truth| over its bound {}", v.value, v.abs_err);
        let rel = (diff / &truth).to_f64().unwrap();
        let tol = 1e-12;
        if truth > rat(1e-290) {
            assert!(
                rel <= tol,
                "{case} k={k} {side:?}: relative error {rel:e}, value {} bound {} spec {spec:?}",
                v.value,
                v.rel_err
            );
        }
        worst = worst.max(rel);
    }
    worst
}

#[test]
fn random_books_in_units_agree_with_de_pril() {
    let mut rng = ChaCha8Rng::seed_from_u64(20261202);
    let mut worst: f64 = 0.0;
    for case in 0..24 {
        // A common factor in every unit, so the lattice's span is at least that.
        let factor = [1u64, 1, 2, 3, 10][rng.gen_range(0..5)];
        let n = rng.gen_range(1..=12);
        let mut spec = PortfolioSpec::default();
        let mut classes = Vec::new();
        let mut shift = 0;
        for _ in 0..n {
            let u = factor * rng.gen_range(1..=9);
            let p: f64 = match rng.gen_range(0..6) {
                0 => 10f64.powf(-rng.gen_range(1.0..8.0)),
                1 => 1.0 - 10f64.powf(-rng.gen_range(1.0..4.0)),
                2 if case % 3 == 0 => 1.0,
                _ => rng.gen_range(0.01..0.99),
            };
            spec.probabilities.push(p);
            spec.units.push(u);
            if p >= 1.0 {
                shift += u;
            } else {
                classes.push(Class { units: u, p, count: 1 });
            }
        }
        for _ in 0..rng.gen_range(0..=2) {
            let (size, p, u) = (rng.gen_range(2..6), rng.gen_range(0.05..0.6), factor * rng.gen_range(1..=5));
            spec.groups.push(GroupSpec { size, probability: p, loading: None, units: Some(u) });
            classes.push(Class { units: u, p, count: size });
        }
        let pmf = de_pril(&classes, shift);
        worst = worst.max(check_all(&format!("case {case}"), &spec, &pmf));
    }
    eprintln!("De Pril: worst relative error {worst:e}");
}

#[test]
fn tiny_books_in_units_agree_with_enumeration() {
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    for case in 0..30 {
        let n = rng.gen_range(1..=8);
        let book: Vec<(u64, f64)> = (0..n).map(|_| (rng.gen_range(1..=20), rng.gen_range(0.0..1.0))).collect();
        let spec = PortfolioSpec {
            probabilities: book.iter().map(|b| b.1).collect(),
            units: book.iter().map(|b| b.0).collect(),
            ..PortfolioSpec::default()
        };
        check_all(&format!("case {case}"), &spec, &brute_force(&book));
    }
}

/// Units of 1 everywhere give the count's model exactly (the default path), so every answer is unchanged.
#[test]
fn units_of_one_give_the_count_model() {
    let spec = PortfolioSpec {
        probabilities: vec![0.1, 0.5, 1.0, 0.0, 0.3],
        groups: vec![GroupSpec { size: 7, probability: 0.2, loading: None, units: None }],
        ..PortfolioSpec::default()
    };
    let mut ones = spec.clone();
    ones.units = vec![1; 5];
    ones.groups[0].units = Some(1);
    let limits = Limits::default();
    assert_eq!(build_model(&spec, "", &limits).unwrap(), build_model(&ones, "", &limits).unwrap());
}

/// Larger random books (up to 400 exposures, units up to 300, groups, certain exposures) against the naive
/// recursion over the whole lattice in f64, f_j <- f_j (1 - p) + f_(j - u) p, whose terms are all non-negative
/// so each entry is accurate to about 2 n ulps relative (Higham 2002, section 3.1): every rigorous bound must
/// cover the difference, at thresholds from the bulk to the far upper and lower tails.
#[test]
fn rigorous_bounds_hold_on_random_books_in_units() {
    let mut rng = ChaCha8Rng::seed_from_u64(99);
    let mut checked = 0;
    for case in 0..60 {
        let n = rng.gen_range(20..=400);
        let top_unit = [5u64, 50, 300][case % 3];
        let mut spec = PortfolioSpec::default();
        let mut book = Vec::new();
        for _ in 0..n {
            let (p, u) = (rng.gen_range(0.0..0.3f64), rng.gen_range(1..=top_unit));
            let p = if rng.gen_bool(0.02) { 1.0 } else { p };
            spec.probabilities.push(p);
            spec.units.push(u);
            book.push((u, p));
        }
        if rng.gen_bool(0.5) {
            let (size, p, u) = (rng.gen_range(2..200), rng.gen_range(0.01..0.5), rng.gen_range(1..=top_unit));
            spec.groups.push(GroupSpec { size, probability: p, loading: None, units: Some(u) });
            book.extend(std::iter::repeat_n((u, p), size as usize));
        }
        let width: u64 = book.iter().map(|b| b.0).sum();
        let mut f = vec![0.0f64; width as usize + 1];
        f[0] = 1.0;
        let mut filled = 0usize;
        for &(u, p) in &book {
            let u = u as usize;
            filled += u;
            for j in (u..=filled).rev() {
                f[j] = f[j] * (1.0 - p) + f[j - u] * p;
            }
            for x in &mut f[..u] {
                *x *= 1.0 - p;
            }
        }
        let ulps = 4.0 * book.len() as f64 * f64::EPSILON;
        let mean: f64 = book.iter().map(|&(u, p)| u as f64 * p).sum();
        let var: f64 = book.iter().map(|&(u, p)| (u * u) as f64 * p * (1.0 - p)).sum();
        let mut queries = Vec::new();
        for z in [-4.0, -1.0, 0.0, 2.0, 6.0, 10.0] {
            let k = (mean + z * var.sqrt()).max(0.0).round() as u64;
            queries.extend([(k, Side::Upper), (k, Side::Lower), (k, Side::Point)]);
        }
        let vals = answers(&spec, &queries);
        for (&(k, side), v) in queries.iter().zip(&vals) {
            let k = (k as usize).min(f.len());
            let truth: f64 = match side {
                Side::Upper => f[k..].iter().rev().sum(),
                Side::Lower => f[..(k + 1).min(f.len())].iter().sum(),
                Side::Point => f.get(k).copied().unwrap_or(0.0),
            };
            if truth < 1e-280 {
                continue;
            }
            let diff = (v.value - truth).abs();
            assert!(
                diff <= v.abs_err + 2.0 * ulps * truth,
                "case {case} k={k} {side:?}: |{} - {truth}| = {diff:e} over the bound {:e}",
                v.value,
                v.abs_err
            );
            checked += 1;
        }
    }
    assert!(checked > 600, "checked {checked}");
}
