//! POST /v1/chart end to end: the SVG is well-formed XML (by roxmltree) with its axes, labels and shaded tail,
//! its title states the exact tail, the same request gives the same bytes, bad input gets problem details.

mod common;
use common::{assert_problem, start};
use serde_json::{json, Value};

/// One element of a parsed document: its name, namespace and attributes, and the text directly inside it.
#[derive(Debug)]
struct Element {
    name: String,
    namespace: Option<String>,
    attrs: Vec<(String, String)>,
    text: String,
}

impl Element {
    fn attr(&self, k: &str) -> Option<&str> {
        self.attrs.iter().find(|(a, _)| a == k).map(|(_, v)| v.as_str())
    }
}

/// Parse the document with roxmltree (which refuses what is not well-formed XML) into its elements in
/// document order.
fn parse_xml(doc: &str) -> Result<Vec<Element>, String> {
    let d = roxmltree::Document::parse(doc).map_err(|e| e.to_string())?;
    Ok(d.descendants()
        .filter(|n| n.is_element())
        .map(|n| Element {
            name: n.tag_name().name().to_string(),
            namespace: n.tag_name().namespace().map(str::to_string),
            attrs: n.attributes().map(|a| (a.name().to_string(), a.value().to_string())).collect(),
            text: n.children().filter(|c| c.is_text()).filter_map(|c| c.text()).collect(),
        })
        .collect())
}

#[test]
fn the_xml_check_rejects_what_is_not_well_formed() {
    assert!(parse_xml("<a x=\"1\"><b/>t &amp; u</a>").is_ok());
    for bad in ["<a><b></a></b>", "<a x=1/>", "<a>&nope;</a>", "<a></a><b/>", "<a x=\"1\" x=\"2\"/>", "<a>", "text<a/>"]
    {
        assert!(parse_xml(bad).is_err(), "accepted {bad}");
    }
}

fn demo_chart(threshold: u64, log_scale: bool) -> Value {
    let mut body: Value = serde_json::from_str(&std::fs::read_to_string("fixtures/demo-tail.json").unwrap()).unwrap();
    let portfolio = body["portfolio"].take();
    json!({"portfolio": portfolio, "threshold": threshold, "side": "upper",
           "methods": ["normal", "poisson", "saddlepoint"], "log_scale": log_scale, "width": 900, "height": 480})
}

async fn post_svg(s: &common::Server, body: &Value) -> (u16, String, String) {
    let res = s.client.post(format!("{}/v1/chart", s.base)).json(body).send().await.expect("request");
    let status = res.status().as_u16();
    let ct = res.headers().get("content-type").map(|v| v.to_str().unwrap().to_string()).unwrap_or_default();
    (status, ct, res.text().await.unwrap())
}

fn by_class<'a>(els: &'a [Element], class: &str) -> Vec<&'a Element> {
    els.iter().filter(|e| e.attr("class").is_some_and(|c| c.split(' ').any(|x| x == class))).collect()
}

#[tokio::test]
async fn chart_is_well_formed_svg_with_axes_and_shaded_tail() {
    let s = start(&[]).await;
    for log_scale in [false, true] {
        let (status, ct, svg) = post_svg(&s, &demo_chart(110, log_scale)).await;
        assert_eq!(status, 200, "{svg}");
        assert_eq!(ct, "image/svg+xml");
        let els = parse_xml(&svg).unwrap_or_else(|e| panic!("not well-formed: {e}\n{svg}"));
        assert_eq!(els[0].name, "svg");
        assert_eq!(els[0].namespace.as_deref(), Some("http://www.w3.org/2000/svg"));
        assert_eq!((els[0].attr("width"), els[0].attr("height")), (Some("900"), Some("480")));
        let texts: Vec<&str> = els.iter().filter(|e| e.name == "text").map(|e| e.text.as_str()).collect();
        assert!(texts.contains(&"number of events k"), "{texts:?}");
        assert!(
            texts.iter().any(|t| t.contains("not the inputs' uncertainty") && t.contains("expert judgement")),
            "{texts:?}"
        );
        let ylab = if log_scale { "P(S = k), log scale" } else { "P(S = k)" };
        assert!(texts.contains(&ylab), "{texts:?}");
        assert!(els.iter().any(|e| e.name == "title" && e.text.starts_with("P(S \u{2265} 110) = ")));
        let region = by_class(&els, "tail-region");
        assert_eq!(region.len(), 1);
        assert!(region[0].attr("width").unwrap().parse::<f64>().unwrap() > 10.0);
        let tail_bars = by_class(&els, "tail-bars");
        assert!(tail_bars.len() == 1 && tail_bars[0].attr("d").unwrap().starts_with('M'), "tail bars drawn");
        assert!(by_class(&els, "bars")[0].attr("d").unwrap().matches('Z').count() > 50);
        for m in ["normal", "poisson", "saddlepoint"] {
            let o = by_class(&els, &format!("overlay-{m}"));
            assert!(o.len() == 1 && o[0].attr("d").unwrap().matches('L').count() > 50, "{m} line");
        }
        assert!(by_class(&els, "overlay-edgeworth").is_empty());
        assert_eq!(by_class(&els, "threshold").len(), 1);
        // Ticks are labelled on both axes.
        let x_ticks = els.iter().filter(|e| e.name == "text" && e.text.parse::<u64>().is_ok()).count();
        assert!(x_ticks >= 4, "{x_ticks} x tick labels");
    }
}

