//! POST /v1/tail: tail, cumulative or point probabilities at a list of thresholds, one estimate per method.

use crate::analytics::tail::{Tail, TailRequest, TailResponse};
use crate::api::responses::ComputingProblems;

json_route! {
    /// Probabilities P(S >= k), P(S <= k) or P(S = k) with error bounds.
    tail: Tail, TailRequest => TailResponse,
    path = "/v1/tail", tag = "probabilities", ok = "One result per threshold, one estimate per method"
}
