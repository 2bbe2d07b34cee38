//! Property tests (proptest) of the request path and of identities the answers must satisfy, on random
//! inputs: the CI-side counterpart of the cargo-fuzz target in fuzz/.

use proptest::prelude::*;
use serde_json::{json, Value};
use tailtally::analytics::cancel::Cancel;
use tailtally::analytics::law::Law;
use tailtally::analytics::quantiles::quantiles as engine_quantiles;
use tailtally::analytics::{contributions, layers, quantiles, tail, Analytic};
use tailtally::config::{Options, ServiceLimits};
use tailtally::engine::exact::leave_one_out::contributions as engine_contributions;
use tailtally::engine::numerics::moments::Moments;
use tailtally::engine::{MethodId, Side};
use tailtally::portfolio::Model;

fn limits() -> ServiceLimits {
    let mut l = ServiceLimits::from_options(&Options::default());
    l.max_thresholds = 20;
    l.portfolio.max_listed_exposures = 200;
    l.portfolio.max_total_exposures = 100_000;
    l
}

/// Numbers a client might send, hostile ones included.
fn number() -> impl Strategy<Value = Value> {
    prop_oneof![
        40 => (0.0f64..1.0).prop_map(|x| json!(x)),
        3 => prop_oneof![Just(-1.0), Just(1.5), Just(0.0), Just(1.0), Just(1e-300), Just(1e300), Just(-0.0)].prop_map(|x| json!(x)),
        6 => (0u64..50).prop_map(|x| json!(x)),
        1 => Just(json!(u64::MAX)),
        1 => Just(json!(-3)),
        1 => Just(json!("0.5")),
        1 => Just(Value::Null),
    ]
}

/// Counts a client might send: mostly small integers, sometimes not.
fn count() -> impl Strategy<Value = Value> {
    prop_oneof![
        40 => (0u64..40).prop_map(|x| json!(x)),
        1 => Just(json!(u64::MAX)),
        1 => Just(json!(-3)),
        1 => Just(json!(2.5)),
        1 => Just(json!("7")),
        1 => Just(Value::Null),
    ]
}

fn portfolio() -> impl Strategy<Value = Value> {
    (
        prop::collection::vec(number(), 0..12),
        prop::collection::vec((count(), number()), 0..3),
        prop::collection::vec(number(), 0..2),
        prop::option::of((count(), number())),
    )
        .prop_map(|(ps, groups, rates, fam)| {
            let mut v = json!({"probabilities": ps,
                "groups": groups.into_iter().map(|(s, p)| json!({"size": s, "probability": p})).collect::<Vec<_>>(),
                "poisson_rates": rates});
            if let Some((n, p)) = fam {
                v["families"] = json!([{"kind": "constant", "n": n, "probability": p}]);
            }
            v
        })
}

/// Factors a client might send for a stress or a factor loading, at the extremes of f64 included.
fn extreme() -> impl Strategy<Value = Value> {
    prop_oneof![
        8 => (0.0f64..3.0).prop_map(|x| json!(x)),
        1 => prop_oneof![Just(0.0), Just(1e308), Just(f64::MAX), Just(f64::MIN_POSITIVE), Just(5e-324), Just(-1.0),
            Just(0.999_999_999_999), Just(1.0), Just(1e-300)].prop_map(|x| json!(x)),
        1 => Just(json!(u64::MAX)),
    ]
}

/// A stress, a factor model, both or neither; with nodes from the edges of their range.
fn scenario() -> impl Strategy<Value = Value> {
    (
        prop::option::of((any::<bool>(), extreme())),
        prop::option::of((extreme(), prop_oneof![Just(2u64), Just(3), Just(256), Just(257), Just(0)])),
    )
        .prop_map(|(stress, dep)| {
            let mut v = json!({});
            if let Some((odds, f)) = stress {
                v["stress"] = if odds { json!({"odds_factor": f}) } else { json!({"probability_factor": f}) };
            }
            if let Some((rho, nodes)) = dep {
                v["dependence"] = json!({"model": "one_factor_gaussian", "rho": rho, "nodes": nodes});
            }
            v
        })
}

