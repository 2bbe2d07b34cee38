//! Batches of requests as NDJSON, shared by POST /v1/batch (`routes::batch`) and `tailtally eval`.
//!
//! Each non-blank input line is one object `{"id": <string or number>, "<kind>": <request>}` where `<kind>`
//! is one of `tail`, `quantiles`, `distribution`, `layers`, `contributions`, `reverse_stress` and the request is that endpoint's body. Each
//! line gets one answer line, in input order: `{"id": ..., "<kind>": <response>}`, or
//! `{"id": ..., "problem": <problem details>}` whose pointers are relative to the line's object (e.g.
//! `/tail/thresholds/0`) and whose detail starts with the line number (1-based, blank lines counted).
//!
//! Memory stays bounded whatever the batch's length: the input is split into lines as it arrives (a line
//! longer than the limit is skipped to its end and answered with a problem), at most `parallelism` lines
//! are computed at once off the async threads (a line whose work is within the inline budget is answered at
//! once on the async worker instead, as a small request is: `api::offload`), and each answer is handed on as
//! soon as the lines before it have been. After `max_lines` lines the answers end with one 413 problem line and the rest of the input is
//! not read.

use crate::analytics::cancel::Cancel;
use crate::analytics::contributions::Contributions;
use crate::analytics::distribution::Distribution;
use crate::analytics::layers::Layers;
use crate::analytics::quantiles::Quantiles;
use crate::analytics::reverse_stress::ReverseStress;
use crate::analytics::tail::Tail;
use crate::analytics::{self, Analytic};
use crate::api::extract;
use crate::api::problem::Problem;
use crate::config::{BatchLimits, ServiceLimits};
use crate::portfolio::Violation;
use axum::http::StatusCode;
use bytes::Bytes;
use futures_util::{Stream, StreamExt};
use serde::de::{Deserializer, MapAccess, Visitor};
use serde_json::value::RawValue;
use std::collections::VecDeque;
use std::sync::{Arc, OnceLock};

/// The request kinds a line may hold.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Kind {
    Tail,
    Quantiles,
    Distribution,
    Layers,
    Contributions,
    ReverseStress,
}

impl Kind {
    pub const ALL: [Kind; 6] =
        [Kind::Tail, Kind::Quantiles, Kind::Distribution, Kind::Layers, Kind::Contributions, Kind::ReverseStress];

    /// The line's key for this kind (the route's last path segment, in snake case).
    pub fn key(self) -> &'static str {
        match self {
            Kind::Tail => "tail",
            Kind::Quantiles => "quantiles",
            Kind::Distribution => "distribution",
            Kind::Layers => "layers",
            Kind::Contributions => "contributions",
            Kind::ReverseStress => "reverse_stress",
        }
    }

    fn of_key(k: &str) -> Option<Kind> {
        Kind::ALL.into_iter().find(|kind| kind.key() == k)
    }

    /// The keys, for messages: "tail, quantiles, ...".
    fn keys() -> String {
        Kind::ALL.map(Kind::key).join(", ")
    }
}

/// One unit of input after splitting.
#[derive(Debug, PartialEq, Eq)]
pub enum Item {
    /// A non-blank line (without its line break).
    Line { no: u64, bytes: Vec<u8> },
    /// A line over the length limit (its bytes were dropped).
    TooLong { no: u64 },
    /// The first line beyond `max_lines`; nothing follows it.
    TooMany { no: u64 },
    /// The input could not be read further; nothing follows it.
    ReadError { no: u64, error: String },
}

/// Splits chunks of input into lines, holding at most `max` bytes of an unfinished line.
#[derive(Debug)]
pub struct LineSplitter {
    buf: Vec<u8>,
    max: usize,
    /// Number of the line being read (1-based).
    no: u64,
    /// The current line went over `max`: skip to its end.
    skipping: bool,
}

impl LineSplitter {
    pub fn new(max: usize) -> LineSplitter {
        LineSplitter { buf: Vec::new(), max, no: 1, skipping: false }
    }

    /// Number of the line being read.
    pub fn line_no(&self) -> u64 {
        self.no
    }

    pub fn push(&mut self, mut chunk: &[u8], out: &mut VecDeque<Item>) {
        while !chunk.is_empty() {
            let (piece, rest, ended) = match chunk.iter().position(|&b| b == b'\n') {
                Some(i) => (&chunk[..i], &chunk[i + 1..], true),
                None => (chunk, &chunk[chunk.len()..], false),
            };
            if !self.skipping {
                if self.buf.len() + piece.len() > self.max {
                    self.skipping = true;
                    self.buf = Vec::new();
                } else {
                    self.buf.extend_from_slice(piece);
                }
            }
            if ended {
                self.end_line(out);
            }
            chunk = rest;
        }
    }

