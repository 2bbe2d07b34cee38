//! POST /v1/chart and GET / end to end: the SVG is well-formed XML with its axes, labels and shaded tail, the
//! same request gives the same bytes, bad input gets problem details; the page is self-contained HTML.

mod common;
use common::{assert_problem, start};
use serde_json::{json, Value};

/// One element of a parsed document: its name and attributes, and the text directly inside it.
#[derive(Debug)]
struct Element {
    name: String,
    attrs: Vec<(String, String)>,
    text: String,
}

impl Element {
    fn attr(&self, k: &str) -> Option<&str> {
        self.attrs.iter().find(|(a, _)| a == k).map(|(_, v)| v.as_str())
    }
}

fn check_refs(s: &str) -> Result<(), String> {
    let mut rest = s;
    while let Some(i) = rest.find('&') {
        let after = &rest[i + 1..];
        let end = after.find(';').ok_or("unterminated reference")?;
        let r = &after[..end];
        let ok = matches!(r, "amp" | "lt" | "gt" | "quot" | "apos")
            || r.strip_prefix("#x").is_some_and(|h| !h.is_empty() && h.chars().all(|c| c.is_ascii_hexdigit()))
            || r.strip_prefix('#').is_some_and(|d| !d.is_empty() && d.chars().all(|c| c.is_ascii_digit()));
        if !ok {
            return Err(format!("bad reference &{r};"));
        }
        rest = &after[end + 1..];
    }
    Ok(())
}

fn is_name(s: &str) -> bool {
    let mut cs = s.chars();
    cs.next().is_some_and(|c| c.is_ascii_alphabetic() || c == '_' || c == ':')
        && cs.all(|c| c.is_ascii_alphanumeric() || matches!(c, '_' | ':' | '-' | '.'))
}

/// A small XML well-formedness check (elements nest and close, one root, quoted unique attributes, valid
/// references, no stray `<`), returning the elements in document order.
fn parse_xml(doc: &str) -> Result<Vec<Element>, String> {
    let mut out: Vec<Element> = Vec::new();
    let mut stack: Vec<(String, usize)> = Vec::new();
    let mut roots = 0;
    let mut rest = doc.trim_start();
    if let Some(r) = rest.strip_prefix("<?xml") {
        rest = &r[r.find("?>").ok_or("unterminated declaration")? + 2..];
    }
    loop {
        let lt = rest.find('<');
        let text = &rest[..lt.unwrap_or(rest.len())];
        check_refs(text)?;
        if stack.is_empty() && !text.trim().is_empty() {
            return Err(format!("text outside the root: {text:?}"));
        }
        if let Some(&(_, idx)) = stack.last() {
            out[idx].text.push_str(text);
        }
        let Some(lt) = lt else { break };
        rest = &rest[lt..];
        if let Some(r) = rest.strip_prefix("<!--") {
            rest = &r[r.find("-->").ok_or("unterminated comment")? + 3..];
            continue;
        }
        let gt = rest.find('>').ok_or("unterminated tag")?;
        let tag = &rest[1..gt];
        rest = &rest[gt + 1..];
        if let Some(name) = tag.strip_prefix('/') {
            let (open, _) = stack.pop().ok_or(format!("</{name}> closes nothing"))?;
            if open != name.trim() {
                return Err(format!("<{open}> closed by </{name}>"));
            }
            continue;
        }
        let (body, empty) = match tag.strip_suffix('/') {
            Some(b) => (b, true),
            None => (tag, false),
        };
        let name_end = body.find(|c: char| c.is_whitespace()).unwrap_or(body.len());
        let name = &body[..name_end];
        if !is_name(name) {
            return Err(format!("bad element name {name:?}"));
        }
        let mut attrs: Vec<(String, String)> = Vec::new();
        let mut a = body[name_end..].trim_start();
        while !a.is_empty() {
            let eq = a.find('=').ok_or(format!("attribute without value in <{name}>"))?;
            let key = a[..eq].trim();
            if !is_name(key) || attrs.iter().any(|(k, _)| k == key) {
                return Err(format!("bad or repeated attribute {key:?} in <{name}>"));
            }
            let v = a[eq + 1..].trim_start();
            let q =
                v.chars().next().filter(|c| *c == '"' || *c == '\'').ok_or(format!("unquoted {key} in <{name}>"))?;
            let close = v[1..].find(q).ok_or("unterminated attribute value")?;
            let value = &v[1..1 + close];
            if value.contains('<') {
                return Err(format!("'<' in attribute {key}"));
            }
            check_refs(value)?;
            attrs.push((key.to_string(), value.to_string()));
            let after = &v[close + 2..];
            if !after.is_empty() && !after.starts_with(char::is_whitespace) {
                return Err(format!("attributes not separated in <{name}>"));
            }
            a = after.trim_start();
        }
        if stack.is_empty() {
            roots += 1;
            if roots > 1 {
                return Err("more than one root element".into());
            }
        }
        out.push(Element { name: name.to_string(), attrs, text: String::new() });
        if !empty {
            stack.push((name.to_string(), out.len() - 1));
        }
    }
    if let Some((open, _)) = stack.pop() {
        return Err(format!("<{open}> never closed"));
    }
    if roots != 1 {
        return Err("no root element".into());
    }
    Ok(out)
}