/// The question's answer, or its refusal as the service would send it.
fn compute<A: Analytic>(req: &A::Request, l: &ServiceLimits) -> Result<A::Answer, tailtally::api::problem::Problem> {
    tailtally::analytics::run::<A>(req, l, &Cancel::never()).map_err(Into::into)
}

fn check<T>(r: Result<T, tailtally::api::problem::Problem>) {
    if let Err(p) = r {
        assert!(p.status == 413 || p.status == 422, "status {}", p.status);
        if p.status == 422 {
            assert!(!p.errors.is_empty(), "a 422 names its fields");
        }
    }
}

/// The generator must reach the computation, not only the parser: most generated bodies deserialise.
#[test]
fn generated_requests_mostly_reach_the_computation() {
    use proptest::strategy::ValueTree;
    use proptest::test_runner::TestRunner;
    let mut runner = TestRunner::deterministic();
    let strategy = (portfolio(), prop::collection::vec(count(), 1..4));
    let (mut parsed, mut valid) = (0, 0);
    for _ in 0..300 {
        let (p, ks) = strategy.new_tree(&mut runner).unwrap().current();
        let body = json!({"portfolio": p, "thresholds": ks});
        if let Ok(req) = serde_json::from_value::<tail::TailRequest>(body) {
            parsed += 1;
            valid += compute::<tail::Tail>(&req, &limits()).is_ok() as usize;
        }
    }
    eprintln!("parsed {parsed}, answered {valid} of 300");
    assert!(parsed >= 60 && valid >= 30, "parsed {parsed}, answered {valid} of 300");
}

/// A portfolio with compound sources (listed severities hostile or well formed, generated ones) and maybe
/// loss units.
fn compound_portfolio() -> impl Strategy<Value = Value> {
    let source = (
        number(),
        prop_oneof![1 => Just(0u8), 1 => Just(1u8), 4 => Just(2u8)],
        prop::collection::vec(count(), 0..4),
        prop::collection::vec(number(), 0..4),
        (count(), count(), count(), number()),
    )
        .prop_map(|(rate, kind, sizes, probs, (first, step, largest, ratio))| {
            let severity = match kind {
                0 => json!({"kind": "listed", "sizes": sizes, "probabilities": probs}),
                1 => json!({"kind": "geometric", "first": first, "step": step, "largest": largest, "ratio": ratio}),
                _ => {
                    let n = sizes.len().max(1);
                    let sizes = if sizes.is_empty() { vec![json!(3)] } else { sizes };
                    json!({"kind": "listed", "sizes": sizes, "probabilities": vec![1.0 / n as f64; n]})
                }
            };
            json!({"rate": rate, "severity": severity})
        });
    let units = prop_oneof![3 => Just(None), 1 => prop::collection::vec(count(), 0..4).prop_map(Some)];
    (portfolio(), prop::collection::vec(source, 1..3), units).prop_map(|(mut p, sources, units)| {
        p["compound_sources"] = json!(sources);
        if let Some(u) = units {
            p["units"] = json!(u);
        }
        p
    })
}

/// The compound generator reaches the computation too.
#[test]
fn generated_compound_requests_reach_the_computation() {
    use proptest::strategy::ValueTree;
    use proptest::test_runner::TestRunner;
    let mut runner = TestRunner::deterministic();
    let strategy = (compound_portfolio(), prop::collection::vec(count(), 1..4));
    let (mut parsed, mut valid) = (0, 0);
    for _ in 0..300 {
        let (p, ks) = strategy.new_tree(&mut runner).unwrap().current();
        let body = json!({"portfolio": p, "thresholds": ks, "methods": ["exact", "normal", "poisson"]});
        if let Ok(req) = serde_json::from_value::<tail::TailRequest>(body) {
            parsed += 1;
            valid += compute::<tail::Tail>(&req, &limits()).is_ok() as usize;
        }
    }
    eprintln!("compound: parsed {parsed}, answered {valid} of 300");
    assert!(parsed >= 30 && valid >= 8, "parsed {parsed}, answered {valid} of 300");
}