    /// The input ended: a last line without a line break is a line too.
    pub fn finish(&mut self, out: &mut VecDeque<Item>) {
        if self.skipping || !self.buf.is_empty() {
            self.end_line(out);
        }
    }

    fn end_line(&mut self, out: &mut VecDeque<Item>) {
        let no = self.no;
        self.no += 1;
        if std::mem::take(&mut self.skipping) {
            out.push_back(Item::TooLong { no });
            return;
        }
        let bytes = std::mem::take(&mut self.buf);
        if bytes.iter().all(u8::is_ascii_whitespace) {
            return;
        }
        out.push_back(Item::Line { no, bytes });
    }
}

/// The items of a chunked input, at most `max_lines` lines and then one `TooMany`; read lazily.
pub fn items<S, E>(
    chunks: S,
    max_line_bytes: usize,
    max_lines: u64,
    idle: Option<std::time::Duration>,
) -> impl Stream<Item = Item> + Send
where
    S: Stream<Item = Result<Bytes, E>> + Send + Unpin,
    E: std::fmt::Display,
{
    struct State<S> {
        chunks: S,
        split: LineSplitter,
        pending: VecDeque<Item>,
        answered: u64,
        input_done: bool,
        stopped: bool,
    }
    let st = State {
        chunks,
        split: LineSplitter::new(max_line_bytes),
        pending: VecDeque::new(),
        answered: 0,
        input_done: false,
        stopped: false,
    };
    futures_util::stream::unfold(st, move |mut st| async move {
        loop {
            if st.stopped {
                return None;
            }
            if let Some(item) = st.pending.pop_front() {
                let item = match item {
                    Item::Line { no, .. } | Item::TooLong { no } if st.answered >= max_lines => {
                        st.stopped = true;
                        Item::TooMany { no }
                    }
                    Item::ReadError { .. } => {
                        st.stopped = true;
                        item
                    }
                    other => other,
                };
                st.answered += 1;
                return Some((item, st));
            }
            if st.input_done {
                return None;
            }
            let next = match idle {
                Some(d) => match tokio::time::timeout(d, st.chunks.next()).await {
                    Ok(next) => next,
                    Err(_) => {
                        st.input_done = true;
                        let error = format!("no input for {} ms (see --request-timeout-secs)", d.as_millis());
                        st.pending.push_back(Item::ReadError { no: st.split.line_no(), error });
                        continue;
                    }
                },
                None => st.chunks.next().await,
            };
            match next {
                Some(Ok(b)) => st.split.push(&b, &mut st.pending),
                Some(Err(e)) => {
                    st.input_done = true;
                    st.pending.push_back(Item::ReadError { no: st.split.line_no(), error: e.to_string() });
                }
                None => {
                    st.input_done = true;
                    st.split.finish(&mut st.pending);
                }
            }
        }
    })
}

/// One answer line (with its line break), and whether the input failed to be read (the last answer then).
#[derive(Debug)]
pub struct Answer {
    pub line: Bytes,
    pub read_error: Option<String>,
}

/// The answers to a chunked input, in input order: each line is computed on the blocking pool within
/// `batch.line_timeout` (408 problem line beyond, and the computation is told to stop), at most
/// `batch.parallelism` at once. Dropping the stream abandons the lines in progress.
pub fn answers<S, E>(chunks: S, limits: Arc<ServiceLimits>, batch: BatchLimits) -> impl Stream<Item = Answer> + Send
where
    S: Stream<Item = Result<Bytes, E>> + Send + Unpin,
    E: std::fmt::Display,
{
    let (max_line, max_lines, timeout) = (batch.max_line_bytes, batch.max_lines, batch.line_timeout);
    items(chunks, max_line, max_lines, batch.read_idle_timeout)
        .map(move |item| {
            let limits = limits.clone();
            async move {
                let line = |s: Vec<u8>| Answer { line: Bytes::from(s), read_error: None };
                match item {
                    Item::Line { no, bytes } => line(compute_line(no, bytes, limits, timeout).await),
                    Item::TooLong { no } => line(problem_line(
                        None,
                        Problem::too_large(format!(
                            "line {no}: the line is longer than {max_line} bytes (see --max-body-bytes); it was skipped"
                        )),
                    )),
                    Item::TooMany { no } => line(problem_line(
                        None,
                        Problem::too_large(format!(
                            "line {no}: the batch has more than {max_lines} lines (see --max-batch-lines); this line and the rest of the input were not read"
                        )),
                    )),
                    Item::ReadError { no, error } => Answer {
                        line: Bytes::from(problem_line(
                            None,
                            Problem::malformed(format!("line {no}: the input could not be read further: {error}")),
                        )),
                        read_error: Some(error),
                    },
                }
            }
        })
        .buffered(batch.parallelism.max(1))
}

