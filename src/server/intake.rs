//! Request bodies: read before a computing turn is taken, within a deadline, and within a budget of bytes
//! held across all requests.
//!
//! A computing request's body is read in full by `read_first`, ahead of the admission control, so that a
//! client that sends it slowly holds a connection and its own bytes but no computing turn; beyond
//! `--body-read-timeout-ms` it is answered 408. Every body byte held in memory (the inflated size: a gzip
//! body is counted as what it becomes) is taken from one budget, `--max-body-bytes-in-flight`; a request
//! that finds the budget spent waits up to `BUDGET_WAIT` and is then answered 503 with Retry-After, and one
//! larger than the whole budget 413. Bytes are taken as they arrive, and held until the JSON has been parsed
//! (`api::extract`).
//!
//! A batch streams, so `pace` only watches its body: the time spent waiting for the client, beyond a first
//! `--body-read-timeout-ms`, must be paid for at `--min-body-rate` bytes per second, and the bytes of the
//! unfinished line (what the batch holds) are taken from the same budget. A batch that falls behind or finds
//! the budget spent sees its body fail, ends with a problem line and gives up its turn.

use crate::api::extract::BodyPermit;
use crate::api::problem::Problem;
use crate::config::Options;
use crate::telemetry::metrics;
use axum::body::{Body, Bytes};
use axum::extract::{Request, State};
use axum::http::{header, HeaderValue, StatusCode};
use axum::middleware::Next;
use axum::response::{IntoResponse, Response};
use bytes::BytesMut;
use http_body_util::BodyExt;
use std::sync::Arc;
use std::time::Duration;
use tokio::sync::{OwnedSemaphorePermit, Semaphore};
use tokio::time::Instant;

/// Longest wait for room in the budget, over all of a request's waits, before a 503. A total rather than a
/// wait per chunk: when more bodies are arriving than fit, sharing the room out fairly chunk by chunk would
/// let all of them creep forward and none finish; with a total, the ones that have waited longest give up
/// theirs and the others finish.
pub const BUDGET_WAIT: Duration = Duration::from_secs(1);

/// Inflated bytes copied between two yields to the scheduler: a gzip bomb inflates without waiting for the
/// network, and would otherwise keep its worker thread from the probes for as long as it inflates.
const YIELD_EVERY: usize = 256 * 1024;

/// The shared limits of request bodies.
pub struct Intake {
    budget: Budget,
    read_timeout: Duration,
    min_rate: u64,
    max_line: usize,
}

impl Intake {
    pub fn new(o: &Options) -> Arc<Intake> {
        Arc::new(Intake {
            budget: Budget::new(o.body_budget()),
            read_timeout: o.body_read_timeout(),
            min_rate: o.min_body_rate.max(1),
            max_line: o.max_body_bytes,
        })
    }

    pub fn budget_bytes(&self) -> usize {
        self.budget.total
    }
}

/// The budget of body bytes in flight: one permit per byte.
#[derive(Clone)]
struct Budget {
    sem: Arc<Semaphore>,
    total: usize,
}

/// Why room could not be had.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Refused {
    /// More than the whole budget: it can never fit.
    TooLarge(usize),
    /// No room within `BUDGET_WAIT`.
    Busy,
}

impl Refused {
    fn message(self) -> String {
        match self {
            Refused::TooLarge(total) => format!(
                "the request body is larger than the service's budget of {total} body bytes in flight (see --max-body-bytes-in-flight)"
            ),
            Refused::Busy => {
                "the request bodies in flight fill the service's memory budget (see --max-body-bytes-in-flight); retry later"
                    .into()
            }
        }
    }

    fn problem(self) -> Response {
        match self {
            Refused::TooLarge(_) => Problem::too_large(self.message()).into_response(),
            Refused::Busy => {
                let mut res = Problem::overloaded(self.message()).into_response();
                res.headers_mut().insert(header::RETRY_AFTER, HeaderValue::from_static("1"));
                res
            }
        }
    }
}