/// The properties' configuration: 300 cases from a fixed seed, so that a run of CI is reproducible (a random
/// seed found the panic of `a_vanishing_poisson_rate_under_the_factor_gets_its_layer` in CI on 2026-12-03, and
/// a red run that no one can replay helps nobody). Set PROPTEST_RNG_SEED to explore other seeds locally, as
/// contributors should before changing the engine (DEVELOPERS.md).
fn config() -> ProptestConfig {
    let mut c = ProptestConfig { cases: 300, ..ProptestConfig::default() };
    if std::env::var_os("PROPTEST_RNG_SEED").is_none() {
        c.rng_seed = proptest::test_runner::RngSeed::Fixed(20_261_203);
    }
    c
}

proptest! {
    #![proptest_config(config())]

    /// Whatever the body, parsing and computing never panic, and refusals are 413/422 with pointers.
    #[test]
    fn any_request_gets_an_answer_or_a_problem(p in portfolio(), ks in prop::collection::vec(count(), 0..4),
            side in prop_oneof![Just("upper"), Just("lower"), Just("point")], levels in prop::collection::vec(number(), 0..3)) {
        let l = limits();
        let t = json!({"portfolio": p, "thresholds": ks, "side": side, "methods": ["exact", "normal", "poisson", "saddlepoint", "auto"]});
        if let Ok(req) = serde_json::from_value::<tail::TailRequest>(t) {
            check(compute::<tail::Tail>(&req, &l));
        }
        let q = json!({"portfolio": p, "levels": levels, "methods": ["exact", "normal"]});
        if let Ok(req) = serde_json::from_value::<quantiles::QuantilesRequest>(q) {
            check(compute::<quantiles::Quantiles>(&req, &l));
        }
        let y = json!({"portfolio": p, "layers": [{"attachment": 2, "limit": 3}], "tail_levels": levels});
        if let Ok(req) = serde_json::from_value::<layers::LayersRequest>(y) {
            check(compute::<layers::Layers>(&req, &l));
        }
        let c = json!({"portfolio": p, "threshold": 2});
        if let Ok(req) = serde_json::from_value::<contributions::ContributionsRequest>(c) {
            check(compute::<contributions::Contributions>(&req, &l));
        }
    }

    /// Stress factors and factor loadings at the extremes of f64, with rates and sizes at theirs: an answer or
    /// a 413/422, never a panic.
    #[test]
    fn extreme_stresses_and_factors_get_an_answer_or_a_problem(p in portfolio(), sc in scenario(),
            ks in prop::collection::vec(count(), 1..3), levels in prop::collection::vec(number(), 1..3)) {
        let l = limits();
        let mut t = json!({"portfolio": p, "thresholds": ks, "methods": ["exact", "saddlepoint", "auto"]});
        let mut q = json!({"portfolio": p, "levels": levels});
        let mut y = json!({"portfolio": p, "layers": [{"attachment": 1}], "tail_levels": [0.9]});
        for (k, v) in sc.as_object().unwrap() {
            t[k] = v.clone();
            q[k] = v.clone();
            y[k] = v.clone();
        }
        if let Ok(req) = serde_json::from_value::<tail::TailRequest>(t) {
            check(compute::<tail::Tail>(&req, &l));
        }
        if let Ok(req) = serde_json::from_value::<quantiles::QuantilesRequest>(q) {
            check(compute::<quantiles::Quantiles>(&req, &l));
        }
        if let Ok(req) = serde_json::from_value::<layers::LayersRequest>(y) {
            check(compute::<layers::Layers>(&req, &l));
        }
    }

    /// Compound sources and loss units with hostile values (rates, sizes, severity probabilities and lengths at
    /// the edges): an answer or a 413/422, never a panic, for every method and question; and where the tail
    /// is answered, every rigorous bound's interval holds the exact value's.
    #[test]
    fn compound_sources_get_an_answer_or_a_problem(p in compound_portfolio(), ks in prop::collection::vec(count(), 1..4),
            side in prop_oneof![Just("upper"), Just("lower"), Just("point")]) {
        let l = limits();
        let t = json!({"portfolio": p, "thresholds": ks, "side": side,
            "methods": ["exact", "normal", "poisson", "saddlepoint", "auto"]});
        if let Ok(req) = serde_json::from_value::<tail::TailRequest>(t.clone()) {
            check(compute::<tail::Tail>(&req, &l));
        }
        let mut t = t;
        t["methods"] = json!(["exact", "normal", "poisson"]);
        if let Ok(req) = serde_json::from_value::<tail::TailRequest>(t) {
            if let Ok(answer) = compute::<tail::Tail>(&req, &l) {
                for r in &answer.results {
                    let x = &r.estimates[0];
                    for e in &r.estimates[1..] {
                        let gap = (e.probability - x.probability).abs();
                        prop_assert!(gap <= e.error_bound + x.error_bound + 1e-15, "{:?} k={}: {gap:e}", e.method, r.threshold);
                    }
                }
            }
        }
        let q = json!({"portfolio": p, "levels": [0.5]});
        if let Ok(req) = serde_json::from_value::<quantiles::QuantilesRequest>(q) {
            check(compute::<quantiles::Quantiles>(&req, &l));
        }
    }

    /// P(S >= k) = P(S without i >= k) + p_i P(S without i = k - 1), and the quantile brackets its level.
    #[test]
    fn answers_satisfy_their_identities(ps in prop::collection::vec(1e-9f64..0.999, 1..60), k in 0u64..30,
            level in 0.001f64..0.999) {
        let model = Model::from_parts(&ps, &[(3, 0.2)], 0.0);
        let m = Moments::of(&model);
        let law = Law::independent(model.clone());
        let tail = law.exact(&[(k, Side::Upper)])[0].value;
        for (c, &p) in engine_contributions(&model, &m, k).iter().zip(&ps) {
            let lhs = c.tail_without.value + p * c.sensitivity.value;
            prop_assert!((lhs - tail).abs() <= 1e-12 * tail.max(1e-300) + 1e-15, "{lhs} vs {tail}");
        }
        let q = &engine_quantiles(&law, &[level], MethodId::Exact, None)[0];
        prop_assert!(q.cdf_below.value < level && level <= q.cdf_at_count.value);
    }
}

