//! POST /v1/quantiles, /v1/distribution and /v1/layers end to end, with stress and dependence, and their
//! problem answers for bad input.

mod common;
use common::{assert_problem, start};
use serde_json::json;

fn portfolio() -> serde_json::Value {
    json!({"probabilities": [0.1, 0.2, 0.3, 0.05, 0.5, 0.01], "groups": [{"size": 40, "probability": 0.02}]})
}

#[tokio::test]
async fn analytics_answer_their_documented_shapes() {
    let s = start(&[]).await;
    let (st, _, v) =
        s.post_json("/v1/quantiles", &json!({"portfolio": portfolio(), "levels": [0.95, 0.99, 0.995]})).await;
    assert_eq!(st, 200, "{v}");
    for q in v["quantiles"].as_array().unwrap() {
        let (at, below) = (q["cdf_at_count"].as_f64().unwrap(), q["cdf_below"].as_f64().unwrap());
        assert!(below < q["level"].as_f64().unwrap() && q["level"].as_f64().unwrap() <= at, "{q}");
    }
    let (st, _, v) = s.post_json("/v1/distribution", &json!({"portfolio": portfolio(), "from": 0, "to": 10})).await;
    assert_eq!(st, 200, "{v}");
    let pmf: f64 = v["pmf"].as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).sum();
    let cdf10 = v["cdf"][10].as_f64().unwrap();
    assert!((pmf - cdf10).abs() < 1e-13 && (cdf10 + v["sf"][10].as_f64().unwrap() - 1.0).abs() < 1e-13);
    let (st, _, v) = s
        .post_json(
            "/v1/layers",
            &json!({"portfolio": portfolio(), "layers": [{"attachment": 3, "limit": 2}], "tail_levels": [0.99],
            "stress": {"probability_factor": 1.5}}),
        )
        .await;
    assert_eq!(st, 200, "{v}");
    let (stressed, base) = (
        v["layers"][0]["expected_count"].as_f64().unwrap(),
        v["base"]["layers"][0]["expected_count"].as_f64().unwrap(),
    );
    assert!(stressed > base, "a stress that raises every probability raises the layer: {stressed} vs {base}");
    assert_eq!(v["model"]["stress"]["probability_factor"], 1.5);
    let (st, _, v) = s
        .post_json("/v1/tail", &json!({"portfolio": portfolio(), "thresholds": [8], "dependence": {"model": "one_factor_gaussian", "rho": 0.3, "nodes": 16}}))
        .await;
    assert_eq!(st, 200, "{v}");
    assert_eq!(v["model"]["dependence"]["model"], "one_factor_gaussian");
    assert_eq!(v["results"][0]["estimates"][0]["bound_kind"], "estimated");
    // Every route that takes a dependence model answers under it.
    let dep = json!({"model": "one_factor_gaussian", "rho": 0.2, "tolerance": {"relative": 1e-8}});
    for (path, extra) in [
        ("/v1/quantiles", json!({"levels": [0.5, 0.99]})),
        ("/v1/distribution", json!({"from": 0, "to": 12})),
        ("/v1/layers", json!({"layers": [{"attachment": 3, "limit": 2}], "tail_levels": [0.99]})),
    ] {
        let mut body = extra;
        body["portfolio"] = portfolio();
        body["dependence"] = dep.clone();
        let (st, _, v) = s.post_json(path, &body).await;
        assert_eq!(st, 200, "{path}: {v}");
        assert_eq!(v["model"]["dependence"]["tolerance"]["relative"], 1e-8, "{path}");
    }
    s.shutdown().await.unwrap();
}

#[tokio::test]
async fn distribution_speaks_csv_when_asked() {
    let s = start(&[]).await;
    let c = reqwest::Client::new();
    let r = c
        .post(format!("{}/v1/distribution", s.base))
        .header("accept", "text/csv")
        .json(&json!({"portfolio": portfolio(), "mass": 1e-9}))
        .send()
        .await
        .unwrap();
    assert_eq!(r.status(), 200);
    assert!(r.headers()["content-type"].to_str().unwrap().starts_with("text/csv"));
    let text = r.text().await.unwrap();
    // The cautions first, as `# ` comment lines, then the table.
    let comments: Vec<&str> = text.lines().take_while(|l| l.starts_with("# ")).collect();
    assert!(comments.iter().any(|l| l.contains("not the uncertainty of the input probabilities")), "{comments:?}");
    assert!(comments.iter().any(|l| l.contains("qualified actuary")), "{comments:?}");
    let mut lines = text.lines().skip(comments.len());
    assert_eq!(lines.next().unwrap(), "count,pmf,cdf,sf,ln_pmf,ln_cdf,ln_sf,pmf_error_bound");
    let rows: Vec<Vec<&str>> = lines.map(|l| l.split(',').collect()).collect();
    assert!(rows.len() > 5 && rows.iter().all(|r| r.len() == 8));
    s.shutdown().await.unwrap();
}