impl Budget {
    fn new(total: usize) -> Budget {
        let total = total.clamp(1, Semaphore::MAX_PERMITS);
        Budget { sem: Arc::new(Semaphore::new(total)), total }
    }

    fn hold(&self) -> Held {
        Held { budget: self.clone(), permit: None, bytes: 0, waited: Duration::ZERO }
    }
}

/// Bytes of one request taken from the budget; given back when dropped.
struct Held {
    budget: Budget,
    permit: Option<OwnedSemaphorePermit>,
    bytes: usize,
    /// Time spent waiting for room so far.
    waited: Duration,
}

impl Held {
    /// Take `n` more bytes, waiting at most what is left of `BUDGET_WAIT`.
    async fn grow(&mut self, n: usize) -> Result<(), Refused> {
        if n == 0 {
            return Ok(());
        }
        let want = self.bytes.saturating_add(n);
        if want > self.budget.total {
            return Err(Refused::TooLarge(self.budget.total));
        }
        let sem = self.budget.sem.clone();
        let take = async move {
            // Permits are counted in u32; a larger request is taken in pieces.
            let mut got: Option<OwnedSemaphorePermit> = None;
            let mut left = n;
            while left > 0 {
                let piece = left.min(u32::MAX as usize);
                let p = sem.clone().acquire_many_owned(piece as u32).await.map_err(|_| Refused::Busy)?;
                match got.as_mut() {
                    Some(g) => g.merge(p),
                    None => got = Some(p),
                }
                left -= piece;
            }
            Ok::<_, Refused>(got)
        };
        let started = Instant::now();
        let got = tokio::time::timeout(BUDGET_WAIT.saturating_sub(self.waited), take).await;
        self.waited += started.elapsed();
        let got = got.map_err(|_| Refused::Busy)??;
        if let Some(p) = got {
            match self.permit.as_mut() {
                Some(mine) => mine.merge(p),
                None => self.permit = Some(p),
            }
        }
        self.bytes = want;
        metrics::body_bytes_held(n as i64);
        Ok(())
    }

    /// Give back all but `n` bytes.
    fn shrink_to(&mut self, n: usize) {
        if n >= self.bytes {
            return;
        }
        let back = self.bytes - n;
        if let Some(p) = self.permit.as_mut() {
            drop(p.split(back));
        }
        if n == 0 {
            self.permit = None;
        }
        self.bytes = n;
        metrics::body_bytes_held(-(back as i64));
    }
}

impl Drop for Held {
    fn drop(&mut self) {
        metrics::body_bytes_held(-(self.bytes as i64));
    }
}

fn body_timeout(limit: Duration) -> Response {
    let mut res = Problem::new(
        StatusCode::REQUEST_TIMEOUT,
        "body-timeout",
        "Request body timeout",
        format!("the request body did not arrive within {} ms (see --body-read-timeout-ms)", limit.as_millis()),
    )
    .into_response();
    res.headers_mut().insert(header::CONNECTION, HeaderValue::from_static("close"));
    res
}

