//! Losses in units end to end: the tail in units over HTTP (against enumeration of the book in exact
//! rationals), a CSV table's units column, and the problems: bad units at their pointers, questions and
//! methods that do not yet take units (422 at the field), a lattice over the work budget (413 that says how
//! much coarser a unit would fit); the other questions in units over HTTP (layers' stop-loss premiums, the
//! distribution as JSON and CSV, quantiles, the chart's SVG), a batch line and `eval`, and a distribution over
//! a lattice too wide for the work budget (413 before anything is allocated);
//! every method of the tail on a lumpy book against fixtures/reference/make_units_methods.py (mpmath
//! formulas, exact rationals).

mod common;
use common::{assert_problem, start};
use num_rational::BigRational;
use num_traits::{One, ToPrimitive, Zero};
use serde_json::json;

const BOUNDARY: &str = "tailtally-units-5b21";

/// An invented book of six delivery vans insured for repair costs in units of 100 (the sum each claim pays).
const P: [f64; 6] = [0.05, 0.12, 0.3, 0.07, 0.2, 0.01];
const U: [u64; 6] = [12, 30, 4, 18, 8, 250];

/// P(S >= k) by enumeration of the 2^6 outcomes in exact rationals.
fn upper(k: u64) -> f64 {
    let mut acc = BigRational::zero();
    for mask in 0u32..64 {
        let (mut s, mut pr) = (0u64, BigRational::one());
        for i in 0..6 {
            let p = BigRational::from_float(P[i]).unwrap();
            if mask >> i & 1 == 1 {
                s += U[i];
                pr *= p;
            } else {
                pr *= BigRational::one() - p;
            }
        }
        if s >= k {
            acc += pr;
        }
    }
    acc.to_f64().unwrap()
}

#[tokio::test]
async fn the_tail_in_units_matches_enumeration_and_bad_requests_get_problems() {
    let s = start(&[]).await;
    let portfolio = json!({"probabilities": P, "units": U});
    let ks = [0u64, 1, 13, 30, 50, 250, 300, 322, 323];
    let q = json!({"portfolio": portfolio, "thresholds": ks, "methods": ["exact", "normal"]});
    let (st, ct, body) = s.post_json("/v1/tail", &q).await;
    assert_eq!((st, ct.as_str()), (200, "application/json"), "{body}");
    for (r, &k) in body["results"].as_array().unwrap().iter().zip(&ks) {
        assert_eq!(r["threshold"], k);
        let e = &r["estimates"][0];
        let (got, truth) = (e["probability"].as_f64().unwrap(), upper(k));
        assert!((got - truth).abs() <= e["error_bound"].as_f64().unwrap().max(1e-300), "k={k}: {got} vs {truth}");
        assert!((got - truth).abs() <= 1e-13 * truth, "k={k}: {got} vs {truth}");
        // The normal approximation in units: its Berry-Esseen bound (rigorous) covers the truth.
        let n = &r["estimates"][1];
        assert_eq!(n["method"], "normal");
        let miss = (n["probability"].as_f64().unwrap() - truth).abs();
        assert!(miss <= n["error_bound"].as_f64().unwrap(), "k={k}: normal misses by {miss}: {n}");
    }
    // The summary is in units: mean sum u_i p_i, largest total sum u_i.
    let mean: f64 = P.iter().zip(U).map(|(p, u)| p * u as f64).sum();
    assert!((body["summary"]["mean"].as_f64().unwrap() - mean).abs() < 1e-12 * mean, "{}", body["summary"]);
    assert_eq!(body["summary"]["support_max"], 322);

    // Bad units, at their pointers.
    let bad = json!({"portfolio": {"probabilities": [0.1, 0.2], "units": [0, 3],
        "groups": [{"size": 3, "probability": 0.1, "units": 2000000000u64}]}, "thresholds": [1]});
    let (st, ct, body) = s.post_json("/v1/tail", &bad).await;
    assert_problem(st, &ct, &body, 422, Some("/portfolio/units/0"));
    assert_problem(st, &ct, &body, 422, Some("/portfolio/groups/0/units"));
    let (st, ct, body) = s
        .post_json("/v1/tail", &json!({"portfolio": {"probabilities": [0.1], "units": [1, 2]}, "thresholds": [1]}))
        .await;
    assert_problem(st, &ct, &body, 422, Some("/portfolio/units"));

    // What does not take units yet says so at the field.
    let source = json!({"rate": 2.0, "severity": {"kind": "listed", "sizes": [3, 5], "probabilities": [0.5, 0.5]}});
    let q =
        json!({"portfolio": {"compound_sources": [source]}, "thresholds": [5], "methods": ["exact", "saddlepoint"]});
    let (st, _, body) = s.post_json("/v1/tail", &q).await;
    // Compound sources now take every method (their estimated bounds measured: tests/units_methods.rs).
    assert_eq!(st, 200, "{body}");
    // Contributions under the factor model take units too (tests/factor_contributions.rs checks their values).
    let factor = json!({"model": "one_factor_gaussian", "rho": 0.2});
    let q = json!({"portfolio": portfolio, "threshold": 5, "dependence": factor});
    let (st, _, body) = s.post_json("/v1/contributions", &q).await;
    assert_eq!(st, 200, "{body}");
    s.shutdown().await.unwrap();
}

