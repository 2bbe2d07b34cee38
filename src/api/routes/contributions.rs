//! POST /v1/contributions: which exposures drive a tail (each exposure's sensitivity dP(S >= k)/dp_i, its
//! leave-one-out tail and its impact), ranked.

use crate::analytics::contributions::{Contributions, ContributionsRequest, ContributionsResponse};
use crate::api::responses::ComputingProblems;

json_route! {
    /// Tail drivers: every exposure's sensitivity and leave-one-out tail.
    contributions: Contributions, ContributionsRequest => ContributionsResponse,
    path = "/v1/contributions", tag = "analytics",
    ok = "Every exposure's sensitivity and leave-one-out tail, ranked"
}
