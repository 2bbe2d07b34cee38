//! The one-factor Gaussian model with losses in units (POST /v1/tail with `dependence` and `units`), against
//!
//! * fixtures/reference/factor.json (fixtures/reference/make_factor.py, mpmath at 40 digits, integrals split at
//!   z*): a homogeneous pool of n exposures of u units each plus one certain exposure of c units has
//!   S = c + u Binomial(n, p(Z)), so P(S >= k) = P(Binomial(n, p(Z)) >= ceil((k - c) / u)), the stored value;
//! * a small heterogeneous book: the conditional law in units by the naive lattice recursion (each exposure's
//!   two-point law convolved in, f64) inside a trapezoid rule over z on [-10, 10] with step 0.005, both from
//!   tests/common/factor_reference.rs (for a Gaussian-weighted analytic integrand its own error is far below
//!   1e-13; statrs' normal cdf limits it to about 3e-11 relative, the allowance beside the bound).
//!
//! Every exact value lies within its bound (kind `estimated`, as every figure under the factor), and so does the
//! normal approximation's.

#[path = "common/factor_reference.rs"]
mod factor_reference;

use factor_reference::{add_exposure, conditional_p, mix, phi_inv};
use serde_json::{json, Value};
use tailtally::analytics::cancel::Cancel;
use tailtally::analytics::tail::{Tail, TailRequest, TailResponse};
use tailtally::config::{Options, ServiceLimits};

fn tail(req: Value) -> TailResponse {
    let req: TailRequest = serde_json::from_value(req).unwrap();
    let limits = ServiceLimits::from_options(&Options::default());
    tailtally::analytics::run::<Tail>(&req, &limits, &Cancel::never()).expect("an answer")
}

#[test]
fn homogeneous_pools_in_units_match_the_mpmath_reference() {
    let text = std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/fixtures/reference/factor.json")).unwrap();
    let doc: Value = serde_json::from_str(&text).unwrap();
    let mut checked = 0;
    for (i, row) in doc["homogeneous"].as_array().unwrap().iter().enumerate() {
        let n = row["n"].as_u64().unwrap();
        // Every third pool of up to 1000 exposures, to keep the test short.
        if n > 1000 || i % 3 != 0 {
            continue;
        }
        let (k, upper) = (row["k"].as_u64().unwrap(), row["upper"].as_f64().unwrap());
        let (u, c) = (7u64, 5u64);
        // S >= c + u (k - 1) + 1 iff Binomial >= k: the threshold falls between lattice points.
        let threshold = c + u * (k - 1) + 1;
        let r = tail(json!({
            "portfolio": {"probabilities": [1.0], "units": [c],
                          "groups": [{"size": n, "probability": row["p"], "units": u}]},
            "thresholds": [threshold, c + u * k],
            "methods": ["exact"],
            "dependence": {"model": "one_factor_gaussian", "rho": row["rho"]},
        }));
        for res in &r.results {
            let e = &res.estimates[0];
            let what = format!("{row} at {}", res.threshold);
            assert_eq!(e.bound_kind, tailtally::engine::BoundKind::Estimated, "{what}");
            let miss = (e.probability - upper).abs();
            assert!(
                miss <= e.error_bound + 1e-12 * upper,
                "{what}: {} vs {upper} (bound {})",
                e.probability,
                e.error_bound
            );
            // The default tolerance: relative 1e-7 with an absolute floor of 1e-13.
            assert!(miss <= 1e-6 * upper + 1e-12, "{what}: {} vs {upper}", e.probability);
        }
        checked += 1;
    }
    assert!(checked >= 30, "{checked} pools");
}

#[test]
fn a_heterogeneous_book_in_units_matches_a_fine_quadrature_of_the_lattice_recursion() {
    // Six vans in units of 100 (tests/units.rs) and a group of three, rho 0.2.
    let p = [0.05, 0.12, 0.3, 0.07, 0.2, 0.01, 0.04, 0.04, 0.04];
    let u = [12u64, 30, 4, 18, 8, 250, 6, 6, 6];
    let rho: f64 = 0.2;
    let ks = [1u64, 13, 40, 62, 100, 250, 300];
    let c: Vec<f64> = p.iter().map(|&pi| phi_inv(pi)).collect();
    let want = mix(ks.len(), |z| {
        let f =
            c.iter().zip(&u).fold(vec![1.0], |f, (&ci, &ui)| add_exposure(&f, conditional_p(ci, rho, z), ui as usize));
        ks.iter().map(|&k| f.iter().skip(k as usize).sum::<f64>()).collect()
    });
    let r = tail(json!({
        "portfolio": {"probabilities": &p[..6], "units": &u[..6], "groups": [{"size": 3, "probability": 0.04, "units": 6}]},
        "thresholds": ks,
        "methods": ["exact", "normal"],
        "dependence": {"model": "one_factor_gaussian", "rho": rho},
    }));
    for (res, &truth) in r.results.iter().zip(&want) {
        let e = &res.estimates[0];
        let what = format!("k={}", res.threshold);
        // The reference is good to about 3e-11 relative (statrs' normal cdf: at k = 100, 250 its value of
        // E p_6(Z) = 0.01 is off by 2.7e-11 relative), so that is its allowance beside the bound.
        let allowance = e.error_bound + 5e-11 * truth;
        assert!((e.probability - truth).abs() <= allowance, "{what}: {} vs {truth}", e.probability);
        assert!((e.probability - truth).abs() <= 1e-7 * truth, "{what}: {} vs {truth}", e.probability);
        let n = &res.estimates[1];
        assert!((n.probability - truth).abs() <= n.error_bound, "{what}: normal {} vs {truth}: {n:?}", n.probability);
    }
    // The summary is in units: the mean sum u_i p_i.
    let mean: f64 = p.iter().zip(&u).map(|(p, &u)| p * u as f64).sum();
    assert!((r.summary.mean - mean).abs() <= 1e-9 * mean, "{:?}", r.summary);
}
