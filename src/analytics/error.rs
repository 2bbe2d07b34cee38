//! Why a question was not answered: the one error type of the analytics, mapped to problem details by the
//! API.

use crate::portfolio::Violation;

/// Why a question was not answered.
#[derive(Debug, Clone, PartialEq)]
pub enum Error {
    /// Fields break the rules; each violation names its field by JSON pointer.
    Invalid(Vec<Violation>),
    /// The request is within the rules but over a size or work limit; the text says which and by how much.
    TooLarge(String),
    /// Nobody waits for the answer any more (timeout, client gone).
    Cancelled,
}
