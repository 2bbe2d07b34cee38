//! Quantiles, the distribution and layers under the one-factor Gaussian model on books in loss units and with
//! compound Poisson sources (the law mixed over the factor once, `analytics::factor::MixedLaw`), against a
//! reference independent of the service's quadrature (tests/common/factor_reference.rs): the conditional pmf
//! by the naive lattice recursion in f64, a binomial group spread over its unit, a compound source by Panjer's
//! recursion (Panjer 1981), mixed by the trapezoid rule on [-10, 10] with step 0.005. statrs' normal cdf limits
//! the reference to about 3e-11 relative per p(z), raised to the power of a tail's event count: its allowance
//! beside each bound is 1e-9 relative (as in tests/factor_compound.rs) plus 1e-15.
//!
//! Checked: every pmf row within its own bound, cdf and survival within the table's largest bound; each
//! quantile's defining inequalities P(S <= q) >= level > P(S <= q - span) within bounds, and the reference's
//! quantile inside the reported range; the stop-loss premium E[min((S - a)+, l)] of layers and the tail
//! expectation E[S | S > q] against the reference pmf. Over HTTP: each route answers 200 under the factor in
//! units and with compound sources, and a lattice too wide for the work budget is a 413.

mod common;
#[path = "common/factor_reference.rs"]
mod factor_reference;

use common::{ask_json as ask, assert_problem, start};
use factor_reference::*;
use serde_json::{json, Value};
use tailtally::analytics::distribution::Distribution;
use tailtally::analytics::layers::Layers;
use tailtally::analytics::quantiles::Quantiles;
use tailtally::analytics::Analytic;

fn answer<A: Analytic>(req: Value) -> Value
where
    A::Request: serde::de::DeserializeOwned,
    A::Answer: serde::Serialize,
{
    match ask::<A>(req) {
        Ok(v) => v,
        Err(e) => panic!("no answer: {e:?}"),
    }
}

fn f(v: &Value) -> f64 {
    v.as_f64().unwrap_or_else(|| panic!("not a number: {v}"))
}

fn allowance(truth: f64) -> f64 {
    1e-9 * truth.abs() + 1e-15
}

/// A book and its reference pmf on 0..=top (in units).
struct Book {
    portfolio: Value,
    rho: f64,
    pmf: Vec<f64>,
    span: u64,
}

/// Six vans in units (tests/units.rs) and a group of three of 6 units, span 2, rho 0.2.
fn vans() -> Book {
    let p = [0.05, 0.12, 0.3, 0.07, 0.2, 0.01];
    let u = [12usize, 30, 4, 18, 8, 250];
    let rho = 0.2;
    let c: Vec<f64> = p.iter().map(|&x| phi_inv(x)).collect();
    let cg = phi_inv(0.04);
    let width = u.iter().sum::<usize>() + 18;
    let pmf = mix(width + 1, |z| {
        let mut f = vec![1.0];
        for (&ci, &ui) in c.iter().zip(&u) {
            f = add_exposure(&f, conditional_p(ci, rho, z), ui);
        }
        add_spread(&f, &binomial(3, conditional_p(cg, rho, z)), 6, None)
    });
    let portfolio = json!({"probabilities": p, "units": u,
        "groups": [{"size": 3, "probability": 0.04, "units": 6}]});
    Book { portfolio, rho, pmf, span: 2 }
}

/// A group of 40 exposures of 3 units beside a compound source (rate 1.5, sizes 2 and 5), rho 0.3; the pmf
/// up to 400 units (the mass beyond is below 1e-30).
fn with_source() -> Book {
    let (m, p, u, rho) = (40u64, 0.05, 3usize, 0.3);
    let top = 400;
    let g = panjer(1.5, &[2, 5], &[0.6, 0.4], top);
    let cg = phi_inv(p);
    let pmf = mix(top + 1, |z| add_spread(&g, &binomial(m, conditional_p(cg, rho, z)), u, Some(top)));
    let portfolio = json!({"groups": [{"size": m, "probability": p, "units": u}],
        "compound_sources": [{"rate": 1.5, "severity": {"kind": "listed", "sizes": [2, 5], "probabilities": [0.6, 0.4]}}]});
    Book { portfolio, rho, pmf, span: 1 }
}