/// An error of the body stream as a problem: over the body limit, or unreadable (bad gzip, connection lost).
fn read_error(e: axum::Error) -> Response {
    let inner = e.into_inner();
    let mut source: Option<&(dyn std::error::Error + 'static)> = Some(&*inner);
    while let Some(s) = source {
        if s.is::<http_body_util::LengthLimitError>() {
            return Problem::too_large("the request body exceeds the configured limit (see --max-body-bytes)")
                .into_response();
        }
        source = s.source();
    }
    Problem::malformed(format!("could not read the request body: {inner}")).into_response()
}

/// Middleware of the computing routes: the whole body, within the deadline and the budget, before the
/// admission control; the request goes on with the body in memory and the budget it holds.
pub async fn read_first(State(intake): State<Arc<Intake>>, req: Request, next: Next) -> Response {
    let deadline = Instant::now() + intake.read_timeout;
    let (parts, mut body) = req.into_parts();
    let mut held = intake.budget.hold();
    // Bytes are taken from the budget as they arrive, not as declared: a client that announces a large body
    // and sends it slowly holds only what it has sent. A declared length (left only on bodies that are not
    // compressed) that can never fit is refused before anything is read.
    let declared = parts
        .headers
        .get(header::CONTENT_LENGTH)
        .and_then(|v| v.to_str().ok())
        .and_then(|v| v.trim().parse::<usize>().ok());
    if declared.is_some_and(|n| n > intake.budget.total) {
        return Refused::TooLarge(intake.budget.total).problem();
    }
    // A small body usually comes whole in one frame, which is kept as it is (no buffer, no copy).
    let mut first: Option<Bytes> = None;
    let mut buf = BytesMut::new();
    let mut since_yield = 0;
    loop {
        let frame = match tokio::time::timeout_at(deadline, body.frame()).await {
            Err(_) => return body_timeout(intake.read_timeout),
            Ok(None) => break,
            Ok(Some(Err(e))) => return read_error(e),
            Ok(Some(Ok(frame))) => frame,
        };
        let Ok(data) = frame.into_data() else { continue };
        let have = first.as_ref().map_or(buf.len(), Bytes::len);
        let need = have + data.len();
        if need > held.bytes {
            if let Err(r) = held.grow(need - held.bytes).await {
                return r.problem();
            }
        }
        if have == 0 && first.is_none() {
            first = Some(data);
            continue;
        }
        if let Some(f) = first.take() {
            // The declared length (checked above to fit the budget) is reserved at once: growing by doubling
            // copied 7 MB more of an 8 MB body into fresh pages. Address space only: pages are touched as the
            // bytes arrive, and the budget is taken as they do.
            buf.reserve(declared.unwrap_or(0).max(need));
            buf.extend_from_slice(&f);
        }
        buf.extend_from_slice(&data);
        since_yield += data.len();
        if since_yield >= YIELD_EVERY {
            since_yield = 0;
            tokio::task::yield_now().await;
        }
    }
    // The one frame is a piece of hyper's read buffer, held until the JSON is parsed, at once.
    let body = first.unwrap_or_else(|| buf.freeze());
    held.shrink_to(body.len());
    let mut req = Request::from_parts(parts, Body::from(body));
    req.extensions_mut().insert(BodyPermit(Arc::new(held)));
    next.run(req).await
}

/// Why a batch body was cut off.
#[derive(Debug)]
enum PaceError {
    Slow { rate: u64, grace: Duration },
    Budget(Refused),
    Read(axum::Error),
}

impl std::fmt::Display for PaceError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            PaceError::Slow { rate, grace } => write!(
                f,
                "the body came slower than {rate} bytes per second of waiting, after {} ms (see --min-body-rate, --body-read-timeout-ms)",
                grace.as_millis()
            ),
            PaceError::Budget(r) => f.write_str(&r.message()),
            PaceError::Read(e) => write!(f, "{e}"),
        }
    }
}

impl std::error::Error for PaceError {}