#[tokio::test]
async fn a_lattice_over_the_budget_is_413_naming_a_coarser_unit() {
    let s = start(&["--max-work", "100000"]).await;
    // 100 exposures of a million units each, but not a common multiple: a lattice 10^8 steps wide.
    let units: Vec<u64> = (0..100).map(|i| 1_000_000 + i).collect();
    let q = json!({"portfolio": {"probabilities": vec![0.01; 100], "units": units}, "thresholds": [5_000_000]});
    let (st, ct, body) = s.post_json("/v1/tail", &q).await;
    assert_problem(st, &ct, &body, 413, None);
    let detail = body["detail"].as_str().unwrap();
    assert!(detail.contains("times coarser"), "{detail}");
    s.shutdown().await.unwrap();
}

#[tokio::test]
async fn a_csv_units_column_answers_as_the_json_form() {
    let s = start(&[]).await;
    let mut csv = String::from("id,probability,units\n");
    for (i, (p, u)) in P.iter().zip(U).enumerate() {
        csv.push_str(&format!("V-{i},{p},{u}\n"));
    }
    let request = json!({"portfolio": {}, "thresholds": [13, 50]});
    let mut body = Vec::new();
    for (name, ct, data) in [("request", "application/json", request.to_string()), ("exposures", "text/csv", csv)] {
        body.extend_from_slice(
            format!("--{BOUNDARY}\r\nContent-Disposition: form-data; name=\"{name}\"\r\nContent-Type: {ct}\r\n\r\n{data}\r\n")
                .as_bytes(),
        );
    }
    body.extend_from_slice(format!("--{BOUNDARY}--\r\n").as_bytes());
    let (st, _, got) = s.post_raw("/v1/tail", &format!("multipart/form-data; boundary={BOUNDARY}"), body).await;
    assert_eq!(st, 200, "{got}");
    let (_, _, want) =
        s.post_json("/v1/tail", &json!({"portfolio": {"probabilities": P, "units": U}, "thresholds": [13, 50]})).await;
    for i in 0..2 {
        assert_eq!(got["results"][i]["estimates"][0]["probability"], want["results"][i]["estimates"][0]["probability"]);
    }
    // A bad units cell points at its row and column.
    let bad = "probability,units\n0.1,3\n0.2,2.5\n";
    let mut body = Vec::new();
    for (name, ct, data) in
        [("request", "application/json", request.to_string()), ("exposures", "text/csv", bad.into())]
    {
        body.extend_from_slice(
            format!("--{BOUNDARY}\r\nContent-Disposition: form-data; name=\"{name}\"\r\nContent-Type: {ct}\r\n\r\n{data}\r\n")
                .as_bytes(),
        );
    }
    body.extend_from_slice(format!("--{BOUNDARY}--\r\n").as_bytes());
    let (st, ct, got) = s.post_raw("/v1/tail", &format!("multipart/form-data; boundary={BOUNDARY}"), body).await;
    assert_problem(st, &ct, &got, 422, Some("/exposures/1/units"));
    s.shutdown().await.unwrap();
}