impl Book {
    fn dep(&self) -> Value {
        json!({"model": "one_factor_gaussian", "rho": self.rho})
    }

    fn cdf(&self, x: i64) -> f64 {
        if x < 0 {
            0.0
        } else {
            self.pmf.iter().take(x as usize + 1).sum()
        }
    }

    fn sf_above(&self, x: u64) -> f64 {
        self.pmf.iter().skip(x as usize + 1).sum()
    }

    /// The smallest total whose reference cdf reaches the level.
    fn quantile(&self, level: f64) -> u64 {
        let mut s = 0.0;
        for (x, &v) in self.pmf.iter().enumerate() {
            s += v;
            if s >= level {
                return x as u64;
            }
        }
        panic!("level {level} beyond the reference's range")
    }

    fn layer(&self, a: u64, l: Option<u64>) -> f64 {
        self.pmf
            .iter()
            .enumerate()
            .map(|(x, &v)| {
                let excess = (x as u64).saturating_sub(a);
                v * l.map_or(excess, |l| excess.min(l)) as f64
            })
            .sum()
    }
}

fn check_distribution(book: &Book, from: u64, to: u64) {
    let r = answer::<Distribution>(json!({"portfolio": book.portfolio, "from": from, "to": to,
        "dependence": book.dep()}));
    let step = r["step"].as_u64().unwrap();
    assert_eq!(step, book.span, "{}", r["step"]);
    let first = r["from"].as_u64().unwrap();
    assert_eq!(r["bound_kind"], "estimated");
    let cdf_bound = f(&r["cdf_sf_max_error_bound"]);
    // A bound that allows anything could not fail: the mixture is good to about 1e-9 (its default target).
    assert!(cdf_bound < 1e-8, "cdf/sf bound {cdf_bound}");
    let rows = r["pmf"].as_array().unwrap().len();
    assert!(rows >= 10, "{rows} rows");
    for i in 0..rows {
        let x = first + i as u64 * step;
        let truth = book.pmf[x as usize];
        let (got, bound) = (f(&r["pmf"][i]), f(&r["pmf_error_bound"][i]));
        assert!((got - truth).abs() <= bound + allowance(truth), "pmf at {x}: {got} vs {truth} (bound {bound})");
        assert!(bound < 1e-8, "pmf bound at {x}: {bound}");
        let c = book.cdf(x as i64);
        let got = f(&r["cdf"][i]);
        assert!((got - c).abs() <= cdf_bound + allowance(c), "cdf at {x}: {got} vs {c}");
        let s = book.sf_above(x);
        let got = f(&r["sf"][i]);
        assert!((got - s).abs() <= cdf_bound + allowance(s), "sf at {x}: {got} vs {s}");
    }
    let worst = (0..rows)
        .map(|i| {
            let x = first + i as u64 * step;
            ((f(&r["pmf"][i]) - book.pmf[x as usize]).abs(), f(&r["pmf_error_bound"][i]))
        })
        .fold((0.0f64, f64::INFINITY), |(e, ratio), (err, b)| {
            (e.max(err), if err > 1e-15 { ratio.min(b / err) } else { ratio })
        });
    eprintln!(
        "distribution: {rows} rows, worst pmf error {:.1e}, least bound/error {:.1e}, cdf bound {cdf_bound:.1e}",
        worst.0, worst.1
    );
    // Totals off the lattice get no row: the reference has no mass there either.
    let off: f64 = (0..book.pmf.len()).filter(|x| *x as u64 % book.span != 0).map(|x| book.pmf[x]).sum();
    assert!(off < 1e-15, "mass off the lattice {off}");
}

