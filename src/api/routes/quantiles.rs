//! POST /v1/quantiles: the smallest count k with P(S <= k) >= level, for each level and method, with the
//! bracket P(S <= k - 1) < level <= P(S <= k) and the counts consistent with the method's error bound.

use crate::analytics::quantiles::{Quantiles, QuantilesRequest, QuantilesResponse};
use crate::api::responses::ComputingProblems;

json_route! {
    /// Quantiles of the count.
    quantiles: Quantiles, QuantilesRequest => QuantilesResponse,
    path = "/v1/quantiles", tag = "analytics", ok = "One quantile per level and method"
}
