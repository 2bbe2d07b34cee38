//! The HTTP API: wire types, the problem-details error, the JSON extractor, routes and the OpenAPI document.
//! Handlers validate, hand the work to the engine off the async threads, and copy the answer into wire form.

pub mod batch;
pub mod cancel;
pub mod extract;
pub mod metrics;
pub mod openapi;
pub mod problem;
pub mod routes;
pub mod scenario;
pub mod types;

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
