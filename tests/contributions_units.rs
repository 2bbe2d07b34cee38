//! Contributions in units (the individual risk model): each exposure's sensitivity dP(S >= k)/dp_i =
//! P(S_{-i} >= k - u_i) - P(S_{-i} >= k) and its tail without it, checked against
//!
//! * the law of S_{-i} in exact rationals (num-rational): by enumeration of the 2^n outcomes for a small book,
//!   and by the plain product of the generating polynomials prod (1 - p_j + p_j x^{u_j}) for a larger one with
//!   repeated classes (the recursion De Pril 1986 evaluates; written here directly, independent of the engine);
//! * finite differences of the service's own tail in units (P(S >= k) is linear in p_i, so the central
//!   difference is exact up to the tails' bounds over 2h).
//!
//! Every value lies within its stated bound of the exact one.

mod common;
use num_rational::BigRational;
use num_traits::{One, ToPrimitive, Zero};
use serde_json::{json, Value};
use tailtally::analytics::cancel::Cancel;
use tailtally::analytics::contributions::{Contributions, ContributionsRequest, ContributionsResponse};
use tailtally::analytics::tail::{Tail, TailRequest};
use tailtally::config::{Options, ServiceLimits};

fn limits() -> ServiceLimits {
    ServiceLimits::from_options(&Options::default())
}

fn contributions(req: Value) -> ContributionsResponse {
    let req: ContributionsRequest = serde_json::from_value(req).unwrap();
    tailtally::analytics::run::<Contributions>(&req, &limits(), &Cancel::never()).expect("an answer")
}

/// (value, bound) of P(S >= k) from the tail question (exact method).
fn tail(portfolio: &Value, k: u64) -> (f64, f64) {
    let req: TailRequest = serde_json::from_value(json!({"portfolio": portfolio, "thresholds": [k]})).unwrap();
    let r = tailtally::analytics::run::<Tail>(&req, &limits(), &Cancel::never()).unwrap();
    let e = &r.results[0].estimates[0];
    (e.probability, e.error_bound)
}

fn rat(x: f64) -> BigRational {
    BigRational::from_float(x).unwrap()
}

/// pmf of sum u_j B_j in exact rationals by the product of generating polynomials, without exposure `skip`.
fn pmf(p: &[f64], u: &[u64], skip: Option<usize>) -> Vec<BigRational> {
    let mut f = vec![BigRational::one()];
    for (j, (&pj, &uj)) in p.iter().zip(u).enumerate() {
        if Some(j) == skip {
            continue;
        }
        let (q, r) = (rat(pj), BigRational::one() - rat(pj));
        let mut g = vec![BigRational::zero(); f.len() + uj as usize];
        for (x, v) in f.iter().enumerate() {
            if v.is_zero() {
                continue;
            }
            g[x] += v * &r;
            g[x + uj as usize] += v * &q;
        }
        f = g;
    }
    f
}

fn upper(f: &[BigRational], k: i64) -> BigRational {
    f.iter().skip(k.max(0) as usize).fold(BigRational::zero(), |a, v| a + v)
}

/// Check every exposure's figures against the exact law of S without it.
fn check(case: &str, p: &[f64], u: &[u64], ks: &[u64]) {
    let portfolio = json!({"probabilities": p, "units": u});
    for &k in ks {
        let r = contributions(json!({"portfolio": portfolio, "threshold": k}));
        assert_eq!(r.contributions.len(), p.len(), "{case}");
        let full = pmf(p, u, None);
        let t = upper(&full, k as i64).to_f64().unwrap();
        assert!((r.tail_probability.value - t).abs() <= r.tail_probability.error_bound.max(1e-300), "{case} k={k}");
        for c in &r.contributions {
            let i = c.index;
            let f = pmf(p, u, Some(i));
            let without = upper(&f, k as i64);
            let sens = (upper(&f, k as i64 - u[i] as i64) - &without).to_f64().unwrap();
            let without = without.to_f64().unwrap();
            let what = format!("{case} k={k} i={i}");
            let (s, w) = (&c.detail.sensitivity, &c.detail.tail_without);
            assert!((s.value - sens).abs() <= s.error_bound.max(1e-300), "{what}: {} vs {sens} ({s:?})", s.value);
            assert!((w.value - without).abs() <= w.error_bound.max(1e-300), "{what}: {} vs {without}", w.value);
            assert!((s.value - sens).abs() <= 1e-12 * sens.max(1e-300) + 1e-15, "{what}: {} vs {sens}", s.value);
            assert!((c.impact - p[i] * c.sensitivity).abs() <= 1e-15, "{what}");
        }
    }
}

