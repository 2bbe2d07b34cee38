//! How tight the exact method's rigorous relative bound is on books WITH UNITS: bound / observed error of
//! P(S >= k) against 25-digit references, at z = 5 sd for n = 10^3, 3 10^3 and 10^4 exposures and at z = 2 and
//! z = 10 for n = 10^3. These books (at least 321 exposures on lattices of about 2.5 10^5 to 2.5 10^6 steps)
//! take the characteristic function on the lattice (src/engine/exact/characteristic_lattice.rs); the product
//! tree (`exact::lattice::tilted_tree`) is measured beside it at the same thresholds.
//!
//! The books come from integer formulas only, so that this test and the script that made the references see the
//! same doubles:
//!   p_i = ((7919 i) % 1000 + 1) / 20000 (one correctly rounded division), u_i = 1 + ((7907 i) % 1009)^3 / 1009^2
//! (integer division, units 1..1007, gcd 1), i = 0..n-1.
//! References: fixtures/reference/tightness_units.json, made by fixtures/reference/make_tightness_units.py
//! (an Esscher tilt and a python-flint arb_poly product tree at 256 bits, ball arithmetic, relative ball
//! radius < 1e-30 asserted; checked there against brute-force enumeration in fractions on tiny books and against
//! the untilted, untruncated arb product at n = 10^3).

use serde_json::Value as Json;
use tailtally::engine::exact::{self, characteristic_lattice, lattice};
use tailtally::engine::numerics::{cgf, moments::Moments};
use tailtally::engine::{Side, Value};
use tailtally::portfolio::Model;

/// The book of n exposures of the module note, on its lattice.
fn book(n: u64) -> Model {
    let mut m = Model::default();
    for i in 0..n {
        let p = ((7919 * i) % 1000 + 1) as f64 / 20000.0;
        let u = 1 + ((7907 * i) % 1009).pow(3) / (1009 * 1009);
        m.push_weighted(p, u);
    }
    m.set_lattice();
    m
}

fn load(file: &str) -> Json {
    let path = format!("{}/fixtures/reference/{file}", env!("CARGO_MANIFEST_DIR"));
    serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
}

/// A decimal "d.ddd...e-x" as (mantissa, exponent of ten).
fn decimal(s: &str) -> (i128, i32) {
    let (m, e) = s.split_once('e').unwrap();
    let (int, frac) = m.split_once('.').unwrap_or((m, ""));
    let digits = format!("{int}{frac}");
    (digits.parse().unwrap(), e.parse::<i32>().unwrap() - frac.len() as i32)
}

/// The 25-digit reference as hi + lo: hi the nearest double, lo the rest (from hi's decimal expansion to 30
/// digits, good to 1e-30 relative), so that errors below an ulp are resolved.
fn split(s: &str) -> (f64, f64) {
    let hi: f64 = s.parse().unwrap();
    let (mr, er) = decimal(s);
    let (mh, eh) = decimal(&format!("{hi:.30e}"));
    let e = er.min(eh);
    let diff = mr * 10i128.pow((er - e) as u32) - mh * 10i128.pow((eh - e) as u32);
    (hi, diff as f64 * 10f64.powi(e))
}

/// The relative error of v against the reference at full precision: v - hi is exact (Sterbenz), then lo.
fn rel_error(v: f64, reference: &str) -> f64 {
    let (hi, lo) = split(reference);
    ((v - hi) - lo).abs() / hi
}

/// The observed error's floor in the ratio: 2^-54, half an ulp's relative size (a double's own rounding, which
/// no method returning a double can beat).
const FLOOR: f64 = f64::EPSILON / 4.0;

const HEADER: &str =
    "     n   z       k                  reference |         characteristic     bound  observed     ratio \
                      |                   tree     bound  observed     ratio";

/// The loose ceiling asserted on bound / observed (the measured ratios are printed).
const MAX_RATIO: f64 = 1e5;

/// One case: (n, z, k, P(S >= k) as its 25-digit reference).
/// Source: fixtures/reference/tightness_units.json (make_tightness_units.py, python-flint arb at 256 bits).
fn references() -> Vec<(u64, i64, u64, String)> {
    let doc = load("tightness_units.json");
    doc["cases"]
        .as_array()
        .unwrap()
        .iter()
        .map(|c| {
            (
                c["n"].as_u64().unwrap(),
                c["z"].as_i64().unwrap(),
                c["k"].as_u64().unwrap(),
                c["upper"].as_str().unwrap().to_string(),
            )
        })
        .collect()
}

