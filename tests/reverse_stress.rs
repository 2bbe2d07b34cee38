//! The reverse stress question (POST /v1/reverse-stress and the batch kind `reverse_stress`) against roots and
//! tails from outside the engine:
//!
//! * fixtures/reference/reverse_stress.json, made by fixtures/reference/make_reverse_stress.py with mpmath at
//!   40 digits: for one group of identical exposures the tail in the factor is the regularised incomplete beta
//!   I_q(c, m - c + 1) (c = ceil(k / u) in units), and the roots in the probability and odds factors and in rho
//!   (Vasicek's one-factor model, integrated split at z*) are solved there;
//! * small heterogeneous books, with and without units, by enumeration of the 2^n outcomes in exact rationals
//!   (num-rational) at the bracket's ends, with the stressed probabilities formed exactly from the returned f.

mod common;
use common::{assert_problem, start};
use num_rational::BigRational;
use num_traits::{One, ToPrimitive, Zero};
use serde_json::{json, Value};
use tailtally::analytics::cancel::Cancel;
use tailtally::analytics::reverse_stress::{
    planned_evaluations, Outcome, ReverseStress, ReverseStressRequest, ReverseStressResponse, Which,
};
use tailtally::config::{Options, ServiceLimits};

fn ask(req: Value) -> ReverseStressResponse {
    let req: ReverseStressRequest = serde_json::from_value(req).expect("a request");
    let limits = ServiceLimits::from_options(&Options::default());
    tailtally::analytics::run::<ReverseStress>(&req, &limits, &Cancel::never()).expect("an answer")
}

fn reference() -> Value {
    let text = std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/fixtures/reference/reverse_stress.json"))
        .expect("fixtures/reference/reverse_stress.json");
    serde_json::from_str(&text).unwrap()
}

fn rat(x: f64) -> BigRational {
    BigRational::from_float(x).unwrap()
}

/// The stressed probability in exact rationals: min(1, f p), or f p / (1 - p + f p).
fn stress(which: Which, f: f64, p: f64) -> BigRational {
    let (f, p) = (rat(f), rat(p));
    match which {
        Which::ProbabilityFactor => (f * &p).min(BigRational::one()),
        Which::OddsFactor => &f * &p / (BigRational::one() - &p + &f * &p),
        Which::Rho => unreachable!(),
    }
}

/// P(S >= k) for losses u_i with probabilities q_i, by enumeration of the 2^n outcomes.
fn enumerate_upper(q: &[BigRational], u: &[u64], k: u64) -> BigRational {
    let mut acc = BigRational::zero();
    for mask in 0u32..(1 << q.len()) {
        let (mut s, mut pr) = (0u64, BigRational::one());
        for i in 0..q.len() {
            if mask >> i & 1 == 1 {
                s += u[i];
                pr *= &q[i];
            } else {
                pr *= BigRational::one() - &q[i];
            }
        }
        if s >= k {
            acc += pr;
        }
    }
    acc
}

fn bracket(r: &ReverseStressResponse) -> (f64, f64) {
    (r.bracket.low.expect("a low end"), r.bracket.high.expect("a high end"))
}

/// One group: the mpmath roots of the incomplete beta lie in the bracket, the bracket is as narrow as the
/// tolerance asks, the tail at `factor` is under the level by its bound, and the search used no more
/// evaluations than it planned.
#[test]
fn one_group_roots_lie_in_the_bracket() {
    let doc = reference();
    for g in doc["groups"].as_array().unwrap() {
        for (which, key) in [(Which::ProbabilityFactor, "probability_factor"), (Which::OddsFactor, "odds_factor")] {
            for tol in [1e-4, 1e-9] {
                let mut group = json!({"size": g["size"], "probability": g["probability"]});
                if g["units"] != 1 {
                    group["units"] = g["units"].clone();
                }
                let r = ask(json!({"portfolio": {"groups": [group]}, "threshold": g["threshold"], "level": g["level"],
                                   "which": key, "tolerance": tol}));
                let truth = g[key].as_f64().unwrap();
                let what = format!("{g} {key} tol {tol}");
                assert_eq!(r.outcome, Outcome::Found, "{what}");
                let (lo, hi) = bracket(&r);
                assert!(lo <= truth && truth <= hi, "{what}: {truth} not in [{lo}, {hi}]");
                assert!(hi / lo - 1.0 <= tol * (1.0 + 1e-6), "{what}: [{lo}, {hi}] wider than {tol}");
                assert_eq!(r.factor, Some(lo));
                let level = g["level"].as_f64().unwrap();
                assert!(r.tail.value + r.tail.error_bound <= level, "{what}: {:?}", r.tail);
                assert!(r.tail.value >= level * (1.0 - 1e-3), "{what}: the tail at the root is near the level");
                assert!(r.evaluations <= planned_evaluations(which, Some(tol)), "{what}: {}", r.evaluations);
                assert!(r.monotone && r.notes.is_empty(), "{what}: {:?}", r.notes);
            }
        }
    }
}

