//! POST /v1/layers: count layers (expected events in the layer, probability touched and exhausted) and the
//! expected count beyond quantiles (conditional tail expectation of the count).

use crate::analytics::layers::{Layers, LayersRequest, LayersResponse};
use crate::api::responses::ComputingProblems;

json_route! {
    /// Count layers and conditional tail expectations.
    layers: Layers, LayersRequest => LayersResponse,
    path = "/v1/layers", tag = "analytics", ok = "One result per layer and per tail level"
}