/// Lines up to this long are first read on the async worker, to answer at once those whose work is within the
/// inline budget (`analytics::cost::INLINE_WORK`); a longer line, or one over the budget, goes to the
/// blocking pool (read again there: a line of this size parses in well under 0.1 ms).
pub const INLINE_LINE_BYTES: usize = 64 * 1024;

async fn compute_line(no: u64, bytes: Vec<u8>, limits: Arc<ServiceLimits>, timeout: std::time::Duration) -> Vec<u8> {
    // A small line costs less than its hand-off to the blocking pool and back (the wake-ups and switches
    // were most of a batch's CPU), and holds the worker for well under a millisecond, so neither the timeout
    // nor cancellation has anything to stop. Tokio's cooperative budget makes a long run of them yield now
    // and then, so that the worker's other connections are still served.
    if bytes.len() <= INLINE_LINE_BYTES {
        if let Some(out) = small_line(no, &bytes, &limits) {
            tokio::task::consume_budget().await;
            return out;
        }
    }
    // The id is parsed on the blocking thread; it is left here so that a timed-out line still names it.
    let id = Arc::new(OnceLock::new());
    let (cancel, guard) = Cancel::pair();
    let seen = id.clone();
    let task = tokio::task::spawn_blocking(move || answer_line(no, &bytes, &limits, &cancel, &seen));
    match tokio::time::timeout(timeout, task).await {
        Ok(Ok(out)) => out,
        Ok(Err(e)) => {
            problem_line(id.get().map(String::as_str), Problem::internal(format!("line {no}: computation failed: {e}")))
        }
        Err(_) => {
            guard.cancel();
            let p = Problem::new(
                StatusCode::REQUEST_TIMEOUT,
                "timeout",
                "Request timeout",
                format!(
                    "line {no}: the line took longer than the configured timeout (see --request-timeout-secs, --request-timeout-ms)"
                ),
            );
            problem_line(id.get().map(String::as_str), p)
        }
    }
}

/// The answer to one line, synchronously: `{"id": ..., "<kind>": <response>}` or `{"id": ..., "problem":
/// ...}`, with a line break. `id_out` receives the line's id (its JSON text) as soon as it is known.
pub fn answer_line(
    no: u64,
    line: &[u8],
    limits: &ServiceLimits,
    cancel: &Cancel,
    id_out: &OnceLock<String>,
) -> Vec<u8> {
    let env = match parse_envelope(no, line) {
        Ok(env) => env,
        Err(r) => return problem_line(r.0.as_deref(), r.1),
    };
    let _ = id_out.set(env.id.clone());
    let body = env.body.get().as_bytes();
    let result = match env.kind {
        Kind::Tail => run::<Tail>(body, limits, cancel),
        Kind::Quantiles => run::<Quantiles>(body, limits, cancel),
        Kind::Distribution => run::<Distribution>(body, limits, cancel),
        Kind::Layers => run::<Layers>(body, limits, cancel),
        Kind::Contributions => run::<Contributions>(body, limits, cancel),
        Kind::ReverseStress => run::<ReverseStress>(body, limits, cancel),
    };
    line_of(no, &env, result)
}

/// The answer to a line whose work is within the inline budget (a line that cannot be read or whose request
/// is invalid is answered too: its problem costs nothing); `None` for a line to be answered on the
/// blocking pool.
fn small_line(no: u64, line: &[u8], limits: &ServiceLimits) -> Option<Vec<u8>> {
    let env = match parse_envelope(no, line) {
        Ok(env) => env,
        Err(r) => return Some(problem_line(r.0.as_deref(), r.1)),
    };
    let body = env.body.get().as_bytes();
    let result = match env.kind {
        Kind::Tail => run_small::<Tail>(body, limits),
        Kind::Quantiles => run_small::<Quantiles>(body, limits),
        Kind::Distribution => run_small::<Distribution>(body, limits),
        Kind::Layers => run_small::<Layers>(body, limits),
        Kind::Contributions => run_small::<Contributions>(body, limits),
        Kind::ReverseStress => run_small::<ReverseStress>(body, limits),
    }?;
    Some(line_of(no, &env, result))
}