/// A heterogeneous book, as a count and in units: the tail at the bracket's ends in exact rationals (the
/// stressed probabilities formed exactly from the returned factors) is <= level at `low` and > level at `high`.
#[test]
fn heterogeneous_books_bracket_the_root_in_exact_rationals() {
    const P: [f64; 6] = [0.05, 0.12, 0.3, 0.07, 0.2, 0.01];
    const U: [u64; 6] = [12, 30, 4, 18, 8, 250];
    let ones = [1u64; 6];
    let cases: [(&[u64], u64, f64); 4] = [(&ones, 3, 0.02), (&ones, 2, 0.3), (&U, 40, 0.02), (&U, 250, 1e-4)];
    for (units, k, level) in cases {
        for (which, key) in [(Which::ProbabilityFactor, "probability_factor"), (Which::OddsFactor, "odds_factor")] {
            let mut portfolio = json!({"probabilities": P});
            if units[0] != 1 {
                portfolio["units"] = json!(units);
            }
            let r = ask(json!({"portfolio": portfolio, "threshold": k, "level": level, "which": key}));
            let what = format!("units {units:?} k {k} level {level} {key}");
            assert_eq!(r.outcome, Outcome::Found, "{what}");
            let (lo, hi) = bracket(&r);
            let at = |f: f64| {
                let q: Vec<BigRational> = P.iter().map(|&p| stress(which, f, p)).collect();
                enumerate_upper(&q, units, k)
            };
            let alpha = rat(level);
            assert!(at(lo) <= alpha, "{what}: the tail at {lo} is {} > {level}", at(lo).to_f64().unwrap());
            assert!(at(hi) > alpha, "{what}: the tail at {hi} is {} <= {level}", at(hi).to_f64().unwrap());
            let truth = at(lo).to_f64().unwrap();
            assert!((r.tail.value - truth).abs() <= r.tail.error_bound.max(1e-300), "{what}: {:?} vs {truth}", r.tail);
            assert!(hi / lo - 1.0 <= 1e-4 * (1.0 + 1e-6), "{what}: [{lo}, {hi}]");
        }
    }
}

/// A group in units beside the listed book: at factors near 1e-100 the exact engine's relative bound can fail
/// (an absolute bound of 1 that straddles any level), and the search must still bisect on the estimates rather
/// than stop at factor 0. The truth enumerates the group's two members as listed exposures.
#[test]
fn a_group_in_units_still_brackets_the_root() {
    const P: [f64; 8] = [0.05, 0.12, 0.3, 0.07, 0.2, 0.01, 0.03, 0.03];
    const U: [u64; 8] = [12, 30, 4, 18, 8, 250, 2, 2];
    let portfolio = json!({"probabilities": P[..6], "units": U[..6],
        "groups": [{"size": 2, "probability": 0.03, "units": 2}]});
    for (k, level) in [(100u64, 0.01), (60, 0.02)] {
        let r = ask(json!({"portfolio": portfolio, "threshold": k, "level": level, "which": "probability_factor"}));
        assert_eq!(r.outcome, Outcome::Found, "k {k}");
        let (lo, hi) = bracket(&r);
        let at = |f: f64| {
            let q: Vec<BigRational> = P.iter().map(|&p| stress(Which::ProbabilityFactor, f, p)).collect();
            enumerate_upper(&q, &U, k)
        };
        assert!(at(lo) <= rat(level) && at(hi) > rat(level), "k {k}: [{lo}, {hi}]");
        assert!(hi / lo - 1.0 <= 1e-4 * (1.0 + 1e-6), "k {k}: [{lo}, {hi}]");
    }
}