#[test]
fn a_small_book_in_units_matches_enumeration() {
    // Six delivery vans in units of 100 (tests/units.rs), one impossible exposure and one certain one.
    let p = [0.05, 0.12, 0.3, 0.07, 0.2, 0.01, 0.0, 1.0];
    let u = [12, 30, 4, 18, 8, 250, 5, 6];
    check("vans", &p, &u, &[0, 1, 6, 13, 40, 70, 256, 300, 328, 329]);
}

#[test]
fn a_book_of_repeated_classes_matches_the_exact_polynomial_product() {
    // 24 exposures in 4 classes (p, u), units with gcd 2 (the lattice has span 2) plus one odd certain one.
    let classes = [(0.02, 6u64), (0.1, 4), (0.25, 2), (0.004, 12)];
    let mut p = Vec::new();
    let mut u = Vec::new();
    for i in 0..24 {
        let (pi, ui) = classes[i % 4];
        p.push(pi);
        u.push(ui);
    }
    p.push(1.0);
    u.push(3);
    check("classes", &p, &u, &[3, 10, 21, 40, 75]);
}

/// The sensitivity is the derivative of the service's own tail: P(S >= k) is linear in p_i, so the central
/// difference (T(p_i + h) - T(p_i - h)) / 2h equals it up to the two tails' bounds over 2h.
#[test]
fn sensitivities_are_finite_differences_of_the_tail_in_units() {
    let p = [0.05, 0.12, 0.3, 0.07, 0.2, 0.01];
    let u = [12u64, 30, 4, 18, 8, 250];
    let h = 1e-3;
    for k in [13u64, 40, 260] {
        let r = contributions(json!({"portfolio": {"probabilities": p, "units": u}, "threshold": k}));
        for c in &r.contributions {
            let i = c.index;
            let mut plus = p;
            plus[i] += h;
            let mut minus = p;
            minus[i] -= h;
            let (a, ea) = tail(&json!({"probabilities": plus, "units": u}), k);
            let (b, eb) = tail(&json!({"probabilities": minus, "units": u}), k);
            let fd = (a - b) / (2.0 * h);
            let slack = (ea + eb + 4e-16) / (2.0 * h) + c.detail.sensitivity.error_bound;
            assert!((fd - c.sensitivity).abs() <= slack, "k={k} i={i}: {fd} vs {}", c.sensitivity);
        }
    }
}

#[test]
fn the_factor_model_in_units_is_answered_with_estimated_bounds() {
    // Its values are checked against references in tests/factor_contributions.rs.
    let r = contributions(json!({
        "portfolio": {"probabilities": [0.1, 0.2], "units": [3, 5]}, "threshold": 4,
        "dependence": {"model": "one_factor_gaussian", "rho": 0.2}}));
    assert_eq!(r.contributions.len(), 2);
    for c in &r.contributions {
        assert_eq!(c.detail.sensitivity.bound_kind, tailtally::engine::BoundKind::Estimated);
    }
}

/// Over HTTP: ids come back with their rows, as for a count.
#[tokio::test]
async fn the_route_answers_in_units_with_ids() {
    let s = common::start(&[]).await;
    let q = json!({"portfolio": {"probabilities": [0.05, 0.3, 0.2], "units": [12, 4, 8], "ids": ["a", 7, null]},
                   "threshold": 12, "rank_by": "impact"});
    let (st, _, body) = s.post_json("/v1/contributions", &q).await;
    assert_eq!(st, 200, "{body}");
    let rows = body["contributions"].as_array().unwrap();
    assert_eq!(rows.len(), 3);
    for r in rows {
        let want = [json!("a"), json!(7), Value::Null][r["index"].as_u64().unwrap() as usize].clone();
        assert_eq!(r.get("id").cloned().unwrap_or(Value::Null), want, "{r}");
    }
    s.shutdown().await.unwrap();
}