/// `{"id": ..., "<kind>": <answer>}` or the line's problem, with a line break.
fn line_of(no: u64, env: &Envelope, result: Result<Vec<u8>, Problem>) -> Vec<u8> {
    let id = Some(env.id.as_str());
    match result {
        Ok(json) => {
            let mut out = Vec::with_capacity(json.len() + env.id.len() + 24);
            out.extend_from_slice(b"{\"id\":");
            out.extend_from_slice(env.id.as_bytes());
            out.extend_from_slice(format!(",\"{}\":", env.kind.key()).as_bytes());
            out.extend_from_slice(&json);
            out.extend_from_slice(b"}\n");
            out
        }
        Err(p) => problem_line(id, relocate(p, &format!("/{}", env.kind.key()), no)),
    }
}

/// Decode one line's request, answer it with the question `A`, encode the answer.
fn run<A>(body: &[u8], limits: &ServiceLimits, cancel: &Cancel) -> Result<Vec<u8>, Problem>
where
    A: Analytic,
    A::Request: serde::de::DeserializeOwned,
    A::Answer: serde::Serialize,
{
    let req: A::Request = extract::parse(body)?;
    let resp = analytics::run::<A>(&req, limits, cancel)?;
    serde_json::to_vec(&resp).map_err(|e| Problem::internal(format!("could not write the answer: {e}")))
}

/// As `run`, when the request bounds its work within the inline budget; `None` otherwise.
fn run_small<A>(body: &[u8], limits: &ServiceLimits) -> Option<Result<Vec<u8>, Problem>>
where
    A: Analytic,
    A::Request: serde::de::DeserializeOwned,
    A::Answer: serde::Serialize,
{
    let req: A::Request = match extract::parse(body) {
        Ok(req) => req,
        Err(p) => return Some(Err(p)),
    };
    if !analytics::cost::inline_work::<A>(&req).is_some_and(|w| w <= analytics::cost::INLINE_WORK) {
        return None;
    }
    let resp = match analytics::run::<A>(&req, limits, &Cancel::never()) {
        Ok(resp) => resp,
        Err(e) => return Some(Err(e.into())),
    };
    Some(serde_json::to_vec(&resp).map_err(|e| Problem::internal(format!("could not write the answer: {e}"))))
}

/// `{"id": <id or null>, "problem": <problem>}` with a line break.
pub fn problem_line(id: Option<&str>, p: Problem) -> Vec<u8> {
    let mut out = Vec::with_capacity(256);
    out.extend_from_slice(b"{\"id\":");
    out.extend_from_slice(id.unwrap_or("null").as_bytes());
    out.extend_from_slice(b",\"problem\":");
    out.extend_from_slice(&serde_json::to_vec(&p).unwrap_or_else(|_| b"{}".to_vec()));
    out.extend_from_slice(b"}\n");
    out
}

/// A request's problem as a line's problem: pointers under the kind's key, the line number in the detail.
fn relocate(p: Problem, prefix: &str, no: u64) -> Problem {
    let mut p = if p.errors.is_empty() {
        p
    } else {
        // Only validation problems carry pointers; rebuilding keeps their detail in step with the pointers.
        Problem::invalid(
            p.errors.into_iter().map(|e| Violation::new(format!("{prefix}{}", e.pointer), e.detail)).collect(),
        )
    };
    p.detail = on_line(no, &p.detail);
    p
}

/// The detail prefixed with the line number (a violation of the whole line has an empty pointer).
fn on_line(no: u64, detail: &str) -> String {
    format!("line {no}: {}", detail.strip_prefix(": ").unwrap_or(detail))
}

/// A line's object: its id (as JSON text, echoed verbatim) and its one request.
struct Envelope<'a> {
    id: String,
    kind: Kind,
    body: &'a RawValue,
}

/// The line's top-level members in order, values unparsed.
struct Members<'a>(Vec<(String, &'a RawValue)>);

impl<'de> serde::Deserialize<'de> for Members<'de> {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V;
        impl<'de> Visitor<'de> for V {
            type Value = Members<'de>;
            fn expecting(&self, f: &mut std::fmt::Formatter) -> std::fmt::Result {
                f.write_str("a JSON object")
            }
            fn visit_map<A: MapAccess<'de>>(self, mut m: A) -> Result<Members<'de>, A::Error> {
                let mut out = Vec::new();
                while let Some((k, v)) = m.next_entry::<String, &'de RawValue>()? {
                    out.push((k, v));
                }
                Ok(Members(out))
            }
        }
        d.deserialize_map(V)
    }
}