fn check_quantiles(book: &Book, levels: &[f64]) {
    let r = answer::<Quantiles>(json!({"portfolio": book.portfolio, "levels": levels, "dependence": book.dep()}));
    for (q, &level) in r["quantiles"].as_array().unwrap().iter().zip(levels) {
        let count = q["count"].as_u64().unwrap();
        let [b_at, b_below] = [f(&q["cdf_error_bounds"][0]), f(&q["cdf_error_bounds"][1])];
        let (at, below) = (book.cdf(count as i64), book.cdf(count as i64 - book.span as i64));
        let what = format!("level {level}: q = {count}, reference cdf {at} / {below}");
        assert_eq!(count % book.span, 0, "{what}");
        assert!((f(&q["cdf_at_count"]) - at).abs() <= b_at + allowance(at), "{what}: {q}");
        assert!((f(&q["cdf_below"]) - below).abs() <= b_below + allowance(below), "{what}: {q}");
        // The defining inequalities, within the bounds.
        assert!(at >= level - b_at - allowance(at), "{what}");
        assert!(below < level + b_below + allowance(below), "{what}");
        let want = book.quantile(level);
        let (lo, hi) = (q["count_range"][0].as_u64().unwrap(), q["count_range"][1].as_u64());
        assert!(lo <= want && hi.is_none_or(|h| want <= h), "{what}: reference quantile {want} outside {lo}..{hi:?}");
        // The same quantile, unless the level lies within the bounds of the reference's cdf at a lattice point
        // (here at 0.99: the cdf at 90 is 0.99 - 2.7e-13, inside the bound, and the range holds both).
        let near = |x: i64| (book.cdf(x) - level).abs() <= b_at.max(b_below) + allowance(level);
        if !near(want as i64) && !near(want as i64 - book.span as i64) {
            assert_eq!(count, want, "{what}");
        }
    }
}

fn check_layers(book: &Book, layers: &[(u64, Option<u64>)], tail_levels: &[f64]) {
    let ls: Vec<Value> = layers.iter().map(|&(a, l)| json!({"attachment": a, "limit": l})).collect();
    let r = answer::<Layers>(json!({"portfolio": book.portfolio, "layers": ls, "tail_levels": tail_levels,
        "dependence": book.dep()}));
    for (out, &(a, l)) in r["layers"].as_array().unwrap().iter().zip(layers) {
        let d = &out["detail"]["expected_count"];
        let (got, bound) = (f(&d["value"]), f(&d["error_bound"]));
        let want = book.layer(a, l);
        assert!((got - want).abs() <= bound + allowance(want), "layer ({a}, {l:?}): {got} vs {want} (bound {bound})");
        assert!((got - want).abs() <= 1e-6 * want + 1e-12, "layer ({a}, {l:?}): {got} vs {want}");
        let t = &out["detail"]["probability_touched"];
        let want = book.sf_above(a);
        assert!((f(&t["value"]) - want).abs() <= f(&t["error_bound"]) + allowance(want), "touched at {a}: {t}");
    }
    for (out, &level) in r["tail_expectations"].as_array().unwrap().iter().zip(tail_levels) {
        let q = out["quantile"].as_u64().unwrap();
        // The reference's quantile, unless the level lies within 1e-9 of its cdf at a lattice point (as at
        // 0.99 in the vans' book: check_quantiles). E[S | S > q] is then checked at the service's q.
        let want_q = book.quantile(level);
        let near = |x: i64| (book.cdf(x) - level).abs() <= 1e-9;
        if !near(want_q as i64) && !near(want_q as i64 - book.span as i64) {
            assert_eq!(q, want_q, "level {level}");
        }
        let beyond = book.sf_above(q);
        let want = q as f64 + book.layer(q, None) / beyond;
        let e = &out["expected_count"];
        let (got, bound) = (f(&e["value"]), f(&e["error_bound"]));
        assert!((got - want).abs() <= bound + 1e-8 * want, "E[S | S > {q}]: {got} vs {want} (bound {bound})");
    }
}

#[test]
fn a_book_in_units_under_the_factor_matches_the_reference() {
    let book = vans();
    assert!((book.pmf.iter().sum::<f64>() - 1.0).abs() < 1e-12);
    check_distribution(&book, 0, 340);
    check_quantiles(&book, &[0.3, 0.5, 0.9, 0.99, 0.999, 0.9999]);
    check_layers(&book, &[(0, None), (20, Some(50)), (100, Some(100)), (250, None), (7, Some(1))], &[0.9, 0.99]);
}

