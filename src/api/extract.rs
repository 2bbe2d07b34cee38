//! `Body<T>`: the JSON extractor of the service. It replaces axum's `Json` so that every rejection is a
//! problem-details document: 415 for a wrong content type, 413 beyond the size limit, 400 for malformed JSON
//! and 422, with the JSON pointer of the field, for JSON of the wrong shape (a string where a number belongs,
//! a negative count, an unknown field). `multipart/form-data` (the request with its exposures as a table) is
//! handed to `api::tables`.
//!
//! Bodies over `PARSE_OFF_THREAD_BYTES`, and every table, are parsed on the blocking pool: a 200 MB document
//! takes about a second to parse, which on an async worker would keep the probes waiting; small ones are
//! parsed in place, a hand-off costing more than their parse.

use super::integral::Integral;
use super::problem::{escape_token, Problem};
use super::tables::{self, Tabular};
use super::AppState;
use crate::portfolio::Violation;
use axum::body::Bytes;
use axum::extract::{FromRef, FromRequest, Request};
use axum::http::header;
use serde::de::DeserializeOwned;
use std::sync::Arc;

pub struct Body<T>(pub T);

/// Bodies larger than this are parsed off the async worker threads.
pub const PARSE_OFF_THREAD_BYTES: usize = 1 << 20;

/// The share of the in-flight body budget that a request's body holds (`server::intake`), left in the
/// request's extensions; `Body` keeps it until the body is parsed, the buffer then being freed.
#[derive(Clone)]
pub struct BodyPermit(pub Arc<dyn Send + Sync>);

impl<S, T> FromRequest<S> for Body<T>
where
    S: Send + Sync,
    T: DeserializeOwned + Tabular + Send + 'static,
    AppState: FromRef<S>,
{
    type Rejection = Problem;

    async fn from_request(mut req: Request, state: &S) -> Result<Self, Problem> {
        let held = req.extensions_mut().remove::<BodyPermit>();
        let ctype = req.headers().get(header::CONTENT_TYPE).and_then(|v| v.to_str().ok()).unwrap_or("");
        let mime = ctype.split(';').next().unwrap_or("").trim();
        // A request with its exposures as a table (`api::tables`). Compared without a lowercased copy: the
        // check runs on every request.
        let multipart = mime.eq_ignore_ascii_case("multipart/form-data");
        if !multipart && !is_json(mime) {
            return Err(Problem::unsupported_media(format!(
                "expected Content-Type: application/json, or multipart/form-data with a table of exposures, got {:?}",
                ctype
            )));
        }
        let ctype = if multipart { ctype.to_string() } else { String::new() };
        let bytes = Bytes::from_request(req, state).await.map_err(|e| {
            if e.status() == axum::http::StatusCode::PAYLOAD_TOO_LARGE {
                Problem::too_large("the request body exceeds the configured limit (see --max-body-bytes)")
            } else {
                Problem::malformed(format!("could not read the request body: {e}"))
            }
        })?;
        let parsed = if multipart {
            // A table of 10^6 rows takes tens of milliseconds to read: off the async threads.
            let limits = AppState::from_ref(state).limits;
            tokio::task::spawn_blocking(move || tables::from_multipart(bytes, &ctype, &limits))
                .await
                .map_err(|e| Problem::internal(format!("reading the table failed: {e}")))?
        } else if bytes.len() > PARSE_OFF_THREAD_BYTES {
            tokio::task::spawn_blocking(move || parse::<T>(&bytes))
                .await
                .map_err(|e| Problem::internal(format!("parsing the request failed: {e}")))?
        } else {
            parse(&bytes)
        };
        drop(held);
        parsed.map(Body)
    }
}

/// `application/json` or `application/*+json`, in any case.
fn is_json(mime: &str) -> bool {
    const APP: &str = "application/";
    mime.eq_ignore_ascii_case("application/json")
        || (mime.len() >= APP.len() + 5
            && mime.is_char_boundary(APP.len())
            && mime.is_char_boundary(mime.len() - 5)
            && mime[..APP.len()].eq_ignore_ascii_case(APP)
            && mime[mime.len() - 5..].eq_ignore_ascii_case("+json"))
}

/// Parse JSON, mapping serde's errors to problems with a JSON pointer. Integral floats read as integers
/// (`integral`), as JSON Schema's `integer` allows.
///
/// Valid documents are read by `decode::from_slice` (or serde_json where it gives up); the path tracking that gives a failure its pointer wraps
/// every value (about a fifth of the parse of a list of numbers), so it is paid only by a document that
/// fails, read a second time. The second reader accepts everything the first does (and integral floats
/// besides), so a document the first refuses is answered by the second: accepted, or refused with a pointer.
pub fn parse<T: DeserializeOwned>(bytes: &[u8]) -> Result<T, Problem> {
    // The one-pass reader first (`api::decode`: the same values, about twice as fast on lists of numbers); it
    // gives up without a word on anything it does not read, and serde_json says what is wrong.
    if let Some(v) = super::decode::from_slice(bytes) {
        return Ok(v);
    }
    if let Ok(v) = serde_json::from_slice(bytes) {
        return Ok(v);
    }
    let mut de = serde_json::Deserializer::from_slice(bytes);
    match serde_path_to_error::deserialize::<_, T>(Integral(&mut de)) {
        Ok(v) => {
            // Trailing garbage after the document is malformed JSON too.
            if let Err(e) = de.end() {
                return Err(Problem::malformed(e.to_string()));
            }
            Ok(v)
        }
        Err(err) => {
            let pointer = pointer_of(err.path());
            let inner = err.into_inner();
            use serde_json::error::Category;
            match inner.classify() {
                Category::Data => {
                    Err(Problem::invalid(vec![Violation::new(pointer, strip_position(&inner.to_string()))]))
                }
                // A number too large for f64 (e.g. 1e400) is a syntax error to serde_json but a bad value to a client.
                Category::Syntax if inner.to_string().starts_with("number out of range") => {
                    Err(Problem::invalid(vec![Violation::new(pointer, "number out of range for a 64-bit float")]))
                }
                _ => Err(Problem::malformed(inner.to_string())),
            }
        }
    }
}

fn strip_position(s: &str) -> String {
    match s.rfind(" at line ") {
        Some(i) => shorten(&s[..i], MAX_ECHO),
        None => shorten(s, MAX_ECHO),
    }
}

/// Longest piece of a client's input (a key, a value) echoed in a problem: an unknown key of 50 MB must not
/// come back four times over.
pub const MAX_ECHO: usize = 256;

/// `s` cut to at most `max` bytes (on a character boundary), marked with an ellipsis where cut.
pub fn shorten(s: &str, max: usize) -> String {
    if s.len() <= max {
        return s.to_string();
    }
    let mut end = max;
    while !s.is_char_boundary(end) {
        end -= 1;
    }
    format!("{}\u{2026}", &s[..end])
}

fn pointer_of(path: &serde_path_to_error::Path) -> String {
    use serde_path_to_error::Segment;
    let mut out = String::new();
    for seg in path.iter() {
        match seg {
            Segment::Seq { index } => out.push_str(&format!("/{index}")),
            Segment::Map { key } => out.push_str(&format!("/{}", escape_token(&shorten(key, MAX_ECHO)))),
            Segment::Enum { variant } => out.push_str(&format!("/{}", escape_token(variant))),
            Segment::Unknown => {}
        }
    }
    out
}
