//! Count layers and the tail expectation: for a layer (a, a + l], the expected number of events in it
//! E[min((S - a)+, l)], the probability that it is touched P(S > a) and that it is exhausted P(S >= a + l);
//! and the expected count beyond a quantile, E[S | S > q_level].
//!
//! The expectations come from the exact engine's weighted tilted sums (`exact::layer_expectation`), so a layer
//! far in the tail keeps its relative accuracy; the probabilities are ordinary exact tails.

use super::float::up;
use super::law::{Law, LawValue};
use super::quantiles::quantiles;
use super::{BoundKind, MethodId, Side};

pub struct Layer {
    pub attachment: u64,
    pub limit: Option<u64>,
    pub expected_count: LawValue,
    pub probability_touched: LawValue,
    pub probability_exhausted: LawValue,
}

pub fn layer(law: &Law, attachment: u64, limit: Option<u64>) -> Layer {
    let expected_count = law.layer_expectation(attachment, limit);
    let mut qs = vec![(attachment.saturating_add(1), Side::Upper)];
    if let Some(l) = limit {
        qs.push((attachment.saturating_add(l), Side::Upper));
    }
    let v = law.exact(&qs);
    let exhausted = if limit.is_some() { v[1] } else { LawValue { value: 0.0, ..LawValue::default() } };
    Layer { attachment, limit, expected_count, probability_touched: v[0], probability_exhausted: exhausted }
}

pub struct TailExpectation {
    pub level: f64,
    /// The quantile q at the level (smallest k with P(S <= k) >= level).
    pub quantile: u64,
    /// E[S | S > q], or q when nothing lies beyond it.
    pub expected_count: LawValue,
    /// P(S > q).
    pub probability_beyond: LawValue,
}

pub fn tail_expectation(law: &Law, level: f64) -> TailExpectation {
    let q = quantiles(law, &[level], MethodId::Exact, None).remove(0).count;
    let beyond = law.exact(&[(q.saturating_add(1), Side::Upper)])[0];
    if beyond.value <= 0.0 {
        let v = LawValue {
            value: q as f64,
            ln_value: (q as f64).ln(),
            abs_err: 0.0,
            rel_err: 0.0,
            kind: BoundKind::Rigorous,
        };
        return TailExpectation { level, quantile: q, expected_count: v, probability_beyond: beyond };
    }
    let excess = law.layer_expectation(q, None);
    // E[S | S > q] = q + E[(S - q)+] / P(S > q); relative errors of the ratio add to first order.
    let ratio = excess.value / beyond.value;
    let rel = up(excess.rel_err + beyond.rel_err + excess.rel_err * beyond.rel_err);
    let value = q as f64 + ratio;
    let abs_err = up(ratio * rel + 2.0 * super::float::U * value);
    let kind = if excess.kind == BoundKind::Rigorous && beyond.kind == BoundKind::Rigorous {
        BoundKind::Rigorous
    } else {
        BoundKind::Estimated
    };
    let expected_count = LawValue { value, ln_value: value.ln(), abs_err, rel_err: up(abs_err / value), kind };
    TailExpectation { level, quantile: q, expected_count, probability_beyond: beyond }
}