/// The largest rho: the mpmath root of the mixture's tail lies in the bracket, of width at most the tolerance;
/// the same pool in units (each member 7 units, beside a certain exposure of 3) has the same root.
#[test]
fn rho_roots_lie_in_the_bracket() {
    let doc = reference();
    for (g, units) in doc["rho"].as_array().unwrap().iter().flat_map(|g| [(g, false), (g, true)]) {
        let k = g["threshold"].as_u64().unwrap();
        // In units: 3 + 7 Binomial >= 3 + 7 (k - 1) + 1 iff Binomial >= k (the lattice has span 7, offset 3).
        let (portfolio, threshold) = if units {
            (
                json!({"probabilities": [1.0], "units": [3],
                    "groups": [{"size": g["size"], "probability": g["probability"], "units": 7}]}),
                3 + 7 * (k - 1) + 1,
            )
        } else {
            (json!({"groups": [{"size": g["size"], "probability": g["probability"]}]}), k)
        };
        let r = ask(json!({"portfolio": portfolio, "threshold": threshold, "level": g["level"], "which": "rho"}));
        let truth = g["rho"].as_f64().unwrap();
        assert_eq!(r.outcome, Outcome::Found, "{g}");
        let (lo, hi) = bracket(&r);
        assert!(lo <= truth && truth <= hi, "{g}: {truth} not in [{lo}, {hi}]");
        assert!(hi - lo <= 1e-4 * (1.0 + 1e-6), "{g}: [{lo}, {hi}]");
        assert!(r.evaluations <= planned_evaluations(Which::Rho, None));
        assert!(r.model.nodes_evaluated.is_some_and(|[n, _]| n > 0), "{:?}", r.model);
    }
}

/// A book that names a loading for some exposures: the others load on the searched rho. A certain exposure
/// with its own loading of 0.3 beside the reference's group moves the threshold by one and nothing else, so the
/// mpmath root of the group alone (fixtures/reference/reverse_stress.json) must still lie in the bracket.
#[test]
fn exposures_without_a_loading_of_their_own_take_the_searched_rho() {
    let doc = reference();
    for g in doc["rho"].as_array().unwrap() {
        let k = g["threshold"].as_u64().unwrap();
        let portfolio = json!({"probabilities": [1.0], "loadings": [0.3],
            "groups": [{"size": g["size"], "probability": g["probability"]}]});
        let r = ask(json!({"portfolio": portfolio, "threshold": k + 1, "level": g["level"], "which": "rho"}));
        let truth = g["rho"].as_f64().unwrap();
        assert_eq!(r.outcome, Outcome::Found, "{g}");
        let (lo, hi) = bracket(&r);
        assert!(lo <= truth && truth <= hi, "{g}: {truth} not in [{lo}, {hi}]");
    }
}

/// The ends: certain exposures that reach the threshold leave no factor (the tail is 1 at factor 0); a
/// threshold that even rho 0.99 keeps under the level is answered as such; a threshold below the mean is noted
/// for rho (the tail then falls with rho: the search's assumption fails, and the answer says so).
#[test]
fn no_factor_every_rho_and_a_threshold_below_the_mean() {
    let r = ask(json!({"portfolio": {"probabilities": [1.0, 1.0, 0.1]}, "threshold": 2, "level": 0.5,
                       "which": "probability_factor"}));
    assert_eq!((r.outcome, r.factor, r.tail.value), (Outcome::NoneKeeps, None, 1.0));
    assert_eq!(r.bracket.high, Some(0.0));
    // P(S >= 60) for 100 exposures at 2%: under 5% at every rho of the grid (at rho 0.99 it is about 2%).
    let r = ask(json!({"portfolio": {"groups": [{"size": 100, "probability": 0.02}]}, "threshold": 60,
                       "level": 0.05, "which": "rho"}));
    assert_eq!((r.outcome, r.factor, r.bracket.high), (Outcome::EveryKeeps, Some(0.99), None), "{:?}", r.notes);
    let r = ask(json!({"portfolio": {"groups": [{"size": 100, "probability": 0.02}]}, "threshold": 1,
                       "level": 0.5, "which": "rho"}));
    assert_eq!(r.outcome, Outcome::NoneKeeps);
    assert!(r.notes.iter().any(|n| n.contains("below the mean")), "{:?}", r.notes);
}

