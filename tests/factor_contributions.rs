//! The last routes under the one-factor Gaussian model on books in loss units and with compound Poisson sources:
//! /v1/contributions (dP(S >= k)/dp_i = E[(P(S_-i >= k - u_i | Z) - P(S_-i >= k | Z)) dp_i(Z)/dp_i] and the tail
//! without each exposure E[P(S_-i >= k | Z)]) and /v1/reverse-stress (a probability factor and rho searched on
//! a book with a compound source), against references independent of the service's quadrature:
//!
//! * tests/common/factor_reference.rs: the conditional law by the naive lattice recursion in f64 (a binomial
//!   group spread over its unit, a compound source by Panjer's recursion, Panjer 1981), mixed by the trapezoid
//!   rule on [-10, 10] with step 0.005. The sensitivity is that reference evaluating the conditional difference
//!   P(S_-i >= k - u_i | z) - P(S_-i >= k | z) directly, weighted by dp_i(z)/dp_i = phi((c_i - sqrt(rho_i) z) /
//!   sqrt(1 - rho_i)) / (sqrt(1 - rho_i) phi(c_i)), c_i = Phi^-1(p_i); and, separately, the central difference
//!   in p_i of the reference's own tail (no derivative formula at all);
//! * fixtures/reference/factor_contributions.json (fixtures/reference/make_factor_contributions.py, mpmath at
//!   40 digits): one exposure beside a homogeneous group and a compound source, whose conditional law is a
//!   binomial convolved with Panjer's recursion, so each figure is a one-dimensional integral mpmath evaluates
//!   by two quadratures that agree to 1e-20.
//!
//! statrs' normal cdf limits the f64 reference to about 3e-11 relative per p(z): its allowance beside each
//! bound is 1e-9 relative plus 1e-14 (as in tests/factor_mixed.rs). Over HTTP: each newly opened route answers
//! 200 under the factor in units and with compound sources, in a batch too, and a book whose leave-one-out laws
//! would pass the work budget is a 413.

mod common;
#[path = "common/factor_reference.rs"]
mod factor_reference;

use common::{ask_json as ask, assert_problem, start};
use factor_reference::*;
use serde_json::{json, Value};
use tailtally::analytics::contributions::Contributions;
use tailtally::analytics::reverse_stress::ReverseStress;
use tailtally::analytics::Analytic;

fn answer<A: Analytic>(req: Value) -> Value
where
    A::Request: serde::de::DeserializeOwned,
    A::Answer: serde::Serialize,
{
    ask::<A>(req).expect("an answer")
}

/// A book as the reference sees it: listed exposures (p, units, loading), one group (size, p, units, loading),
/// compound sources (rate, sizes, probabilities).
#[derive(Clone)]
struct Book {
    listed: Vec<(f64, u64, f64)>,
    group: Option<(u64, f64, u64, f64)>,
    sources: Vec<(f64, Vec<u64>, Vec<f64>)>,
}

impl Book {
    /// The request's portfolio: without `loadings` every exposure takes the dependence model's rho (the
    /// book's own loadings must then equal it).
    fn portfolio(&self, loadings: bool) -> Value {
        let mut p = json!({
            "probabilities": self.listed.iter().map(|e| e.0).collect::<Vec<_>>(),
            "units": self.listed.iter().map(|e| e.1).collect::<Vec<_>>(),
        });
        if loadings {
            p["loadings"] = json!(self.listed.iter().map(|e| e.2).collect::<Vec<_>>());
        }
        if let Some((m, q, u, r)) = self.group {
            p["groups"] = json!([{"size": m, "probability": q, "units": u}]);
            if loadings {
                p["groups"][0]["loading"] = json!(r);
            }
        }
        if !self.sources.is_empty() {
            p["compound_sources"] = self
                .sources
                .iter()
                .map(|(rate, sizes, probs)| {
                    json!({"rate": rate, "severity": {"kind": "listed", "sizes": sizes, "probabilities": probs}})
                })
                .collect();
        }
        p
    }

