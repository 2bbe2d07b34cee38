//! The whole distribution over a range of counts: pmf, cdf P(S <= k) and survival P(S > k), each exact with
//! its bound and logarithm, and the range that holds all but a given mass.
//!
//! Every value comes from the exact engine's tilted laws (one per cluster of nearby counts), so far-tail
//! values keep their relative accuracy and their logarithms stay finite where the values underflow.

use super::law::{Law, LawValue};
use super::quantiles::quantiles;
use super::{MethodId, Side};

pub struct Table {
    pub from: u64,
    pub to: u64,
    pub pmf: Vec<LawValue>,
    pub cdf: Vec<LawValue>,
    /// P(S > k).
    pub sf: Vec<LawValue>,
}

pub fn table(law: &Law, from: u64, to: u64) -> Table {
    let mut queries = Vec::with_capacity(3 * (to - from + 1) as usize);
    for k in from..=to {
        queries.push((k, Side::Point));
        queries.push((k, Side::Lower));
        queries.push((k.saturating_add(1), Side::Upper));
    }
    let vals = law.exact(&queries);
    let pick = |o: usize| vals.iter().skip(o).step_by(3).copied().collect::<Vec<_>>();
    Table { from, to, pmf: pick(0), cdf: pick(1), sf: pick(2) }
}

/// The smallest range [a, b] with P(S < a) <= mass / 2 and P(S > b) <= mass / 2 (by exact values).
pub fn central_range(law: &Law, mass: f64) -> (u64, u64) {
    let q = quantiles(law, &[mass / 2.0, 1.0 - mass / 2.0], MethodId::Exact, None);
    // P(S <= a - 1) < mass/2 at the lower quantile a; the upper quantile b has P(S <= b) >= 1 - mass/2.
    (q[0].count, q[1].count)
}
