//! POST /v1/batch: many requests in one NDJSON body, answered as an NDJSON stream in input order. The line
//! format and its handling are `crate::api::batch`; this file reads the body as a stream and streams the
//! answers back.
//!
//! A batch holds one admission turn for as long as its answer streams (the turn travels with the body).
//! It is not under the whole-request timeout, which a long batch would exceed: each line instead gets the
//! request timeout as its own limit and is answered with a 408 problem line beyond it.

use crate::api::batch;
use crate::api::problem::Problem;
use crate::api::{Admitted, AppState};
use axum::body::Body;
use axum::extract::{Request, State};
use axum::http::{header, HeaderValue, StatusCode};
use axum::response::{IntoResponse, Response};
use futures_util::StreamExt;

pub const NDJSON: &str = "application/x-ndjson";

/// What the OpenAPI document shows of a batch body (it is NDJSON, not one JSON document).
const LINE_FORMAT: &str = "NDJSON: one request per line, `{\"id\": <string or number>, \"<kind>\": <request>}` \
where `<kind>` is one of `tail`, `quantiles`, `distribution`, `layers`, `contributions`, `reverse_stress` (POST /v1/reverse-stress) and the request is that endpoint's body. \
Blank lines are skipped. Each line may be as long as `--max-body-bytes`; a batch holds at most \
`--max-batch-lines` lines.";

/// Many requests in one body, answered line by line in input order.
///
/// Each answer line is `{"id": ..., "<kind>": <response>}` with the same id and key as its request line, or
/// `{"id": ..., "problem": <problem details>}` for a line that cannot be answered (malformed JSON, unknown
/// kind, invalid request; pointers relative to the line's object, e.g. `/tail/thresholds/0`, and the line
/// number in `detail`). A bad line never stops the batch. After `--max-batch-lines` lines the stream ends
/// with one 413 problem line and the rest of the body is not read. Each line has the request timeout as its
/// limit (a 408 problem line beyond), and so has each wait for more of the body, with at least 250 ms (the
/// answer then ends with a problem line); the batch as a whole has none.
#[utoipa::path(
    post, path = "/v1/batch", tag = "analytics",
    request_body(
        content = String, content_type = "application/x-ndjson", description = LINE_FORMAT
    ),
    responses(
        (status = 200, description = "One NDJSON answer line per request line, in input order: `{\"id\": ..., \"<kind>\": <response>}` or `{\"id\": ..., \"problem\": <Problem>}`",
            body = String, content_type = "application/x-ndjson"),
        (status = 408, description = "No body arrived within the request timeout", body = Problem, content_type = "application/problem+json"),
        (status = 415, description = "Not NDJSON", body = Problem, content_type = "application/problem+json"),
        (status = 503, description = "All computing slots busy and the queue full", body = Problem, content_type = "application/problem+json"),
    )
)]
pub async fn batch(State(state): State<AppState>, mut req: Request) -> Result<Response, Problem> {
    let ctype = req.headers().get(header::CONTENT_TYPE).and_then(|v| v.to_str().ok()).unwrap_or("");
    let mime = ctype.split(';').next().unwrap_or("").trim().to_ascii_lowercase();
    if mime != NDJSON {
        return Err(Problem::unsupported_media(format!("expected Content-Type: {NDJSON}, got {ctype:?}")));
    }
    let admitted = req.extensions_mut().remove::<Admitted>();
    let mut chunks = req.into_body().into_data_stream();
    // Read the first chunk before answering: a client that sent `Expect: 100-continue` is told to go on
    // only when the body is first read, and would otherwise wait (curl: one second) for the signal.
    let first = match state.batch.read_idle_timeout {
        Some(d) => tokio::time::timeout(d, chunks.next()).await.map_err(|_| {
            Problem::new(
                StatusCode::REQUEST_TIMEOUT,
                "timeout",
                "Request timeout",
                "no body arrived within the request timeout (see --request-timeout-secs, --request-timeout-ms)",
            )
        })?,
        None => chunks.next().await,
    };
    let chunks = futures_util::stream::iter(first).chain(chunks);
    let answers = batch::answers(chunks, state.limits.clone(), state.batch.clone()).map(move |a| {
        // The admission turn lives as long as the stream: the batch keeps computing after this handler returns.
        let _turn = &admitted;
        Ok::<_, std::convert::Infallible>(a.line)
    });
    let mut res = Body::from_stream(answers).into_response();
    res.headers_mut().insert(header::CONTENT_TYPE, HeaderValue::from_static(NDJSON));
    Ok(res)
}