#[tokio::test]
async fn bad_analytics_input_points_at_the_field() {
    let s = start(&["--max-thresholds", "50"]).await;
    let cases = [
        ("/v1/quantiles", json!({"portfolio": portfolio(), "levels": [0.5, 1.0]}), 422, "/levels/1"),
        (
            "/v1/quantiles",
            json!({"portfolio": portfolio(), "levels": [0.5], "stress": {"odds_factor": -1.0}}),
            422,
            "/stress/odds_factor",
        ),
        (
            "/v1/quantiles",
            json!({"portfolio": portfolio(), "levels": [0.5], "dependence": {"model": "one_factor_gaussian", "rho": 1.0}}),
            422,
            "/dependence/rho",
        ),
        (
            "/v1/quantiles",
            json!({"portfolio": portfolio(), "levels": [0.5], "dependence": {"model": "one_factor_gaussian", "rho": 0.1, "tolerance": {"relative": -1.0}}}),
            422,
            "/dependence/tolerance/relative",
        ),
        (
            "/v1/quantiles",
            json!({"portfolio": {"probabilities": [0.1, 0.2], "loadings": [0.1, 1.5]}, "levels": [0.5], "dependence": {"model": "one_factor_gaussian", "rho": 0.1}}),
            422,
            "/portfolio/loadings/1",
        ),
        (
            "/v1/quantiles",
            json!({"portfolio": {"probabilities": [0.1, 0.2], "loadings": [0.1]}, "levels": [0.5], "dependence": {"model": "one_factor_gaussian", "rho": 0.1}}),
            422,
            "/portfolio/loadings",
        ),
        (
            "/v1/quantiles",
            json!({"portfolio": {"groups": [{"size": 10, "probability": 0.1, "loading": -0.1}]}, "levels": [0.5], "dependence": {"model": "one_factor_gaussian", "rho": 0.1}}),
            422,
            "/portfolio/groups/0/loading",
        ),
        ("/v1/distribution", json!({"portfolio": portfolio(), "from": 5, "to": 2}), 422, "/to"),
        ("/v1/distribution", json!({"portfolio": portfolio(), "from": 0, "to": 1000}), 422, "/to"),
        ("/v1/distribution", json!({"portfolio": portfolio(), "mass": 0.0}), 422, "/mass"),
        ("/v1/distribution", json!({"portfolio": portfolio(), "from": 3}), 422, "/to"),
        (
            "/v1/layers",
            json!({"portfolio": portfolio(), "layers": [{"attachment": 1, "limit": 2}], "tail_levels": [-0.5]}),
            422,
            "/tail_levels/0",
        ),
        (
            "/v1/layers",
            json!({"portfolio": {"probabilities": [0.5, 2.0]}, "layers": [{"attachment": 1}]}),
            422,
            "/portfolio/probabilities/1",
        ),
        ("/v1/layers", json!({"portfolio": portfolio()}), 422, "/layers"),
    ];
    for (path, body, want, pointer) in cases {
        let (st, ct, v) = s.post_json(path, &body).await;
        assert_problem(st, &ct, &v, want, Some(pointer));
    }
    s.shutdown().await.unwrap();
}

