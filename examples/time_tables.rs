//! Time a book sent as a table against the engine alone: n exposures (p_i ~ U(0, 0.2), fixed seed), one exact
//! tail at mean + 5 sd, medians of R runs in ms:
//!   cargo run --release --example time_tables -- 1000000 [R=7] [FORM]
//! (FORM, e.g. `Arrow`: that form's row alone, for profiling the server under its load).
//! End to end is one POST /v1/tail to the real service on a loopback port (bodies built beforehand: upload,
//! multipart split, table parse, validation, the exact tail, the answer), timed at the client. Prints one
//! markdown row per form; the last column is end to end less the engine time the answer reports (`elapsed_us`),
//! the median of the per-run differences.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde_json::json;
use std::sync::Arc;
use std::time::Instant;
use tailtally::analytics::law::Law;
use tailtally::engine::numerics::moments::Moments;
use tailtally::engine::Side;
use tailtally::portfolio::Model;

const BOUNDARY: &str = "time-tables-boundary-5c1e";

fn median(runs: usize, mut f: impl FnMut() -> f64) -> f64 {
    let mut v: Vec<f64> = (0..runs).map(|_| f()).collect();
    v.sort_by(|a, b| a.total_cmp(b));
    v[runs / 2]
}

fn form(request: &[u8], ctype: &str, table: &[u8]) -> Vec<u8> {
    let mut b = Vec::with_capacity(table.len() + request.len() + 400);
    b.extend_from_slice(format!("--{BOUNDARY}\r\nContent-Disposition: form-data; name=\"request\"\r\nContent-Type: application/json\r\n\r\n").as_bytes());
    b.extend_from_slice(request);
    b.extend_from_slice(format!("\r\n--{BOUNDARY}\r\nContent-Disposition: form-data; name=\"exposures\"; filename=\"book\"\r\nContent-Type: {ctype}\r\n\r\n").as_bytes());
    b.extend_from_slice(table);
    b.extend_from_slice(format!("\r\n--{BOUNDARY}--\r\n").as_bytes());
    b
}

fn arrow(ps: &[f64], ids: Option<&[String]>) -> Vec<u8> {
    use arrow_array::{ArrayRef, Float64Array, RecordBatch, StringArray};
    use arrow_schema::{DataType, Field, Schema};
    let mut fields = vec![Field::new("probability", DataType::Float64, false)];
    let mut cols: Vec<ArrayRef> = vec![Arc::new(Float64Array::from(ps.to_vec()))];
    if let Some(ids) = ids {
        fields.push(Field::new("id", DataType::Utf8, false));
        cols.push(Arc::new(StringArray::from(ids.to_vec())));
    }
    let schema = Arc::new(Schema::new(fields));
    let mut out = Vec::new();
    let mut w = arrow_ipc::writer::StreamWriter::try_new(&mut out, &schema).unwrap();
    w.write(&RecordBatch::try_new(schema.clone(), cols).unwrap()).unwrap();
    w.finish().unwrap();
    drop(w);
    out
}

fn csv(ps: &[f64], ids: Option<&[String]>) -> Vec<u8> {
    use std::fmt::Write;
    let mut s = String::with_capacity(ps.len() * 32);
    match ids {
        Some(ids) => {
            s.push_str("id,probability\n");
            ps.iter().zip(ids).for_each(|(p, id)| writeln!(s, "{id},{p}").unwrap());
        }
        None => {
            s.push_str("probability\n");
            ps.iter().for_each(|p| writeln!(s, "{p}").unwrap());
        }
    }
    s.into_bytes()
}

