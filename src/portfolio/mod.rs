//! The portfolio: what a client sends (`spec`), how generated sequences are expanded (`families`), and the
//! validated, normalised model that the engine computes on (`model`).
//!
//! Nothing here does probability theory beyond expanding formulas into probabilities; the law of the count
//! lives in `engine`.

pub mod families;
pub mod model;
pub mod objects;
pub mod spec;
pub mod stress;
pub mod validate;

pub use model::{Binomial, Model};
pub use spec::{ExposureId, FamilySpec, GroupSpec, PortfolioSpec};
pub use validate::{Limits, Violation};
