//! POST /v1/reverse-stress: the largest probability factor, odds factor or rho that keeps a tail under a level.

use crate::analytics::reverse_stress::{ReverseStress, ReverseStressRequest, ReverseStressResponse};
use crate::api::responses::ComputingProblems;

json_route! {
    /// Reverse stress: how far the probabilities (or the dependence) may move before P(S >= k) exceeds a level.
    reverse_stress: ReverseStress, ReverseStressRequest => ReverseStressResponse,
    path = "/v1/reverse-stress", tag = "analytics",
    ok = "The largest value keeping the tail under the level, with the bracket its bounds prove"
}
