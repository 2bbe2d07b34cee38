//! The computation core: the law of the count S and its approximations, with no HTTP in it.
//!
//! Every method answers the same question, a probability for a threshold and a side, and returns an
//! [`Estimate`]: the value, its natural logarithm (exact even where the value underflows f64), an absolute error
//! bound and the kind of that bound. One file per method (`exact/`, `normal`, `edgeworth`, `poisson`,
//! `saddlepoint`, and `select` for `auto`), each implementing [`TailMethod`]; `exact` is the reference every
//! other method is checked against. `numerics/` holds the tools they share (floating-point model, moments,
//! cumulant generating function, normal law, quadrature); `vocabulary` the shared words.

pub mod dispatch;
pub mod edgeworth;
pub mod exact;
pub mod interrupt;
pub mod normal;
pub mod numerics;
pub mod poisson;
pub mod saddlepoint;
pub mod select;
pub mod vocabulary;

pub use dispatch::run;
pub use vocabulary::{BoundKind, Estimate, MethodId, Prepared, Side, TailMethod, Tolerance, Value};
