//! Running a question off the async threads: on the blocking pool, with a cancellation flag whose guard
//! lives in the calling future, so that when the timeout (or a client going away) drops that future the
//! computation sees the flag and stops. Also the mapping of the analytics' errors to problem details.

use super::problem::Problem;
use crate::analytics::cancel::Cancel;
use crate::analytics::{self, Analytic};
use crate::config::ServiceLimits;
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

/// Answer `req` with the question `A` on the blocking pool.
pub async fn answer<A>(req: A::Request, limits: Arc<ServiceLimits>) -> Result<A::Answer, Problem>
where
    A: Analytic,
    A::Request: Send + 'static,
    A::Answer: Send + 'static,
{
    let (cancel, _guard) = Cancel::pair();
    tokio::task::spawn_blocking(move || analytics::run::<A>(&req, &limits, &cancel).map_err(Problem::from))
        .await
        .map_err(|e| Problem::internal(format!("computation failed: {e}")))?
}