#[tokio::test]
async fn contributions_rank_every_exposure_and_answer_under_dependence() {
    let s = start(&[]).await;
    let body = json!({"portfolio": {"probabilities": [0.1, 0.0, 0.3, 1.0, 0.05], "families": [{"kind": "constant", "n": 3, "probability": 0.2}]},
        "threshold": 3, "rank_by": "impact"});
    let (st, _, v) = s.post_json("/v1/contributions", &body).await;
    assert_eq!(st, 200, "{v}");
    let rows = v["contributions"].as_array().unwrap();
    assert_eq!(rows.len(), 8);
    assert_eq!(v["exposures_ranked"], 8);
    let tail = v["tail_probability"]["value"].as_f64().unwrap();
    let mut last = f64::INFINITY;
    let mut seen = [false; 8];
    for r in rows {
        let impact = r["impact"].as_f64().unwrap();
        assert!(impact <= last, "ranked by impact");
        last = impact;
        seen[r["index"].as_u64().unwrap() as usize] = true;
        // P(S >= k) = P(S_-i >= k) + p_i P(S_-i = k - 1), for every exposure, certain and impossible ones too.
        let (p, sens, without) = (
            r["probability"].as_f64().unwrap(),
            r["sensitivity"].as_f64().unwrap(),
            r["tail_without"].as_f64().unwrap(),
        );
        assert!((without + p * sens - tail).abs() < 1e-13, "{r}");
    }
    assert!(seen.iter().all(|&x| x), "every index appears once");
    let (st, _, v) = s
        .post_json("/v1/contributions", &json!({"portfolio": {"probabilities": [0.1, 0.2]}, "threshold": 1, "top": 1}))
        .await;
    assert_eq!(st, 200);
    assert_eq!(v["contributions"].as_array().unwrap().len(), 1);
    // Under the factor: every exposure ranked, estimated bounds, and a deprecated `nodes` still accepted.
    let (st, _, v) = s
        .post_json(
            "/v1/contributions",
            &json!({"portfolio": {"probabilities": [0.1, 0.0, 0.3, 1.0], "loadings": [0.2, 0.2, 0.05, 0.3]}, "threshold": 2,
            "dependence": {"model": "one_factor_gaussian", "rho": 0.2, "nodes": 64}}),
        )
        .await;
    assert_eq!(st, 200, "{v}");
    assert_eq!(v["exposures_ranked"], 4);
    assert_eq!(v["tail_probability"]["bound_kind"], "estimated");
    assert!(v["model"]["nodes_evaluated"][0].as_u64().unwrap() > 0, "{v}");
    for r in v["contributions"].as_array().unwrap() {
        assert!(
            r["sensitivity"].as_f64().unwrap() >= 0.0 && r["detail"]["sensitivity"]["bound_kind"] == "estimated",
            "{r}"
        );
    }
    s.shutdown().await.unwrap();
}

/// Found by the contract check (Schemathesis): a probability factor kept a certain exposure certain in the
/// model but not in the listed probabilities, so the rows and the model disagreed and the route panicked; and
/// under a factor near 1 the sensitivities' bounds were infinite (serialised as null where the schema says a
/// number). Both now answer 200 with finite bounds, and a certain exposure stays certain under any factor.
#[tokio::test]
async fn contributions_survive_extreme_stress_and_a_factor_near_one() {
    let s = start(&[]).await;
    let body = json!({"portfolio": {"families": [{"kind": "harmonic", "n": 3000}]}, "threshold": 5,
        "stress": {"probability_factor": 1e-107}, "top": 3});
    let (st, _, v) = s.post_json("/v1/contributions", &body).await;
    assert_eq!(st, 200, "{v}");
    // Exposure 0 has p = 1 (harmonic: 1/1): still certain, so the stressed count is at least 1.
    let rows = v["contributions"].as_array().unwrap();
    assert_eq!(rows.len(), 3);
    let body = json!({"dependence": {"model": "one_factor_gaussian", "rho": 0.999},
        "portfolio": {"probabilities": [0.01, 0.02, 0.15, 0.3]}, "threshold": 2});
    let (st, _, v) = s.post_json("/v1/contributions", &body).await;
    assert_eq!(st, 200, "{v}");
    for r in v["contributions"].as_array().unwrap() {
        for fig in ["sensitivity", "tail_without"] {
            let d = &r["detail"][fig];
            let (value, bound) = (d["value"].as_f64().unwrap(), d["error_bound"].as_f64());
            assert!(bound.is_some_and(f64::is_finite), "{fig} bound must be a number: {r}");
            // dP/dp_i = E[P(S_-i = k - 1 | Z) dp_i(Z)/dp_i] and the weight integrates to 1: within [0, 1].
            assert!((0.0..=1.0).contains(&value), "{r}");
        }
    }
    s.shutdown().await.unwrap();
}
