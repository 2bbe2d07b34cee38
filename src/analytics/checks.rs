//! Field checks that several questions share: the size of a list, a tolerance, and the largest count served
//! with a Poisson part. Each names the offending field by JSON pointer.

use super::error::Error;
use super::scenario::MAX_UNBOUNDED_COUNT;
use crate::engine::{MethodId, Tolerance};
use crate::portfolio::{Model, Violation};

/// A list that must hold at least one item and at most `max` (`noun`: the item's name, singular and plural).
pub fn list_size(at: &str, noun: (&str, &str), len: usize, max: usize, errs: &mut Vec<Violation>) {
    if len == 0 {
        errs.push(Violation::new(at, format!("at least one {} is required", noun.0)));
    }
    if len > max {
        errs.push(Violation::new(at, format!("{len} {} exceed the limit of {max}", noun.1)));
    }
}

/// Methods asked at most once each: a repeat would only repeat work and answer (and the list is then
/// bounded by the number of methods).
pub fn distinct_methods(methods: &[MethodId], errs: &mut Vec<Violation>) {
    for (i, m) in methods.iter().enumerate() {
        if let Some(j) = methods[..i].iter().position(|x| x == m) {
            errs.push(Violation::new(
                format!("/methods/{i}"),
                format!("repeats /methods/{j}; ask for each method once"),
            ));
        }
    }
}

/// Check a tolerance's value, at its pointer.
pub fn check_tolerance(tol: Option<Tolerance>, errs: &mut Vec<Violation>) {
    if let Some(t) = tol {
        let (v, field) = match t {
            Tolerance::Absolute(a) => (a, "/tolerance/absolute"),
            Tolerance::Relative(r) => (r, "/tolerance/relative"),
        };
        if !(v.is_finite() && v > 0.0) {
            errs.push(Violation::new(field, format!("must be a finite number > 0, got {v}")));
        }
    }
}

/// Counts (thresholds, range ends) over the largest one served with a Poisson part, as violations at the
/// given pointers; none when the model has no Poisson part.
pub fn unbounded_counts(
    model: &Model,
    counts: impl IntoIterator<Item = (String, u64)>,
    what: &str,
) -> Result<(), Error> {
    if model.support_max().is_some() {
        return Ok(());
    }
    let bad: Vec<Violation> = counts
        .into_iter()
        .filter(|(_, k)| *k > MAX_UNBOUNDED_COUNT)
        .take(20)
        .map(|(at, k)| {
            Violation::new(
                at,
                format!("{k} exceeds {MAX_UNBOUNDED_COUNT}, the largest {what} served with a Poisson part"),
            )
        })
        .collect();
    if bad.is_empty() {
        Ok(())
    } else {
        Err(Error::Invalid(bad))
    }
}

/// Check the factor model's quadrature tolerance, at its pointer: relative 0 or in [1e-13, 1), absolute finite
/// and >= 0, not both 0.
pub fn check_factor_tolerance(t: &super::dependence::FactorTolerance, at: &str, errs: &mut Vec<Violation>) {
    if let Some(r) = t.relative {
        if !(r == 0.0 || (r.is_finite() && (1e-13..1.0).contains(&r))) {
            errs.push(Violation::new(format!("{at}/relative"), format!("must be 0 or in [1e-13, 1), got {r}")));
        }
    }
    if let Some(a) = t.absolute {
        if !(a.is_finite() && a >= 0.0) {
            errs.push(Violation::new(format!("{at}/absolute"), format!("must be a finite number >= 0, got {a}")));
        }
    }
    if t.relative == Some(0.0) && t.absolute == Some(0.0) {
        errs.push(Violation::new(at, "relative and absolute cannot both be 0"));
    }
}