fn main() {
    let mut args = std::env::args().skip(1);
    let n: usize = args.next().and_then(|s| s.parse().ok()).unwrap_or(1_000_000);
    let runs: usize = args.next().and_then(|s| s.parse().ok()).unwrap_or(7);
    let only: Option<String> = args.next();
    let mut rng = ChaCha8Rng::seed_from_u64(42);
    let ps: Vec<f64> = (0..n).map(|_| rng.gen_range(0.0..0.2)).collect();
    let ids: Vec<String> = (0..n).map(|i| format!("L-{i:07}")).collect();
    let model = Model::from_parts(&ps, &[], 0.0);
    let m = Moments::of(&model);
    let k = (m.mean + 5.0 * m.sd()).ceil() as u64;
    let law = Law::independent(model);
    let engine = median(runs, || {
        let t = Instant::now();
        std::hint::black_box(law.exact(&[(k, Side::Upper)]));
        t.elapsed().as_secs_f64() * 1e3
    });

    let rt = tokio::runtime::Builder::new_multi_thread().enable_all().build().unwrap();
    let opts = {
        use clap::Parser;
        tailtally::config::Cli::parse_from(["tailtally", "--listen", "127.0.0.1:0"]).options
    };
    let app = rt.block_on(tailtally::server::App::bind(&opts)).unwrap();
    let base = format!("http://{}", app.local_addr());
    rt.spawn(app.serve(std::future::pending()));
    let client = reqwest::Client::new();
    let request = json!({"portfolio": {}, "thresholds": [k], "methods": ["exact"]});
    let request_bytes = serde_json::to_vec(&request).unwrap();
    let mut json_form = request.clone();
    json_form["portfolio"]["probabilities"] = json!(ps);
    let mut json_ids = json_form.clone();
    json_ids["portfolio"]["ids"] = json!(ids);
    let multipart = format!("multipart/form-data; boundary={BOUNDARY}");
    let stream = "application/vnd.apache.arrow.stream";
    let forms: Vec<(String, &str, Vec<u8>)> = vec![
        ("JSON".into(), "application/json", serde_json::to_vec(&json_form).unwrap()),
        ("JSON with ids".into(), "application/json", serde_json::to_vec(&json_ids).unwrap()),
        ("Arrow".into(), &multipart, form(&request_bytes, stream, &arrow(&ps, None))),
        ("Arrow with ids (Utf8)".into(), &multipart, form(&request_bytes, stream, &arrow(&ps, Some(&ids)))),
        ("CSV".into(), &multipart, form(&request_bytes, "text/csv", &csv(&ps, None))),
        ("CSV with ids".into(), &multipart, form(&request_bytes, "text/csv", &csv(&ps, Some(&ids)))),
    ];
    // The whole question in process (validation, model, moments, the exact tail), without HTTP or parsing.
    let limits = tailtally::config::ServiceLimits::from_options(&opts);
    let tail_req: tailtally::analytics::tail::TailRequest = serde_json::from_value(json_form.clone()).unwrap();
    let cancel = tailtally::analytics::cancel::Cancel::pair();
    let question = median(runs, || {
        let t = Instant::now();
        std::hint::black_box(
            tailtally::analytics::run::<tailtally::analytics::tail::Tail>(&tail_req, &limits, &cancel.0).unwrap(),
        );
        t.elapsed().as_secs_f64() * 1e3
    });
    println!("n = {n}, k = mean + 5 sd = {k}, medians of {runs} runs\n");
    println!(
        "| form | body MB | decode only ms | end to end ms | minus engine ms | minus the answer's `elapsed_us` ms |"
    );
    println!("|---|---|---|---|---|---|");
    println!("| engine alone (`Law::exact`) | | | {engine:.1} | | |");
    println!("| the question in process (`analytics::run`) | | | {question:.1} | {:.1} | |", question - engine);
    let mut first: Option<String> = None;
    for (name, ctype, body) in forms.iter().filter(|f| only.as_ref().is_none_or(|o| o == &f.0)) {
        let body = bytes::Bytes::from(body.clone());
        // Decoding alone: the extractor's work on the received body.
        let decode = median(runs, || {
            let t = Instant::now();
            if ctype.starts_with("multipart/") {
                let r: tailtally::analytics::tail::TailRequest =
                    tailtally::api::tables::from_multipart(body.clone(), ctype, &limits).unwrap();
                let ms = t.elapsed().as_secs_f64() * 1e3;
                drop(r);
                ms
            } else {
                let r: tailtally::analytics::tail::TailRequest = tailtally::api::extract::parse(&body).unwrap();
                let ms = t.elapsed().as_secs_f64() * 1e3;
                drop(r);
                ms
            }
        });
        // Per run, end to end less the answer's own engine time (`elapsed_us`): the overhead the issue bounds.
        let mut over = Vec::with_capacity(runs);
        let ms = median(runs, || {
            rt.block_on(async {
                let t = Instant::now();
                let res = client
                    .post(format!("{base}/v1/tail"))
                    .header("content-type", *ctype)
                    .body(body.clone())
                    .send()
                    .await
                    .unwrap();
                assert_eq!(res.status(), 200, "{name}");
                let text = res.text().await.unwrap();
                let ms = t.elapsed().as_secs_f64() * 1e3;
                let v: serde_json::Value = serde_json::from_str(&text).unwrap();
                let p = v["results"][0]["estimates"][0]["probability"].to_string();
                over.push(ms - v["results"][0]["estimates"][0]["elapsed_us"].as_f64().unwrap_or(0.0) / 1e3);
                match &first {
                    None => first = Some(p),
                    Some(f) => assert_eq!(f, &p, "{name} answers as the JSON form does"),
                }
                ms
            })
        });
        over.sort_by(f64::total_cmp);
        let over = over[over.len() / 2];
        println!(
            "| {name} | {:.1} | {decode:.1} | {ms:.1} | {:.1} | {over:.1} |",
            body.len() as f64 / 1e6,
            ms - engine
        );
    }
}