#[tokio::test]
async fn a_batch_line_in_units_answers_as_the_route_does() {
    let s = start(&[]).await;
    let tail = json!({"portfolio": {"probabilities": P, "units": U}, "thresholds": [13, 50]});
    let body = format!(
        "{}\n{}\n",
        json!({"id": "units", "tail": tail}),
        json!({"id": "factor", "contributions": {"portfolio": {"probabilities": P, "units": U}, "threshold": 10,
            "dependence": {"model": "one_factor_gaussian", "rho": 0.2}}})
    );
    let res = s
        .client
        .post(format!("{}/v1/batch", s.base))
        .header("content-type", "application/x-ndjson")
        .body(body)
        .send()
        .await
        .unwrap();
    assert_eq!(res.status().as_u16(), 200);
    let text = res.text().await.unwrap();
    let lines: Vec<serde_json::Value> = text.lines().map(|l| serde_json::from_str(l).unwrap()).collect();
    let (_, _, want) = s.post_json("/v1/tail", &tail).await;
    for i in 0..2 {
        let got = &lines[0]["tail"]["results"][i]["estimates"][0]["probability"];
        assert_eq!(got, &want["results"][i]["estimates"][0]["probability"], "{text}");
    }
    // Contributions under the factor in units answer in a batch line too (tests/factor_contributions.rs checks
    // their values).
    assert_eq!(lines[1]["id"], "factor", "{text}");
    assert_eq!(lines[1]["contributions"]["contributions"].as_array().map(|a| a.len()), Some(P.len()), "{text}");
    s.shutdown().await.unwrap();
}

/// E[min((S - a)+, l)] and P(S = s) by enumeration of the 2^6 outcomes in exact rationals.
fn pmf() -> Vec<BigRational> {
    let top: u64 = U.iter().sum();
    let mut f = vec![BigRational::zero(); top as usize + 1];
    for mask in 0u32..64 {
        let (mut s, mut pr) = (0usize, BigRational::one());
        for i in 0..6 {
            let p = BigRational::from_float(P[i]).unwrap();
            if mask >> i & 1 == 1 {
                s += U[i] as usize;
                pr *= p;
            } else {
                pr *= BigRational::one() - p;
            }
        }
        f[s] += pr;
    }
    f
}

fn layer(a: u64, l: Option<u64>) -> f64 {
    let mut acc = BigRational::zero();
    for (s, p) in pmf().iter().enumerate().skip(a as usize + 1) {
        let x = l.map_or(s as u64 - a, |l| (s as u64 - a).min(l));
        acc += p * BigRational::from_integer((x as i64).into());
    }
    acc.to_f64().unwrap()
}

