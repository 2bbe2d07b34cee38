//! The words every method and every question shares: which probability (`Side`), which method (`MethodId`),
//! how far a bound can be trusted (`BoundKind`), a value with its error (`Value`), one method's answer
//! (`Estimate`), the accuracy a client asks for (`Tolerance`, and `auto`'s `Selection`), the portfolio
//! prepared once per request (`Prepared`), and the trait every method implements (`TailMethod`).

use super::numerics::float;
use super::numerics::moments::Moments;
use crate::portfolio::Model;
use serde::{Deserialize, Serialize};
use std::time::Instant;
use utoipa::ToSchema;

/// Which probability a threshold asks for.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Default, Serialize, Deserialize, ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum Side {
    /// P(S >= k).
    #[default]
    Upper,
    /// P(S <= k).
    Lower,
    /// P(S = k).
    Point,
}

/// Whether an error bound is proven (`rigorous`: every step of the error analysis bounded in full under IEEE double
/// rounding to nearest and libm exp/ln within 1 ulp, so the true error is never larger) or an estimate of the
/// likely error (`estimated`: covered the actual error in at least 99% of a 10,000-portfolio test, not always).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum BoundKind {
    Rigorous,
    Estimated,
}

impl BoundKind {
    /// The kind of a figure made from two: rigorous only when both are.
    pub fn and(self, other: BoundKind) -> BoundKind {
        if self == BoundKind::Rigorous && other == BoundKind::Rigorous {
            BoundKind::Rigorous
        } else {
            BoundKind::Estimated
        }
    }
}

/// The methods the engine offers.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize, ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum MethodId {
    Exact,
    Normal,
    Edgeworth,
    Poisson,
    Saddlepoint,
    /// The cheapest method whose rigorous bound meets the tolerance.
    Auto,
}

/// A value (a probability or an expectation) with its logarithm, its error bounds and the bounds' kind: the
/// one value-with-error type of the engine and the analytics.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Value {
    pub value: f64,
    /// ln of the value, finite where the value underflows f64 (-inf only when the value is 0).
    pub ln_value: f64,
    /// Bound on |value - truth|, rounded up (never 0 when the truth is not exactly known).
    pub abs_err: f64,
    /// Bound on |value - truth| / truth (infinite when it cannot be stated relative, e.g. truth = 0).
    pub rel_err: f64,
    pub kind: BoundKind,
}

impl Value {
    /// A value known exactly.
    pub fn certain(p: f64) -> Value {
        Value { value: p, ln_value: p.ln(), rel_err: 0.0, abs_err: 0.0, kind: BoundKind::Rigorous }
    }

    /// The logarithm where it is finite (the wire form: null for a value of exactly 0).
    pub fn ln(&self) -> Option<f64> {
        self.ln_value.is_finite().then_some(self.ln_value)
    }
}

impl Default for Value {
    fn default() -> Self {
        Value { value: 0.0, ln_value: f64::NEG_INFINITY, abs_err: 0.0, rel_err: 0.0, kind: BoundKind::Rigorous }
    }
}

/// One method's answer for one threshold: its value and bounds, with what the method reports besides.
#[derive(Debug, Clone, PartialEq)]
pub struct Estimate {
    pub method: MethodId,
    pub probability: f64,
    pub ln_probability: f64,
    /// Bound on |probability - truth|.
    pub error_bound: f64,
    /// Bound on |probability - truth| / truth, where the method gives one.
    pub relative_error_bound: Option<f64>,
    pub bound_kind: BoundKind,
    /// Compute time attributed to this estimate, in microseconds.
    pub elapsed_us: f64,
    /// ln of a rigorous Chernoff upper bound on the probability (saddlepoint only).
    pub chernoff_ln_bound: Option<f64>,
    /// Why `auto` chose this method.
    pub selection: Option<Selection>,
}

impl Estimate {
    pub fn new(
        method: MethodId,
        probability: f64,
        ln_probability: f64,
        error_bound: f64,
        bound_kind: BoundKind,
        start: Instant,
    ) -> Estimate {
        Estimate {
            method,
            probability,
            ln_probability,
            error_bound: float::up(error_bound),
            relative_error_bound: None,
            bound_kind,
            elapsed_us: start.elapsed().as_secs_f64() * 1e6,
            chernoff_ln_bound: None,
            selection: None,
        }
    }

    /// An estimate carrying a value as it stands (its bounds are not rounded again).
    pub fn of_value(method: MethodId, v: Value, elapsed_us: f64) -> Estimate {
        Estimate {
            method,
            probability: v.value,
            ln_probability: v.ln_value,
            error_bound: v.abs_err,
            relative_error_bound: Some(v.rel_err),
            bound_kind: v.kind,
            elapsed_us,
            chernoff_ln_bound: None,
            selection: None,
        }
    }

    /// The estimate as a value (no relative bound: infinite).
    pub fn value(&self) -> Value {
        Value {
            value: self.probability,
            ln_value: self.ln_probability,
            abs_err: self.error_bound,
            rel_err: self.relative_error_bound.unwrap_or(f64::INFINITY),
            kind: self.bound_kind,
        }
    }

    pub fn renamed(mut self, m: MethodId) -> Estimate {
        self.method = m;
        self
    }

    /// [lo, hi] clipped to [0, 1], where the truth lies given the bound.
    pub fn interval(&self) -> (f64, f64) {
        ((self.probability - self.error_bound).max(0.0), (self.probability + self.error_bound).min(1.0))
    }
}

/// The accuracy a client asks for.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize, ToSchema)]
#[serde(rename_all = "snake_case", deny_unknown_fields)]
pub enum Tolerance {
    /// |estimate - truth| <= a.
    Absolute(f64),
    /// |estimate - truth| <= r * truth.
    Relative(f64),
}

impl Tolerance {
    pub fn met_by(&self, e: &Estimate) -> bool {
        if e.bound_kind != BoundKind::Rigorous {
            return false;
        }
        match *self {
            Tolerance::Absolute(a) => e.error_bound <= a,
            Tolerance::Relative(r) => {
                e.error_bound <= r * (e.probability - e.error_bound).max(0.0) || e.error_bound == 0.0
            }
        }
    }
}

/// One candidate that `auto` checked.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, ToSchema)]
pub struct Check {
    pub method: MethodId,
    pub error_bound: f64,
    pub meets_tolerance: bool,
    pub elapsed_us: f64,
}

/// Why `auto` chose what it chose.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, ToSchema)]
pub struct Selection {
    pub tolerance: Tolerance,
    pub chosen: MethodId,
    pub checked: Vec<Check>,
}

/// The portfolio with its one-pass summaries, computed once per request.
pub struct Prepared<'a> {
    pub model: &'a Model,
    pub moments: Moments,
}

impl<'a> Prepared<'a> {
    pub fn new(model: &'a Model) -> Self {
        Prepared { model, moments: Moments::of(model) }
    }
}

/// What every method implements: estimates for a batch of (threshold, side) queries, in order.
pub trait TailMethod {
    fn estimate(&self, prep: &Prepared, queries: &[(u64, Side)]) -> Vec<Estimate>;
}
