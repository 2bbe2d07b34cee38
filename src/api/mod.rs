//! The HTTP API: decode a request, call the analytics, encode the answer. Here are the problem-details error,
//! the JSON extractor, the routes (one file each), the batch dispatcher (NDJSON), the SVG drawing of a chart,
//! the OpenAPI document and the shared state of the handlers. No computation happens here: the questions and
//! their wire types live in `crate::analytics`.

pub mod batch;
pub mod decode;
pub mod encode;
pub mod extract;
pub mod integral;
pub mod offload;
pub mod openapi;
pub mod problem;
pub mod responses;
pub mod routes;
pub mod svg;
pub mod tables;

use crate::config::{BatchLimits, ServiceLimits};
use std::sync::Arc;

/// Shared state of the handlers.
#[derive(Clone)]
pub struct AppState {
    pub limits: Arc<ServiceLimits>,
    pub batch: BatchLimits,
}

/// A computing request's admission (its place and its turn), left in the request's extensions so that an
/// answer that streams after its handler has returned (POST /v1/batch) can hold it to the last byte.
#[derive(Clone)]
pub struct Admitted(pub Arc<dyn Send + Sync>);