/// Found by `extreme_stresses_and_factors_get_an_answer_or_a_problem` (proptest, in CI on 2026-12-03): a book
/// whose only unbounded part is a Poisson rate of 1e-300, under the one-factor model, asked for a layer. At
/// some node the tilt's solver returned t = 1.9e6, e^t overflowed the Poisson part's tilted rate, and its
/// window's length overflowed. `exact::solve_tilt` now caps t where that rate would exceed four times the
/// threshold (any t gives exact values); the layer is answered.
#[test]
fn a_vanishing_poisson_rate_under_the_factor_gets_its_layer() {
    let p =
        json!({"groups": [], "poisson_rates": [1e-300], "probabilities": [0.5552142574639116, 0.39878580187105944]});
    let dep = json!({"model": "one_factor_gaussian", "nodes": 2, "rho": 0.16822630564891572});
    let y = json!({"portfolio": p, "layers": [{"attachment": 1}], "tail_levels": [0.9], "dependence": dep});
    let req: layers::LayersRequest = serde_json::from_value(y).unwrap();
    let answer = compute::<layers::Layers>(&req, &limits()).expect("an answer");
    let v = serde_json::to_value(&answer).unwrap();
    let e = v["layers"][0]["expected_count"].as_f64().unwrap();
    // E[(S - 1)+] with S the sum of two Bernoulli variables (the Poisson part adds nothing visible): at most 1.
    assert!(e > 0.0 && e < 1.0, "{e}");
}