#[tokio::test]
async fn the_other_questions_answer_in_units_over_http() {
    let s = start(&[]).await;
    // The enumeration's book (span 2: every unit is even) doubled, plus a certain 3: the lattice 3 + 4 j.
    let (p2, u2): (Vec<f64>, Vec<u64>) =
        (P.iter().copied().chain([1.0]).collect(), U.iter().map(|u| 2 * u).chain([3]).collect());
    let doubled = json!({"probabilities": p2, "units": u2});
    let portfolio = json!({"probabilities": P, "units": U});
    // Layers: the stop-loss premium at a few attachments, by enumeration.
    let q = json!({"portfolio": portfolio, "layers": [{"attachment": 13}, {"attachment": 20, "limit": 30}]});
    let (st, _, body) = s.post_json("/v1/layers", &q).await;
    assert_eq!(st, 200, "{body}");
    for (r, want) in body["layers"].as_array().unwrap().iter().zip([layer(13, None), layer(20, Some(30))]) {
        let got = r["expected_count"].as_f64().unwrap();
        assert!((got - want).abs() <= 1e-13 * want, "{r}: want {want}");
    }
    // The same book doubled plus 3: every premium in units doubles (attachment 2a + 3).
    let q = json!({"portfolio": doubled, "layers": [{"attachment": 29}], "tail_levels": [0.9]});
    let (st, _, body) = s.post_json("/v1/layers", &q).await;
    assert_eq!(st, 200, "{body}");
    let got = body["layers"][0]["expected_count"].as_f64().unwrap();
    assert!((got - 2.0 * layer(13, None)).abs() <= 1e-13 * got, "{body}");
    assert_eq!(body["tail_expectations"][0]["quantile"].as_u64().unwrap() % 2, 1, "{body}");
    // The distribution: rows at the lattice points only, `step` apart, as JSON and as CSV.
    let q = json!({"portfolio": doubled, "from": 0, "to": 60});
    let (st, _, body) = s.post_json("/v1/distribution", &q).await;
    assert_eq!(st, 200, "{body}");
    assert_eq!((body["from"].as_u64(), body["to"].as_u64(), body["step"].as_u64()), (Some(3), Some(59), Some(4)));
    let f = pmf();
    for (i, v) in body["pmf"].as_array().unwrap().iter().enumerate() {
        // Total 3 + 4 i is the enumeration's total 2 i.
        let want = f.get(2 * i).map_or(0.0, |x| x.to_f64().unwrap());
        assert!((v.as_f64().unwrap() - want).abs() <= 1e-13 * want, "row {i}: {v} vs {want}");
    }
    let res = s
        .client
        .post(format!("{}/v1/distribution", s.base))
        .header("accept", "text/csv")
        .json(&q)
        .send()
        .await
        .unwrap();
    assert_eq!(res.status().as_u16(), 200);
    let csv = res.text().await.unwrap();
    assert!(csv.starts_with("# "), "the caution lines stay");
    let rows: Vec<&str> = csv.lines().filter(|l| !l.starts_with('#')).collect();
    assert!(rows[0].starts_with("total,pmf,"), "{}", rows[0]);
    assert!(rows[1].starts_with("3,") && rows[2].starts_with("7,") && rows.last().unwrap().starts_with("59,"), "{csv}");
    // Quantiles in units: a lattice point.
    let (st, _, body) = s.post_json("/v1/quantiles", &json!({"portfolio": doubled, "levels": [0.5, 0.99]})).await;
    assert_eq!(st, 200, "{body}");
    for q in body["quantiles"].as_array().unwrap() {
        assert_eq!(q["count"].as_u64().unwrap() % 2, 1, "{q}");
    }
    // The chart: its axis says units.
    let res = s
        .client
        .post(format!("{}/v1/chart", s.base))
        .json(&json!({"portfolio": doubled, "threshold": 30}))
        .send()
        .await
        .unwrap();
    assert_eq!(res.status().as_u16(), 200);
    let svg = res.text().await.unwrap();
    assert!(svg.contains("total loss k, in units") && svg.contains("lattice points 4 units apart"), "{svg}");
    // A range with no lattice point, at the field.
    let (st, ct, body) = s.post_json("/v1/distribution", &json!({"portfolio": doubled, "from": 4, "to": 4})).await;
    assert_problem(st, &ct, &body, 422, Some("/to"));
    s.shutdown().await.unwrap();
}