    /// The sources' pmf on 0..=top (independent of the factor), convolved together.
    fn sources_pmf(&self, top: usize) -> Vec<f64> {
        let mut f = vec![1.0];
        for (rate, sizes, probs) in &self.sources {
            let g = panjer(*rate, sizes, probs, top);
            f = add_spread(&f, &g, 1, Some(top));
        }
        f
    }

    /// The conditional pmf given z on 0..=top, without listed exposure `skip`, the sources' pmf given.
    fn conditional(&self, z: f64, skip: Option<usize>, sources: &[f64], top: usize) -> Vec<f64> {
        let mut f = sources.to_vec();
        for (i, &(p, u, r)) in self.listed.iter().enumerate() {
            if Some(i) == skip || p <= 0.0 {
                continue;
            }
            let q = if p >= 1.0 { 1.0 } else { conditional_p(phi_inv(p), r, z) };
            f = add_exposure(&f, q, u as usize);
            f.truncate(top + 1);
        }
        if let Some((m, q, u, r)) = self.group {
            let b = binomial(m, conditional_p(phi_inv(q), r, z));
            f = add_spread(&f, &b, u as usize, Some(top));
        }
        f
    }
}

/// P(S >= x) from a pmf on 0..=top (x <= top + 1).
fn upper(f: &[f64], x: u64) -> f64 {
    let below: f64 = f.iter().take(x as usize).sum();
    (1.0 - below).max(0.0)
}

/// The reference figures at threshold k: P(S >= k) and, per listed exposure, (sensitivity, tail without it).
/// A random exposure's sensitivity is E[w_i(Z) (P(S_-i >= k - u_i | Z) - P(S_-i >= k | Z))]; an impossible or
/// certain one with loading 0 has S_-i = S or S - u_i, independent of Z.
fn reference(book: &Book, k: u64) -> (f64, Vec<(f64, f64)>) {
    let umax = book.listed.iter().map(|e| e.1).max().unwrap();
    let top = (k + umax) as usize + 1;
    let sources = book.sources_pmf(top);
    let n = book.listed.len();
    // Entries: the tail, then per exposure its weighted conditional difference and its tail without it, then
    // the tails at k - u_i and k + u_i (for the impossible and certain ones).
    let mixed = mix(1 + 4 * n, |z| {
        let full = book.conditional(z, None, &sources, top);
        let mut out = vec![upper(&full, k)];
        for (i, &(p, u, r)) in book.listed.iter().enumerate() {
            if p > 0.0 && p < 1.0 {
                let without = book.conditional(z, Some(i), &sources, top);
                let c = phi_inv(p);
                let x = (c - r.sqrt() * z) / (1.0 - r).sqrt();
                let w = (-0.5 * x * x + 0.5 * c * c).exp() / (1.0 - r).sqrt();
                out.push(w * (upper(&without, k.saturating_sub(u)) - upper(&without, k)));
                out.push(upper(&without, k));
            } else {
                out.extend([0.0, 0.0]);
            }
            out.push(upper(&full, k.saturating_sub(u)));
            out.push(upper(&full, k + u));
        }
        out
    });
    let tail = mixed[0];
    let each = (0..n)
        .map(|i| {
            let (p, _, _) = book.listed[i];
            let (s, t, below, above) = (mixed[1 + 4 * i], mixed[2 + 4 * i], mixed[3 + 4 * i], mixed[4 + 4 * i]);
            if p <= 0.0 {
                (below - tail, tail)
            } else if p >= 1.0 {
                (tail - above, above)
            } else {
                (s, t)
            }
        })
        .collect();
    (tail, each)
}

/// The reference tail P(S >= k) with listed exposure i's probability set to p.
fn reference_tail_at(book: &Book, k: u64, i: usize, p: f64) -> f64 {
    let mut b = book.clone();
    b.listed[i].0 = p;
    let top = k as usize + 1;
    let sources = b.sources_pmf(top);
    mix(1, |z| vec![upper(&b.conditional(z, None, &sources, top), k)])[0]
}

