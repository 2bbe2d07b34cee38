//! Running a question: off the async threads on the blocking pool, with a cancellation flag whose guard
//! lives in the calling future, so that when the timeout (or a client going away) drops that future the
//! computation sees the flag and stops; or, when the request alone bounds its work below
//! `cost::INLINE_WORK`, at once on the async worker (the hand-off would cost more than the question, and
//! the question holds the worker for well under a millisecond, so neither the timeout nor cancellation has
//! anything to stop). Also the mapping of the analytics' errors to problem details.

use super::problem::Problem;
use crate::analytics::cancel::Cancel;
use crate::analytics::{self, Analytic};
use crate::api::Admitted;
use crate::config::ServiceLimits;
use crate::telemetry::metrics;
use axum::http::StatusCode;
use std::sync::Arc;

impl From<analytics::Error> for Problem {
    fn from(e: analytics::Error) -> Problem {
        match e {
            analytics::Error::Invalid(errs) => Problem::invalid(errs),
            analytics::Error::TooLarge(detail) => Problem::too_large(detail),
            // Nobody is expected to read this answer (the request timed out or the client left); 408 is the
            // usual reason.
            analytics::Error::Cancelled => Problem::new(
                StatusCode::REQUEST_TIMEOUT,
                "timeout",
                "Request timeout",
                "the computation was abandoned: its time ran out or the client went away",
            ),
        }
    }
}

/// Answer `req` with the question `A` on the blocking pool. The request's admission (its computing turn)
/// moves into the blocking work and is given back only when that work has ended: a timed-out request is
/// answered 408 at once, but its turn stays taken until its computation has stopped (within one unit of
/// work of the engine's loops), so the admission limit counts every computation that runs.
pub async fn answer<A>(
    req: A::Request,
    limits: Arc<ServiceLimits>,
    admitted: Option<Admitted>,
) -> Result<A::Answer, Problem>
where
    A: Analytic,
    A::Request: Send + 'static,
    A::Answer: Send + 'static,
{
    if analytics::cost::inline_work::<A>(&req).is_some_and(|w| w <= analytics::cost::INLINE_WORK) {
        let _turn = admitted;
        metrics::count_inline();
        return analytics::run::<A>(&req, &limits, &Cancel::never()).map_err(Problem::from);
    }
    let (cancel, _guard) = Cancel::pair();
    tokio::task::spawn_blocking(move || {
        let _turn = admitted;
        analytics::run::<A>(&req, &limits, &cancel).map_err(Problem::from)
    })
    .await
    .map_err(|e| Problem::internal(format!("computation failed: {e}")))?
}