#[tokio::test]
async fn a_layers_batch_line_and_eval_answer_in_units_as_the_route() {
    let s = start(&[]).await;
    let layers = json!({"portfolio": {"probabilities": P, "units": U}, "layers": [{"attachment": 13, "limit": 40}]});
    let input = format!("{}\n", json!({"id": "l", "layers": layers}));
    let res = s
        .client
        .post(format!("{}/v1/batch", s.base))
        .header("content-type", "application/x-ndjson")
        .body(input.clone())
        .send()
        .await
        .unwrap();
    let text = res.text().await.unwrap();
    let line: serde_json::Value = serde_json::from_str(text.lines().next().unwrap()).unwrap();
    let (_, _, want) = s.post_json("/v1/layers", &layers).await;
    assert_eq!(line["layers"]["layers"], want["layers"], "{text}");
    let truth = layer(13, Some(40));
    assert!((want["layers"][0]["expected_count"].as_f64().unwrap() - truth).abs() <= 1e-13 * truth);
    // `eval` on standard input: the same line.
    let out = common::eval_stdin(&input);
    assert!(out.status.success());
    let cli: serde_json::Value =
        serde_json::from_str(String::from_utf8(out.stdout).unwrap().lines().next().unwrap()).unwrap();
    assert_eq!(cli["layers"]["layers"], want["layers"]);
    s.shutdown().await.unwrap();
}

#[tokio::test]
async fn a_distribution_over_a_wide_lattice_is_413_before_allocating() {
    let s = start(&["--max-work", "100000"]).await;
    // 100 exposures of about a million units each with no common factor: a lattice 10^8 points wide.
    let units: Vec<u64> = (0..100).map(|i| 1_000_000 + i).collect();
    let portfolio = json!({"probabilities": vec![0.01; 100], "units": units});
    for q in [json!({"portfolio": portfolio}), json!({"portfolio": portfolio, "from": 0, "to": 1000})] {
        let (st, ct, body) = s.post_json("/v1/distribution", &q).await;
        assert_problem(st, &ct, &body, 413, None);
    }
    let (st, ct, body) = s.post_json("/v1/quantiles", &json!({"portfolio": portfolio, "levels": [0.5]})).await;
    assert_problem(st, &ct, &body, 413, None);
    let (st, ct, body) =
        s.post_json("/v1/layers", &json!({"portfolio": portfolio, "layers": [{"attachment": 5}]})).await;
    assert_problem(st, &ct, &body, 413, None);
    let (st, ct, body) = s.post_json("/v1/chart", &json!({"portfolio": portfolio, "threshold": 5})).await;
    assert_problem(st, &ct, &body, 413, None);
    s.shutdown().await.unwrap();
}

/// The lumpy book of fixtures/reference/make_units_methods.py (mpmath at 50 digits; the exact tails in exact
/// rationals) as a request, and the reference rows.
fn reference_book() -> (serde_json::Value, Vec<serde_json::Value>) {
    let r: serde_json::Value =
        serde_json::from_str(include_str!("../fixtures/reference/units_methods.json")).expect("reference");
    let portfolio = json!({"probabilities": r["probabilities"], "units": r["units"], "groups": [r["group"]]});
    (portfolio, r["rows"].as_array().unwrap().clone())
}

/// One method on the reference book over HTTP: for every threshold, (its estimate, its reference row).
async fn tail_in_units(method: &str) -> Vec<(serde_json::Value, serde_json::Value)> {
    let s = start(&[]).await;
    let (portfolio, rows) = reference_book();
    let ks: Vec<u64> = rows.iter().map(|r| r["threshold"].as_u64().unwrap()).collect();
    let (st, _, body) =
        s.post_json("/v1/tail", &json!({"portfolio": portfolio, "thresholds": ks, "methods": [method]})).await;
    assert_eq!(st, 200, "{body}");
    s.shutdown().await.unwrap();
    body["results"].as_array().unwrap().iter().map(|r| r["estimates"][0].clone()).zip(rows).collect()
}