fn within(what: &str, got: &Value, want: f64) {
    let (v, e) = (got["value"].as_f64().unwrap(), got["error_bound"].as_f64().unwrap());
    assert_eq!(got["bound_kind"], "estimated", "{what}: {got}");
    let miss = (v - want).abs();
    assert!(miss <= e + 1e-9 * want.abs() + 1e-14, "{what}: {v} vs {want} (bound {e})");
    // The default tolerance (relative 1e-7) with room: the bound is not the only check. Absolutely, a figure
    // that is exactly 0 (no total of S without i between k - u_i and k - 1) is bracketed on the panels the
    // tails settle, by the band of the largest unit: 3.3e-10 at worst here.
    assert!(miss <= 1e-6 * want.abs() + 1e-9, "{what}: {v} vs {want} (bound {e})");
    assert!(e <= 1e-5 * want.abs() + 1e-9, "{what}: bound {e} too wide for {want}");
}

fn units_book() -> Book {
    // Six vans in units of 100 (tests/units.rs) with their own loadings, one impossible and one certain exposure
    // (loading 0), and a group of three.
    Book {
        listed: vec![
            (0.05, 12, 0.1),
            (0.12, 30, 0.3),
            (0.3, 4, 0.2),
            (0.07, 18, 0.05),
            (0.2, 8, 0.4),
            (0.0, 10, 0.0),
            (1.0, 7, 0.0),
        ],
        group: Some((3, 0.04, 6, 0.2)),
        sources: vec![],
    }
}

fn compound_book() -> Book {
    Book {
        listed: vec![(0.05, 3, 0.3), (0.1, 4, 0.3), (0.02, 9, 0.3)],
        group: Some((20, 0.03, 5, 0.3)),
        sources: vec![(1.5, vec![2, 5], vec![0.6, 0.4])],
    }
}

fn check_contributions(book: &Book, loadings: bool, ks: &[u64]) {
    for &k in ks {
        let got = answer::<Contributions>(json!({
            "portfolio": book.portfolio(loadings), "threshold": k,
            "dependence": {"model": "one_factor_gaussian", "rho": 0.3},
        }));
        let (tail, each) = reference(book, k);
        within(&format!("k={k} tail"), &got["tail_probability"], tail);
        let rows = got["contributions"].as_array().unwrap();
        assert_eq!(rows.len(), book.listed.len(), "k={k}");
        for r in rows {
            let i = r["index"].as_u64().unwrap() as usize;
            let (s, t) = each[i];
            within(&format!("k={k} i={i} sensitivity"), &r["detail"]["sensitivity"], s);
            within(&format!("k={k} i={i} tail without"), &r["detail"]["tail_without"], t);
            let p = book.listed[i].0;
            assert!((r["impact"].as_f64().unwrap() - p * r["sensitivity"].as_f64().unwrap()).abs() <= 1e-300);
        }
    }
}

#[test]
fn contributions_in_units_under_the_factor_match_the_reference_recursion() {
    check_contributions(&units_book(), true, &[13, 40, 62, 100]);
}

#[test]
fn contributions_with_a_compound_source_under_the_factor_match_the_reference_recursion() {
    check_contributions(&compound_book(), false, &[6, 25, 45]);
}

#[test]
fn sensitivities_in_units_are_the_central_differences_of_the_reference_tail() {
    // No derivative formula on the reference side: (T(p + h) - T(p - h)) / 2h of the reference's own tail,
    // h = 1e-4 p (its truncation error is about h^2 T''' / 6, far below 1e-6 relative here; the rounding of the
    // tails, ~1e-16 / h, too).
    for (book, loadings, k) in [(units_book(), true, 40u64), (compound_book(), false, 25)] {
        let got = answer::<Contributions>(json!({
            "portfolio": book.portfolio(loadings), "threshold": k,
            "dependence": {"model": "one_factor_gaussian", "rho": 0.3},
        }));
        for r in got["contributions"].as_array().unwrap() {
            let i = r["index"].as_u64().unwrap() as usize;
            let p = book.listed[i].0;
            if p <= 0.0 || p >= 1.0 {
                continue;
            }
            let h = 1e-4 * p;
            let fd = (reference_tail_at(&book, k, i, p + h) - reference_tail_at(&book, k, i, p - h)) / (2.0 * h);
            let s = r["sensitivity"].as_f64().unwrap();
            assert!((s - fd).abs() <= 1e-6 * fd.abs() + 1e-10, "k={k} i={i}: {s} vs central difference {fd}");
        }
    }
}