/// Middleware of the batch route: its body, paced and budgeted as it streams (see the module's comment).
pub async fn pace(State(intake): State<Arc<Intake>>, req: Request, next: Next) -> Response {
    struct Paced {
        body: Body,
        held: Held,
        /// Time spent waiting for the client (the stream is not timed while the batch is busy computing).
        waited: Duration,
        received: u64,
        /// Bytes since the last line break, at most the longest line (a longer one is skipped by the batch).
        open_line: usize,
        since_yield: usize,
        done: bool,
    }
    let (parts, body) = req.into_parts();
    let st = Paced {
        body,
        held: intake.budget.hold(),
        waited: Duration::ZERO,
        received: 0,
        open_line: 0,
        since_yield: 0,
        done: false,
    };
    let (grace, rate, max_line) = (intake.read_timeout, intake.min_rate, intake.max_line);
    let stream = futures_util::stream::unfold(st, move |mut st| async move {
        if st.done {
            return None;
        }
        if st.since_yield >= YIELD_EVERY {
            st.since_yield = 0;
            tokio::task::yield_now().await;
        }
        loop {
            let allowance = grace + Duration::from_secs_f64(st.received as f64 / rate as f64);
            let started = Instant::now();
            let next = tokio::time::timeout(allowance.saturating_sub(st.waited), st.body.frame()).await;
            st.waited += started.elapsed();
            let fail = |mut st: Paced, e: PaceError| {
                st.done = true;
                st.held.shrink_to(0);
                Some((Err::<Bytes, _>(e), st))
            };
            let data = match next {
                Err(_) => return fail(st, PaceError::Slow { rate, grace }),
                Ok(None) => return None,
                Ok(Some(Err(e))) => return fail(st, PaceError::Read(e)),
                Ok(Some(Ok(frame))) => match frame.into_data() {
                    Ok(data) => data,
                    Err(_) => continue,
                },
            };
            st.received += data.len() as u64;
            st.since_yield += data.len();
            st.open_line = match data.iter().rposition(|&b| b == b'\n') {
                Some(i) => data.len() - i - 1,
                None => st.open_line + data.len(),
            }
            .min(max_line);
            if st.open_line > st.held.bytes {
                let more = st.open_line - st.held.bytes;
                if let Err(r) = st.held.grow(more).await {
                    return fail(st, PaceError::Budget(r));
                }
            } else {
                st.held.shrink_to(st.open_line);
            }
            return Some((Ok(data), st));
        }
    });
    next.run(Request::from_parts(parts, Body::from_stream(stream))).await
}

#[cfg(test)]
mod tests {
    use super::*;

    #[tokio::test]
    async fn the_budget_is_shared_refuses_what_never_fits_and_is_given_back() {
        let b = Budget::new(100);
        let mut a = b.hold();
        a.grow(60).await.unwrap();
        a.grow(30).await.unwrap();
        let mut c = b.hold();
        assert_eq!(c.grow(101).await, Err(Refused::TooLarge(100)));
        assert_eq!(c.grow(20).await, Err(Refused::Busy), "only 10 left");
        a.shrink_to(50);
        assert_eq!(b.sem.available_permits(), 50);
        c.grow(20).await.unwrap();
        drop(a);
        assert_eq!(b.sem.available_permits(), 80);
        c.shrink_to(0);
        assert_eq!(b.sem.available_permits(), 100);
        drop(c);
        assert_eq!(b.sem.available_permits(), 100);
    }

    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn when_more_bodies_arrive_than_fit_some_finish_and_the_rest_give_up_within_the_wait() {
        // 32 bodies of 1 MiB, taken 4 KiB at a time, against a budget of 4 MiB: shared out chunk by chunk
        // none would finish; with one total wait per request the first to wait give up and the rest finish.
        let b = Budget::new(4 << 20);
        let started = Instant::now();
        let bodies: Vec<_> = (0..32)
            .map(|_| {
                let b = b.clone();
                tokio::spawn(async move {
                    let mut h = b.hold();
                    for _ in 0..(1 << 20) / 4096 {
                        h.grow(4096).await?;
                        tokio::task::yield_now().await;
                    }
                    Ok::<_, Refused>(())
                })
            })
            .collect();
        let mut finished = 0;
        for body in bodies {
            match body.await.unwrap() {
                Ok(()) => finished += 1,
                Err(r) => assert_eq!(r, Refused::Busy),
            }
        }
        assert!(finished >= 1, "none finished");
        assert!(started.elapsed() < BUDGET_WAIT * 5, "{:?}", started.elapsed());
        assert_eq!(b.sem.available_permits(), 4 << 20);
    }

    #[tokio::test]
    async fn a_waiting_request_gets_room_given_back_within_the_wait() {
        let b = Budget::new(10);
        let mut a = b.hold();
        a.grow(10).await.unwrap();
        let mut c = b.hold();
        let later = tokio::spawn(async move {
            tokio::time::sleep(Duration::from_millis(50)).await;
            drop(a);
        });
        c.grow(5).await.unwrap();
        later.await.unwrap();
    }
}