#[test]
fn a_compound_source_beside_a_group_under_the_factor_matches_panjers_recursion() {
    let book = with_source();
    assert!((book.pmf.iter().sum::<f64>() - 1.0).abs() < 1e-12);
    check_distribution(&book, 0, 150);
    check_quantiles(&book, &[0.5, 0.9, 0.99, 0.9999]);
    check_layers(&book, &[(10, Some(20)), (30, None), (60, Some(40))], &[0.95]);
    // By mass: the central range, every row within its bound.
    let r = answer::<Distribution>(json!({"portfolio": book.portfolio, "mass": 1e-9, "dependence": book.dep()}));
    let first = r["from"].as_u64().unwrap() as usize;
    for (i, (v, b)) in r["pmf"].as_array().unwrap().iter().zip(r["pmf_error_bound"].as_array().unwrap()).enumerate() {
        let truth = book.pmf[first + i];
        assert!((f(v) - truth).abs() <= f(b) + allowance(truth), "pmf at {}: {v} vs {truth}", first + i);
    }
    assert!(book.cdf(first as i64 - 1) <= 0.5e-9 + 1e-12, "from {first}");
}

#[test]
fn a_lattice_too_wide_for_the_work_budget_is_refused_before_any_work() {
    // 2000 exposures of up to 10^6 units each: the lattice is about 10^9 steps wide.
    let p: Vec<f64> = (0..2000).map(|i| 0.01 + 0.0001 * (i % 7) as f64).collect();
    let u: Vec<u64> = (0..2000).map(|i| 999_983 - 2 * (i % 5)).collect();
    let portfolio = json!({"probabilities": p, "units": u});
    let dep = json!({"model": "one_factor_gaussian", "rho": 0.2});
    let t = std::time::Instant::now();
    for r in [
        ask::<Quantiles>(json!({"portfolio": portfolio, "levels": [0.99], "dependence": dep})),
        ask::<Distribution>(json!({"portfolio": portfolio, "mass": 1e-6, "dependence": dep})),
        ask::<Layers>(json!({"portfolio": portfolio, "layers": [{"attachment": 5, "limit": 10}], "dependence": dep})),
    ] {
        match r {
            Err(tailtally::analytics::Error::TooLarge(why)) => assert!(why.contains("coarser"), "{why}"),
            other => panic!("not refused as too large: {:?}", other.map(|_| ())),
        }
    }
    // Refused from the budget alone (no law was built): far below any computation's time on this lattice.
    assert!(t.elapsed().as_secs() < 30);
}

#[tokio::test]
async fn every_route_answers_under_the_factor_in_units_and_with_compound_sources() {
    let s = start(&[]).await;
    let (factor, units, compound) = mixed_books();
    for portfolio in [&units, &compound] {
        let asks = [
            ("/v1/tail", json!({"portfolio": portfolio, "thresholds": [40], "dependence": factor})),
            ("/v1/quantiles", json!({"portfolio": portfolio, "levels": [0.5, 0.99], "dependence": factor})),
            ("/v1/distribution", json!({"portfolio": portfolio, "from": 0, "to": 200, "dependence": factor})),
            ("/v1/distribution", json!({"portfolio": portfolio, "mass": 1e-6, "dependence": factor})),
            (
                "/v1/layers",
                json!({"portfolio": portfolio, "layers": [{"attachment": 30, "limit": 50}], "tail_levels": [0.99],
                       "dependence": factor}),
            ),
        ];
        for (path, q) in asks {
            let (st, _, body) = s.post_json(path, &q).await;
            assert_eq!(st, 200, "{path}: {body}");
            assert_eq!(body["model"]["dependence"]["model"], "one_factor_gaussian", "{path}: {body}");
        }
        // Contributions too (their values: tests/factor_contributions.rs).
        let q = json!({"portfolio": portfolio, "threshold": 40, "dependence": factor});
        let (st, _, body) = s.post_json("/v1/contributions", &q).await;
        assert_eq!(st, 200, "{body}");
    }
    // Too wide for the budget: a 413 at once, not a timeout.
    let p: Vec<f64> = vec![0.01; 2000];
    let u: Vec<u64> = (0..2000).map(|i| 999_983 - 2 * (i % 5)).collect();
    let q = json!({"portfolio": {"probabilities": p, "units": u}, "levels": [0.99], "dependence": factor});
    let (st, ct, body) = s.post_json("/v1/quantiles", &q).await;
    assert_problem(st, &ct, &body, 413, None);
    s.shutdown().await.unwrap();
}