#[test]
fn contributions_match_the_mpmath_reference() {
    let text =
        std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/fixtures/reference/factor_contributions.json"))
            .unwrap();
    let doc: Value = serde_json::from_str(&text).unwrap();
    let mut checked = 0;
    for case in doc["cases"].as_array().unwrap() {
        assert!(case["rel_err_estimate"].as_f64().unwrap() < 1e-20, "{case}");
        let source = json!({"rate": case["rate"], "severity": {"kind": "listed", "sizes": case["sizes"],
                            "probabilities": case["probs"]}});
        let portfolio = json!({
            "probabilities": [case["p"]], "units": [case["u"]],
            "groups": [{"size": case["m"], "probability": case["q"], "units": case["v"]}],
            "compound_sources": [source],
        });
        for row in case["rows"].as_array().unwrap() {
            let k = row["k"].as_u64().unwrap();
            let got = answer::<Contributions>(json!({
                "portfolio": portfolio, "threshold": k,
                "dependence": {"model": "one_factor_gaussian", "rho": case["rho"]},
            }));
            let r = &got["contributions"][0];
            assert_eq!(r["index"], 0);
            let f = |key: &str| row[key].as_str().unwrap().parse::<f64>().unwrap();
            within(&format!("{case} k={k} tail"), &got["tail_probability"], f("tail"));
            within(&format!("{case} k={k} sensitivity"), &r["detail"]["sensitivity"], f("sensitivity"));
            within(&format!("{case} k={k} tail without"), &r["detail"]["tail_without"], f("tail_without"));
            checked += 1;
        }
    }
    assert!(checked >= 8, "{checked}");
}

#[test]
fn reverse_stress_with_a_compound_source_under_the_factor_brackets_the_reference_root() {
    let book = compound_book();
    let k = 25u64;
    let level = 0.02;
    // The reference tail with every probability and the sources' rates times f (probability factor).
    let stressed = |f: f64| {
        let mut b = book.clone();
        for e in &mut b.listed {
            e.0 = (e.0 * f).min(1.0);
        }
        if let Some(g) = &mut b.group {
            g.1 = (g.1 * f).min(1.0);
        }
        for s in &mut b.sources {
            s.0 *= f;
        }
        let top = k as usize + 1;
        let sources = b.sources_pmf(top);
        mix(1, |z| vec![upper(&b.conditional(z, None, &sources, top), k)])[0]
    };
    let got = answer::<ReverseStress>(json!({
        "portfolio": book.portfolio(false), "threshold": k, "level": level, "which": "probability_factor",
        "dependence": {"model": "one_factor_gaussian", "rho": 0.3},
    }));
    assert_eq!(got["outcome"], "found", "{got}");
    let (lo, hi) = (got["bracket"]["low"].as_f64().unwrap(), got["bracket"]["high"].as_f64().unwrap());
    assert!(lo < hi && hi / lo - 1.0 <= 1e-2, "{got}");
    let (t_lo, t_hi) = (stressed(lo), stressed(hi));
    assert!(t_lo <= level * (1.0 + 1e-9) && t_hi >= level * (1.0 - 1e-9), "{got}: {t_lo} {t_hi}");
    within("tail at the factor", &got["tail"], stressed(got["factor"].as_f64().unwrap()));

    // rho: the reference tail at the bracket's ends, each exposure's loading the searched rho.
    let at_rho = |rho: f64| {
        let mut b = book.clone();
        for e in &mut b.listed {
            e.2 = rho;
        }
        if let Some(g) = &mut b.group {
            g.3 = rho;
        }
        let top = k as usize + 1;
        let sources = b.sources_pmf(top);
        mix(1, |z| vec![upper(&b.conditional(z, None, &sources, top), k)])[0]
    };
    // P(S >= 25) grows with rho above the mean 8.5: a level between the reference's tails at rho 0 and 0.3.
    let level = 0.5 * (at_rho(0.0) + at_rho(0.3));
    let got = answer::<ReverseStress>(json!({
        "portfolio": book.portfolio(false), "threshold": k, "level": level, "which": "rho",
    }));
    assert_eq!(got["outcome"], "found", "{got}");
    let (lo, hi) = (got["bracket"]["low"].as_f64().unwrap(), got["bracket"]["high"].as_f64().unwrap());
    assert!(lo < hi, "{got}");
    let (t_lo, t_hi) = (at_rho(lo), at_rho(hi));
    assert!(t_lo <= level * (1.0 + 1e-9) && t_hi >= level * (1.0 - 1e-9), "{got}: {t_lo} {t_hi}");
    within("tail at rho", &got["tail"], at_rho(got["factor"].as_f64().unwrap()));
}

