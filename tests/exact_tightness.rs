//! How tight the exact method's rigorous relative bound is: bound / observed error at z = 5 sd upper tails,
//! n = 10^3, 10^4, 10^5, on the "mod1000" portfolios (p_i in (0, 0.2]). n = 10^6 is in
//! `examples/time_exact.rs tightness` (too slow for the suite in debug builds). docs/accuracy.md has the table.

use serde_json::Value;
use tailtally::engine::{exact, numerics::moments::Moments, Side};
use tailtally::portfolio::Model;

fn mod1000(n: u64) -> Model {
    let ps: Vec<f64> = (0..n).map(|i| ((7919 * i) % 1000 + 1) as f64 / 5000.0).collect();
    Model::from_parts(&ps, &[], 0.0)
}

fn load(file: &str) -> Value {
    let path = format!("{}/fixtures/reference/{file}", env!("CARGO_MANIFEST_DIR"));
    serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
}

/// (n, k, P(S >= k) as the double nearest the 25-digit reference).
/// Sources: fixtures/reference/tightness.json (make_tightness.py) for n = 10^3 and fixtures/reference/large_n.json
/// (make_large_n.py) for 10^4 and 10^5, both python-flint ball arithmetic at 256 bits, good to 1e-30 relative.
fn references() -> Vec<(u64, u64, f64)> {
    let mut out = Vec::new();
    for c in load("tightness.json")["cases"].as_array().unwrap() {
        let n = c["n"].as_u64().unwrap();
        if n <= 100_000 {
            out.push((n, c["k"].as_u64().unwrap(), c["upper"].as_str().unwrap().parse().unwrap()));
        }
    }
    for c in load("large_n.json")["cases"].as_array().unwrap() {
        let name = c["name"].as_str().unwrap();
        if name == "mod1000-10k" || name == "mod1000-100k" {
            let pt = c["points"].as_array().unwrap().iter().find(|p| p["z"].as_i64() == Some(5)).unwrap();
            let n = c["n"].as_u64().unwrap();
            out.push((n, pt["k"].as_u64().unwrap(), pt["upper"].as_str().unwrap().parse().unwrap()));
        }
    }
    out.sort_by_key(|r| r.0);
    out
}

/// The claimed ceiling of bound / observed error by size (docs/accuracy.md: 217, 61 and 174 measured with the
/// characteristic function (src/engine/exact/characteristic.rs) and the compensated tail sum; 404, 632 and
/// 9,153 with the product tree before). At 10^3 the value agrees with the reference to the last bit and at 10^5
/// to 1.4 U, so the ratio there is against the floor below, not against an error seen.
/// The observed error is floored at U = 2^-53: the reference is compared after rounding to a double, so smaller
/// errors are not resolved.
fn claimed_ratio(n: u64) -> f64 {
    match n {
        0..=1_000 => 300.0,
        1_001..=10_000 => 120.0,
        _ => 250.0,
    }
}

/// The claimed ceiling of the relative bound itself (docs/accuracy.md: 2.41e-14, 2.16e-14 and 2.71e-14 measured;
/// 8.69e-13, 1.10e-11 and 7.55e-11 with the tree), since the ratio also moves with the luck of the observed error.
fn claimed_bound(n: u64) -> f64 {
    match n {
        0..=1_000 => 3.0e-14,
        1_001..=10_000 => 3.0e-14,
        _ => 3.5e-14,
    }
}

#[test]
fn exact_bound_is_rigorous_and_within_its_claimed_factor() {
    let refs = references();
    assert_eq!(refs.iter().map(|r| r.0).collect::<Vec<_>>(), vec![1_000, 10_000, 100_000]);
    for (n, k, p_ref) in refs {
        let model = mod1000(n);
        let v = exact::evaluate(&model, &Moments::of(&model), &[(k, Side::Upper)]).0[0];
        let observed = (v.value - p_ref).abs() / p_ref;
        // The rounding of the reference to a double (U relative) is the resolution of this comparison.
        assert!(observed <= v.rel_err + f64::EPSILON, "n={n}: observed {observed:e} > bound {:e}", v.rel_err);
        let ratio = v.rel_err / observed.max(f64::EPSILON / 2.0);
        eprintln!("n={n} k={k} observed {observed:.2e} bound {:.2e} ratio {ratio:.3e}", v.rel_err);
        assert!(ratio <= claimed_ratio(n), "n={n}: bound / observed = {ratio:e} above the claimed factor");
        assert!(v.rel_err <= claimed_bound(n), "n={n}: bound {:e} above the claimed {:e}", v.rel_err, claimed_bound(n));
    }
}