/// A rejected line: its id when it could be read, and why.
type Rejected = Box<(Option<String>, Problem)>;

fn parse_envelope(no: u64, line: &[u8]) -> Result<Envelope<'_>, Rejected> {
    let members: Members = match serde_json::from_slice(line) {
        Ok(m) => m,
        Err(e) if e.is_data() => {
            let p = Problem::invalid(vec![Violation::new(
                "",
                "each line must be a JSON object {\"id\": ..., \"<kind>\": {...}}",
            )]);
            return Err(Box::new((None, relocate(p, "", no))));
        }
        Err(e) => {
            let msg = e.to_string();
            let msg = msg.rfind(" at line ").map_or(msg.as_str(), |i| &msg[..i]).to_string();
            return Err(Box::new((None, Problem::malformed(format!("line {no}, column {}: {msg}", e.column())))));
        }
    };
    let mut errs = Vec::new();
    let mut id = None;
    let mut kind: Option<(Kind, &RawValue)> = None;
    for (i, (k, v)) in members.0.iter().enumerate() {
        let ptr = format!("/{}", crate::api::problem::escape_token(&extract::shorten(k, extract::MAX_ECHO)));
        if members.0[..i].iter().any(|(prev, _)| prev == k) {
            errs.push(Violation::new(ptr, "duplicate key"));
            continue;
        }
        if k == "id" {
            let text = v.get();
            if text.starts_with('"') || text.starts_with('-') || text.starts_with(|c: char| c.is_ascii_digit()) {
                id = Some(text.to_string());
            } else {
                errs.push(Violation::new(ptr, "the id must be a string or a number"));
            }
        } else if let Some(known) = Kind::of_key(k) {
            if let Some((first, _)) = kind {
                errs.push(Violation::new(ptr, format!("a line holds one request; it already has `{}`", first.key())));
            } else {
                kind = Some((known, v));
            }
        } else {
            errs.push(Violation::new(ptr, format!("unknown key: expected `id` and one of {}", Kind::keys())));
        }
    }
    if id.is_none() && !errs.iter().any(|e| e.pointer == "/id") {
        errs.push(Violation::new("/id", "required: a string or a number that the answer echoes"));
    }
    if kind.is_none() && errs.iter().all(|e| e.detail.starts_with("unknown key") || e.pointer == "/id") {
        errs.push(Violation::new("", format!("give one request under one of the keys {}", Kind::keys())));
    }
    match (id, kind) {
        (Some(id), Some((kind, body))) if errs.is_empty() => Ok(Envelope { id, kind, body }),
        (id, _) => Err(Box::new((id, relocate(Problem::invalid(errs), "", no)))),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn split(chunks: &[&[u8]], max: usize) -> Vec<Item> {
        let mut s = LineSplitter::new(max);
        let mut out = VecDeque::new();
        for c in chunks {
            s.push(c, &mut out);
        }
        s.finish(&mut out);
        out.into_iter().collect()
    }

    fn line(no: u64, s: &str) -> Item {
        Item::Line { no, bytes: s.as_bytes().to_vec() }
    }

    #[test]
    fn lines_are_split_across_chunks_blank_lines_skipped_and_counted() {
        let got = split(&[b"ab", b"c\n\n  \r\nde", b"f\r\ng"], 100);
        assert_eq!(got, vec![line(1, "abc"), line(4, "def\r"), line(5, "g")]);
    }

    #[test]
    fn a_line_over_the_limit_is_skipped_to_its_end() {
        let got = split(&[b"12345", b"678\nok\n", b"toolong"], 5);
        assert_eq!(got, vec![Item::TooLong { no: 1 }, line(2, "ok"), Item::TooLong { no: 3 }]);
    }

    fn answer(s: &str) -> serde_json::Value {
        let limits = crate::config::ServiceLimits::from_options(&crate::config::Options::default());
        let out = answer_line(7, s.as_bytes(), &limits, &Cancel::never(), &OnceLock::new());
        assert_eq!(out.last(), Some(&b'\n'));
        serde_json::from_slice(&out).unwrap()
    }

    fn pointers(v: &serde_json::Value) -> Vec<String> {
        v["problem"]["errors"].as_array().unwrap().iter().map(|e| e["pointer"].as_str().unwrap().to_string()).collect()
    }

    #[test]
    fn envelope_problems_point_into_the_line() {
        let v = answer(r#"{"id": "a", "tail": {"portfolio": {"probabilities": [0.5]}, "thresholds": [-1]}}"#);
        assert_eq!(v["id"], "a");
        assert_eq!(pointers(&v), ["/tail/thresholds/0"]);
        assert!(v["problem"]["detail"].as_str().unwrap().starts_with("line 7: /tail/thresholds/0"), "{v}");
        let v = answer(r#"{"id": 3, "chart": {}}"#);
        assert_eq!((v["id"].as_u64(), pointers(&v)), (Some(3), vec!["/chart".to_string(), String::new()]));
        let v = answer(r#"{"id": 3, "tail": {}, "layers": {}}"#);
        assert_eq!(pointers(&v), ["/layers"]);
        let v = answer(r#"{"tail": {"portfolio": {}, "thresholds": [1]}}"#);
        assert_eq!((v["id"].is_null(), pointers(&v)), (true, vec!["/id".to_string()]));
        let v = answer(r#"{"id": true, "tail": {}}"#);
        assert_eq!(pointers(&v), ["/id"]);
        let v = answer(r#"[1, 2]"#);
        assert_eq!((v["problem"]["status"].as_u64(), pointers(&v)), (Some(422), vec![String::new()]));
        let v = answer(r#"{"id": 1, "tail": "#);
        assert_eq!(v["problem"]["status"], 400);
        assert!(v["problem"]["detail"].as_str().unwrap().starts_with("line 7, column"), "{v}");
    }

    /// The inline path gives the same bytes as the blocking pool's, answers and problems alike, and leaves
    /// a line whose work is over the inline budget to the pool.
    #[test]
    fn small_lines_are_answered_inline_with_the_same_bytes() {
        let limits = crate::config::ServiceLimits::from_options(&crate::config::Options::default());
        let lines = [
            r#"{"id": 1, "tail": {"portfolio": {"probabilities": [0.1, 0.2, 0.3]}, "thresholds": [1, 2]}}"#,
            r#"{"id": "q", "tail": {"portfolio": {"groups": [{"size": 100, "probability": 0.05}]}, "thresholds": [9], "side": "lower"}}"#,
            r#"{"id": 2, "tail": {"portfolio": {"probabilities": [0.5]}, "thresholds": [-1]}}"#,
            r#"{"id": 3, "tail": "#,
        ];
        for line in lines {
            let inline = small_line(5, line.as_bytes(), &limits).expect(line);
            let pooled = answer_line(5, line.as_bytes(), &limits, &Cancel::never(), &OnceLock::new());
            // Timings are measurements, not answers (as in scripts/answers_snapshot.py).
            let blank =
                |b: Vec<u8>| {
                    let s = String::from_utf8(b).unwrap();
                    s.split("\"elapsed_us\":")
                        .enumerate()
                        .map(|(i, part)| {
                            if i == 0 {
                                part
                            } else {
                                part.trim_start_matches(|c: char| c.is_ascii_digit() || c == '.')
                            }
                        })
                        .collect::<Vec<_>>()
                        .join("\"elapsed_us\":_")
                };
            assert_eq!(blank(inline), blank(pooled));
        }
        let large = r#"{"id": 4, "tail": {"portfolio": {"families": [{"kind": "linear", "n": 100000, "first": 0.01, "last": 0.1}]}, "thresholds": [5000]}}"#;
        assert!(small_line(5, large.as_bytes(), &limits).is_none());
    }

    #[test]
    fn a_good_line_echoes_its_id_verbatim_and_its_kind() {
        let v = answer(
            r#"{"id": "x\"y", "layers": {"portfolio": {"probabilities": [0.5, 0.5]}, "layers": [{"attachment": 0}]}}"#,
        );
        assert_eq!(v["id"], "x\"y");
        assert!((v["layers"]["layers"][0]["expected_count"].as_f64().unwrap() - 1.0).abs() < 1e-12, "{v}");
        let v = answer(r#"{"id": 9, "contributions": {"portfolio": {"probabilities": [0.5, 0.5]}, "threshold": 2}}"#);
        // P(S >= 2) = 1/4 and each exposure's sensitivity is P(the other one = 1) = 1/2.
        assert!((v["contributions"]["contributions"][0]["sensitivity"].as_f64().unwrap() - 0.5).abs() < 1e-15, "{v}");
    }
}
