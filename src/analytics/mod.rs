//! The analytics layer: the questions a client asks of a portfolio's law, between the API (which only decodes
//! and encodes) and the engine (which only computes).
//!
//! Every question is one type implementing [`Analytic`], run by the one pipeline [`run`]:
//!
//! 1. `check`: the question's own fields, with JSON pointers;
//! 2. the scenario's fields (stress, dependence) and the portfolio, validated into a model (`scenario`);
//! 3. `check_model`: rules that need the model (e.g. the largest count served with a Poisson part);
//! 4. the work budget, from the question's `evaluations` and the scenario's multiplier, and the memory
//!    ceiling, from the question's `footprint` (`cost`);
//! 5. `answer` on the law (stressed when a stress is named), then again on the base law under stress.
//!
//! The question's request and answer types live beside it (they are the wire format: serde and utoipa
//! derives, no HTTP). Errors are [`Error`]: invalid with violations, too large, or cancelled; the API maps
//! them to problem details. Cancellation (`cancel`) is checked by the pipeline between its steps and by each
//! question between its units of work.

pub mod cancel;
pub mod chart;
pub mod checks;
pub mod contributions;
pub mod cost;
pub mod dependence;
pub mod distribution;
pub mod error;
pub mod factor;
pub mod law;
pub mod layers;
pub mod pipeline;
pub mod quantiles;
pub mod reverse_stress;
pub mod scenario;
pub mod tail;

pub use error::Error;
pub use pipeline::{run, Analytic, Ctx, Inputs};