#[tokio::test]
async fn the_route_answers_as_the_analytic_and_refuses_bad_fields() {
    let s = start(&[]).await;
    let q = json!({"portfolio": {"groups": [{"size": 100, "probability": 0.02}]}, "threshold": 6, "level": 0.01,
                   "which": "probability_factor"});
    let (st, ct, body) = s.post_json("/v1/reverse-stress", &q).await;
    assert_eq!((st, ct.as_str()), (200, "application/json"), "{body}");
    let direct = ask(q.clone());
    assert_eq!(body["factor"].as_f64(), direct.factor);
    assert_eq!(body["outcome"], "found");
    assert!(body["assumptions"].as_array().is_some_and(|a| !a.is_empty()));
    let bad = |patch: Value| {
        let mut r = q.clone();
        for (k, v) in patch.as_object().unwrap() {
            r[k] = v.clone();
        }
        r
    };
    for (patch, pointer) in [
        (json!({"level": 0.0}), Some("/level")),
        (json!({"level": 1.0}), Some("/level")),
        (json!({"level": -0.5}), Some("/level")),
        (json!({"tolerance": 0.0}), Some("/tolerance")),
        (json!({"which": "everything"}), None),
        (json!({"portfolio": {"poisson_rates": [2.0]}, "threshold": 2_000_000_000u64}), Some("/threshold")),
    ] {
        let (st, ct, body) = s.post_json("/v1/reverse-stress", &bad(patch)).await;
        assert_problem(st, &ct, &body, 422, pointer);
    }
    // Extreme books are answered, never a 5xx: the largest Poisson rate at the largest threshold, a subnormal
    // probability under an odds factor (the range ends at 1e300: every factor up to it keeps the tail under),
    // a level below every representable tail.
    // A threshold beyond the largest possible total: the tail is 0 under every stress, so every factor keeps it.
    for patch in [
        json!({"threshold": 101}),
        json!({"portfolio": {"probabilities": [0.1, 0.2], "units": [3, 5]}, "threshold": 9}),
    ] {
        let (st, _, body) = s.post_json("/v1/reverse-stress", &bad(patch)).await;
        assert_eq!(st, 200, "{body}");
        assert_eq!(body["outcome"], "every_keeps", "{body}");
        assert!(body["notes"].to_string().contains("beyond the largest possible total"), "{body}");
    }
    for (q, outcome) in [
        (
            json!({"portfolio": {"poisson_rates": [1e9]}, "threshold": 1_000_000_000u64, "level": 0.5,
                "which": "probability_factor"}),
            "found",
        ),
        (
            json!({"portfolio": {"probabilities": [5e-324, 0.5]}, "threshold": 2, "level": 0.3, "which": "odds_factor"}),
            "every_keeps",
        ),
        (
            json!({"portfolio": {"probabilities": [5e-324, 0.5]}, "threshold": 2, "level": 1e-300,
                "which": "probability_factor", "tolerance": 1e-12}),
            "found",
        ),
    ] {
        let (st, _, body) = s.post_json("/v1/reverse-stress", &q).await;
        assert_eq!((st, &body["outcome"]), (200, &json!(outcome)), "{q}: {body}");
    }
    // The batch kind answers the same.
    let line = json!({"id": "r", "reverse_stress": q}).to_string() + "\n";
    let res = s
        .client
        .post(format!("{}/v1/batch", s.base))
        .header("content-type", "application/x-ndjson")
        .body(line)
        .send()
        .await
        .unwrap();
    assert_eq!(res.status().as_u16(), 200);
    let answer: Value = serde_json::from_str(res.text().await.unwrap().trim()).unwrap();
    assert_eq!(answer["id"], "r");
    assert_eq!(answer["reverse_stress"]["factor"].as_f64(), direct.factor, "{answer}");
    assert_eq!(answer["reverse_stress"]["bracket"], body_bracket(&direct));
    s.shutdown().await.unwrap();
}

fn body_bracket(r: &ReverseStressResponse) -> Value {
    json!({"low": r.bracket.low, "high": r.bracket.high})
}