/// The estimate is the reference formula's value (to `rel`, plus 1e-15 absolutely) and its bound, of the kind
/// given, covers the distance to the exact tail.
fn check_against_reference(method: &str, got: &[(serde_json::Value, serde_json::Value)], rel: f64, kind: &str) {
    for (e, row) in got {
        let (p, bound) = (e["probability"].as_f64().unwrap(), e["error_bound"].as_f64().unwrap());
        assert_eq!(e["method"], method);
        assert_eq!(e["bound_kind"], kind, "{e}");
        let want = row[method].as_f64().unwrap();
        assert!((p - want).abs() <= rel * want + 1e-15, "{method} at {}: {p} vs {want}", row["threshold"]);
        let miss = (p - row["exact"].as_f64().unwrap()).abs();
        assert!(miss <= bound, "{method} at {}: off the exact tail by {miss:e}, bound {bound:e}", row["threshold"]);
    }
}

#[tokio::test]
async fn exact_in_units_matches_exact_rationals() {
    let got = tail_in_units("exact").await;
    check_against_reference("exact", &got, 1e-13, "rigorous");
}

#[tokio::test]
async fn normal_in_units_is_the_continuity_corrected_normal_law() {
    let got = tail_in_units("normal").await;
    check_against_reference("normal", &got, 1e-12, "rigorous");
}

#[tokio::test]
async fn edgeworth_in_units_is_the_one_term_expansion() {
    let got = tail_in_units("edgeworth").await;
    check_against_reference("edgeworth", &got, 1e-9, "estimated");
}

#[tokio::test]
async fn saddlepoint_in_units_is_lugannani_rice_with_daniels_correction() {
    let got = tail_in_units("saddlepoint").await;
    check_against_reference("saddlepoint", &got, 1e-9, "estimated");
    // The Chernoff bound comes along and lies above the exact tail.
    for (e, row) in &got {
        assert!(e["chernoff_ln_bound"].as_f64().unwrap() >= row["exact"].as_f64().unwrap().ln(), "{e}");
    }
}

#[tokio::test]
async fn auto_in_units_meets_its_tolerance_with_normal_or_exact() {
    let got = tail_in_units("auto").await;
    for (e, row) in &got {
        let exact = row["exact"].as_f64().unwrap();
        // The default tolerance: 1e-3 relative.
        assert!((e["probability"].as_f64().unwrap() - exact).abs() <= 1e-3 * exact, "{e}");
        let checked: Vec<&str> =
            e["selection"]["checked"].as_array().unwrap().iter().map(|c| c["method"].as_str().unwrap()).collect();
        assert_eq!(checked, ["normal", "exact"], "{e}");
    }
}

/// The reference book beside a compound source over HTTP: Edgeworth and the saddlepoint answer (their bounds
/// estimated, measured on books with compound sources in tests/units_methods.rs) and each bound covers the
/// distance to the exact method's value (its own rigorous bound allowed for).
#[tokio::test]
async fn edgeworth_and_saddlepoint_with_compound_sources_cover_exact() {
    let s = start(&[]).await;
    let (mut portfolio, _) = reference_book();
    portfolio["compound_sources"] =
        json!([{"rate": 0.5, "severity": {"kind": "listed", "sizes": [2, 4], "probabilities": [0.75, 0.25]}}]);
    let q = json!({"portfolio": portfolio, "thresholds": [20, 40, 80, 140, 260],
        "methods": ["exact", "edgeworth", "saddlepoint"]});
    let (st, _, body) = s.post_json("/v1/tail", &q).await;
    assert_eq!(st, 200, "{body}");
    for res in body["results"].as_array().unwrap() {
        let est = res["estimates"].as_array().unwrap();
        let x = &est[0];
        let (exact, exact_bound) = (x["probability"].as_f64().unwrap(), x["error_bound"].as_f64().unwrap());
        for e in &est[1..] {
            assert_eq!(e["bound_kind"], "estimated", "{e}");
            let err = (e["probability"].as_f64().unwrap() - exact).abs();
            assert!(
                err <= e["error_bound"].as_f64().unwrap() + exact_bound,
                "{} off exact {exact}: {e}",
                res["threshold"]
            );
        }
    }
    s.shutdown().await.unwrap();
}