#[tokio::test]
async fn the_newly_opened_routes_answer_over_http_and_in_a_batch_and_a_large_book_is_413() {
    let s = start(&[]).await;
    let (factor, units, compound) = mixed_books();
    for portfolio in [&units, &compound] {
        let q = json!({"portfolio": portfolio, "threshold": 40, "dependence": factor});
        let (st, _, body) = s.post_json("/v1/contributions", &q).await;
        assert_eq!(st, 200, "{body}");
        assert_eq!(body["model"]["dependence"]["model"], "one_factor_gaussian", "{body}");
        assert_eq!(
            body["contributions"].as_array().unwrap().len(),
            4.min(body["exposures_ranked"].as_u64().unwrap() as usize)
        );
        let q = json!({"portfolio": portfolio, "threshold": 40, "level": 0.01, "which": "odds_factor",
                       "dependence": factor});
        let (st, _, body) = s.post_json("/v1/reverse-stress", &q).await;
        assert_eq!(st, 200, "{body}");
        assert_eq!(body["model"]["dependence"]["model"], "one_factor_gaussian", "{body}");
        let q = json!({"portfolio": portfolio, "threshold": 40, "level": 0.01, "which": "rho"});
        let (st, _, body) = s.post_json("/v1/reverse-stress", &q).await;
        assert_eq!(st, 200, "{body}");
    }
    // The same questions as batch lines (the batch and `eval` share the analytics).
    let input = [
        json!({"id": 1, "contributions": {"portfolio": compound, "threshold": 40, "dependence": factor}}),
        json!({"id": 2, "reverse_stress": {"portfolio": compound, "threshold": 40, "level": 0.01, "which": "rho"}}),
    ]
    .iter()
    .map(|l| l.to_string() + "\n")
    .collect::<String>();
    let out = common::eval_stdin(&input);
    assert!(out.status.success());
    let text = String::from_utf8(out.stdout).unwrap();
    let lines: Vec<Value> = text.lines().map(|l| serde_json::from_str(l).unwrap()).collect();
    assert_eq!(lines.len(), 2, "{text}");
    assert!(lines[0]["contributions"]["contributions"].is_array(), "{text}");
    assert!(lines[1]["reverse_stress"]["bracket"].is_object(), "{text}");
    // 3000 exposures, each its own (p, units): 3000 exact laws at every node, past the work budget.
    let p: Vec<f64> = (0..3000).map(|i| 0.01 + 1e-6 * i as f64).collect();
    let u: Vec<u64> = (0..3000).map(|i| 1 + i % 10).collect();
    let q = json!({"portfolio": {"probabilities": p, "units": u}, "threshold": 500, "dependence": factor});
    let t = std::time::Instant::now();
    let (st, ct, body) = s.post_json("/v1/contributions", &q).await;
    assert_problem(st, &ct, &body, 413, None);
    // Refused from the budget (no node was evaluated): far below any computation's time on this book.
    assert!(t.elapsed().as_secs() < 30);
    s.shutdown().await.unwrap();
}