#[test]
fn the_xml_check_rejects_what_is_not_well_formed() {
    assert!(parse_xml("<a x=\"1\"><b/>t &amp; u</a>").is_ok());
    for bad in [
        "<a><b></a></b>",
        "<a x=1/>",
        "<a>&nope;</a>",
        "<a></a><b/>",
        "<a x=\"1\" x=\"2\"/>",
        "<a>",
        "<a x=\"<\"/>",
        "text<a/>",
        "<a><1/></a>",
    ] {
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
        assert_eq!(els[0].attr("xmlns"), Some("http://www.w3.org/2000/svg"));
        assert_eq!((els[0].attr("width"), els[0].attr("height")), (Some("900"), Some("480")));
        let texts: Vec<&str> = els.iter().filter(|e| e.name == "text").map(|e| e.text.as_str()).collect();
        assert!(texts.contains(&"number of events k"), "{texts:?}");
        let ylab = if log_scale { "P(S = k), log scale" } else { "P(S = k)" };
        assert!(texts.contains(&ylab), "{texts:?}");
        // The title carries the exact tail, which the tail endpoint also gives.
        assert!(els.iter().any(|e| e.name == "title" && e.text.starts_with("P(S \u{2265} 110) = 0.005486")));
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

#[tokio::test]
async fn explorer_page_is_self_contained_html() {
    let s = start(&[]).await;
    let res = s.client.get(format!("{}/", s.base)).send().await.unwrap();
    assert_eq!(res.status().as_u16(), 200);
    let ct = res.headers()["content-type"].to_str().unwrap().to_string();
    assert!(ct.starts_with("text/html"), "{ct}");
    let csp = res.headers()["content-security-policy"].to_str().unwrap().to_string();
    assert!(csp.contains("default-src 'none'") && csp.contains("connect-src 'self'"), "{csp}");
    let html = res.text().await.unwrap();
    assert!(html.trim_start().to_ascii_lowercase().starts_with("<!doctype html>"));
    // No resource from elsewhere: the only absolute URL is the SVG namespace name, which is never fetched.
    let mut rest = html.as_str();
    while let Some(i) = rest.find("http") {
        let tail = &rest[i..];
        if tail.starts_with("http://") || tail.starts_with("https://") {
            assert!(
                tail.starts_with("http://www.w3.org/2000/svg"),
                "external URL in the page: {}",
                &tail[..60.min(tail.len())]
            );
        }
        rest = &rest[i + 4..];
    }
    let lower = html.to_ascii_lowercase();
    for banned in ["@import", "<link", "<iframe", "<script src", "src=\"//", "href=\"//"] {
        assert!(!lower.contains(banned), "page contains {banned}");
    }
    // It states the model's assumption and the caution.
    assert!(html.contains("independent") && html.contains("qualified actuary or engineer"));
    assert!(html.contains("/v1/tail"));
}