/// Check one answer against the reference (the script make_tightness_units.py, python-flint arb at 256 bits):
/// the rigorous bound covers the observed error; returns (observed, bound / observed floored at 2^-54).
fn measure(what: &str, n: u64, k: u64, v: &Value, reference: &str) -> (f64, f64) {
    let observed = rel_error(v.value, reference);
    assert!(
        observed <= v.rel_err,
        "{what} n={n} k={k}: observed {observed:e} above the rigorous bound {:e} (reference \
         tightness_units.json, make_tightness_units.py, python-flint arb 256 bits)",
        v.rel_err
    );
    (observed, v.rel_err / observed.max(FLOOR))
}

#[test]
fn exact_bound_on_books_in_units_is_rigorous_and_tight() {
    let refs = references();
    let sizes: Vec<(u64, i64)> = refs.iter().map(|r| (r.0, r.1)).collect();
    assert_eq!(sizes, vec![(1_000, 2), (1_000, 5), (1_000, 10), (3_000, 5), (10_000, 5)]);
    // Columns: n, z, k, reference | characteristic function: value, bound, observed, ratio | tree: the same.
    eprintln!("{HEADER}");
    for (n, z, k, p_ref) in refs {
        let start = std::time::Instant::now();
        let model = book(n);
        assert_eq!(model.span(), 1, "n={n}: the units' gcd is 1 (asserted by make_tightness_units.py too)");
        assert!(model.weighted());
        let moments = Moments::of(&model);
        let (j, side) = lattice::query(&model, k, Side::Upper).expect("a threshold on the lattice");
        assert_eq!((j, side), (k, Side::Upper));
        let (hi, lo) = split(&p_ref);
        // hi is the reference (make_tightness_units.py, arb at 256 bits) rounded to a double; lo within half an ulp.
        assert!(lo != 0.0 && lo.abs() <= hi * f64::EPSILON / 2.0, "n={n} k={k}: split {hi:e} + {lo:e}");

        // The service's exact method (`exact::evaluate`): the law `lattice::tilted` builds, by the characteristic
        // function where its cost model takes it (n = 10^4 here) and by the product tree otherwise.
        let v = exact::evaluate(&model, &moments, &[(j, side)]).0[0];
        let t = cgf::solve(&model, &moments, j as f64, 0.05 * moments.sd().min(10.0)).t.max(0.0);
        let taken = lattice::tilted(&model, t);
        let served = exact::upper_tail_of(&taken, j);
        assert_eq!(served.value, v.value, "n={n} k={k}: evaluate took another construction");
        assert_eq!(served.rel_err, v.rel_err);
        if n >= 10_000 {
            assert!(taken.spectrum.is_some(), "n={n}: the characteristic function is the cheaper construction here");
        }
        measure("service", n, k, &v, &p_ref);
        // The characteristic function itself, at the same tilt, whichever the service took.
        let law = characteristic_lattice::build(&model, t).expect("the construction applies to these books");
        let cf = exact::upper_tail_of(&law, j);
        // Against make_tightness_units.py (python-flint arb_poly, 256 bits): bound >= observed, ratio loosely.
        let (observed, ratio) = measure("characteristic", n, k, &cf, &p_ref);
        assert!(ratio <= MAX_RATIO, "n={n} k={k}: bound / observed = {ratio:e} (reference make_tightness_units.py)");

        // The product tree at the same tilt, against the same reference (make_tightness_units.py, arb 256 bits).
        let tree = exact::upper_tail_of(&lattice::tilted_tree(&model, t), j);
        let (t_observed, t_ratio) = measure("tree", n, k, &tree, &p_ref);

        eprintln!(
            "{n:>6} {z:>3} {k:>7} {p_ref:>26} | {:>22.16e} {:>9.2e} {observed:>9.2e} {ratio:>9.2e} | {:>22.16e} {:>9.2e} \
             {t_observed:>9.2e} {t_ratio:>9.2e}   ({:.1} s)",
            cf.value,
            cf.rel_err,
            tree.value,
            tree.rel_err,
            start.elapsed().as_secs_f64()
        );
    }
}
