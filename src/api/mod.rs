//! The HTTP API: wire types, the problem-details error, the JSON extractor, routes and the OpenAPI document.
//! Handlers validate, hand the work to the engine off the async threads, and copy the answer into wire form.

pub mod extract;
pub mod metrics;
pub mod openapi;
pub mod problem;
pub mod routes;
pub mod scenario;
pub mod types;

use crate::config::ServiceLimits;
use std::sync::Arc;

/// Shared state of the handlers.
#[derive(Clone)]
pub struct AppState {
    pub limits: Arc<ServiceLimits>,
}