/// The title's probability against a closed form: for 10 exposures at p = 1/2, P(S >= 8) = (C(10,8) +
/// C(10,9) + C(10,10)) / 2^10 = 56/1024 = 0.0546875, shown with 4 significant digits.
#[tokio::test]
async fn the_title_states_the_exact_tail() {
    let s = start(&[]).await;
    let body = json!({"portfolio": {"groups": [{"size": 10, "probability": 0.5}]}, "threshold": 8});
    let (status, _, svg) = post_svg(&s, &body).await;
    assert_eq!(status, 200, "{svg}");
    let els = parse_xml(&svg).unwrap();
    assert!(els.iter().any(|e| e.name == "title" && e.text == "P(S \u{2265} 8) = 0.05469"), "{svg}");
}

#[tokio::test]
async fn same_request_gives_the_same_bytes() {
    let s = start(&[]).await;
    let body = demo_chart(130, true);
    let (_, _, a) = post_svg(&s, &body).await;
    let (_, _, b) = post_svg(&s, &body).await;
    assert!(a.len() > 1000);
    assert!(a == b, "two renderings differ");
    let (_, _, c) = post_svg(&s, &demo_chart(131, true)).await;
    assert_ne!(a, c, "a different threshold draws a different picture");
}

#[tokio::test]
async fn far_tails_below_the_f64_range_plot_on_the_log_axis() {
    let s = start(&[]).await;
    // P(S = 400) = 1e-800 for 400 exposures at p = 0.01.
    let body = json!({"portfolio": {"families": [{"kind": "constant", "n": 400, "probability": 0.01}]},
                      "threshold": 400, "side": "point", "log_scale": true});
    let (status, _, svg) = post_svg(&s, &body).await;
    assert_eq!(status, 200, "{svg}");
    let els = parse_xml(&svg).unwrap();
    assert!(els.iter().any(|e| e.name == "title" && e.text == "P(S = 400) = 1e-800"), "{svg}");
    assert!(by_class(&els, "tail-bars")[0].attr("d").unwrap().starts_with('M'), "the 1e-800 bar is drawn");
    // The lowest decade on the axis is at or below -800.
    let lowest = els.iter().filter(|e| e.name == "tspan").filter_map(|e| e.text.parse::<i64>().ok()).min().unwrap();
    assert!(lowest <= -800, "{lowest}");
}

#[tokio::test]
async fn bad_chart_requests_get_problem_details() {
    let s = start(&["--max-work", "100000"]).await;
    let p = || json!({"probabilities": [0.1, 0.2]});
    let cases: Vec<(Value, u16, Option<&str>)> = vec![
        (json!({"portfolio": {"probabilities": [0.1, 1.5]}, "threshold": 1}), 422, Some("/portfolio/probabilities/1")),
        (json!({"portfolio": p(), "threshold": -1}), 422, Some("/threshold")),
        (json!({"portfolio": p()}), 422, None),
        (json!({"portfolio": p(), "threshold": 1, "methods": ["auto"]}), 422, Some("/methods/0")),
        (json!({"portfolio": p(), "threshold": 1, "methods": ["normal", "exact"]}), 422, Some("/methods/1")),
        (json!({"portfolio": p(), "threshold": 1, "width": 10}), 422, Some("/width")),
        (json!({"portfolio": p(), "threshold": 1, "height": 100000}), 422, Some("/height")),
        (json!({"portfolio": p(), "threshold": 1, "side": "both"}), 422, Some("/side")),
        (json!({"portfolio": p(), "threshold": 1, "log": true}), 422, None),
        (json!({"portfolio": {"poisson_rates": [1]}, "threshold": 2_000_000_000u64}), 422, Some("/threshold")),
        (
            json!({"portfolio": {"families": [{"kind": "constant", "n": 5000, "probability": 0.5}]}, "threshold": 1}),
            413,
            None,
        ),
    ];
    for (body, want, ptr) in cases {
        let (status, ct, v) = s.post_json("/v1/chart", &body).await;
        assert_problem(status, &ct, &v, want, ptr);
    }
    let (status, ct, v) = s.post_raw("/v1/chart", "application/json", b"{\"portfolio\":".to_vec()).await;
    assert_problem(status, &ct, &v, 400, None);
    let (status, ct, v) = s.post_raw("/v1/chart", "text/plain", b"{}".to_vec()).await;
    assert_problem(status, &ct, &v, 415, None);
}
