//! The exact method for small books: the whole law by the textbook recursion, every threshold read from it.
//!
//! Why. A request of a few hundred exposures is answered in microseconds, and there the tilted engine's fixed
//! costs (a tilt solve per cluster of thresholds, leaves, products, the scale K(t)) are most of the time. The
//! recursion
//!   q_(i)(j) = q_(i-1)(j) (1 - p_i) + q_(i-1)(j - 1) p_i
//! costs n^2 / 2 multiply-adds for all thresholds and sides at once, which is cheaper below `MAX_STEPS`
//! exposures (measured: `examples/small_books.rs`).
//!
//! Error (the floating-point model of `numerics::float`: fl(x op y) = (x op y)(1 + d), |d| <= U, plus an
//! absolute error of at most ETA = 2^-1074 per product that underflows; no fused multiply-add is assumed, one
//! changes nothing below). Every quantity is non-negative, so there is no cancellation: an entry after step i
//! is a sum of products over paths, each path's product picking up at most 3 roundings per step (1 - p_i,
//! the product, the sum), so every entry carries a relative error of at most gamma(3 n). A tail is a sum of at
//! most n + 1 entries, which adds gamma(n) (recursive summation), and the complement side is never needed
//! since every side is summed directly. Underflow: an absolute error e injected into an entry is carried into
//! the next step with the weights (1 - p_i) and p_i, whose sum is 1 up to the same roundings, so the L1 norm of
//! all underflow errors is at most 2 (n + 1) n ETA (1 + gamma(3 n)), below 1e-318 for every book taken here.
//! Values below `FLOOR` are left to the tilted engine, which keeps their relative accuracy and logarithm.
//!
//! The bound is checked against exact rational enumeration in tests/exact_rational.rs and the unit tests below.

use crate::engine::numerics::float::{gamma, up};
use crate::engine::vocabulary::{BoundKind, Side, Value};
use crate::portfolio::Model;

/// Random exposures (listed and group members) up to which the recursion is used.
pub const MAX_STEPS: u64 = 320;

/// Smallest value answered here: below it the underflow term could matter and the logarithm would lose digits.
const FLOOR: f64 = 1e-280;

/// The smallest subnormal, 2^-1074: at least the absolute error of one product that underflows (half of it,
/// which f64 cannot hold).
const ETA: f64 = 5e-324;

/// Whether the recursion takes this model: bounded counts (no Poisson part, no lattice) of at most
/// `MAX_STEPS` random exposures.
pub fn takes(model: &Model) -> bool {
    !model.weighted() && model.poisson == 0.0 && model.random_exposures_bounded() <= MAX_STEPS
}

/// The law of the random exposures' count, q[j] = P(S - shift = j), for j = 0..=n.
fn law(model: &Model) -> Vec<f64> {
    let n = model.random_exposures_bounded() as usize;
    // Two buffers in turn: each step reads one whole and writes the other, a loop the compiler vectorises.
    let mut q = vec![0.0; n + 1];
    let mut next = vec![0.0; n + 1];
    q[0] = 1.0;
    let mut top = 0usize;
    let members = model.binomials.iter().flat_map(|b| std::iter::repeat_n(b.p, b.size as usize));
    for p in model.bernoulli.iter().copied().chain(members) {
        let a = 1.0 - p;
        next[0] = q[0] * a;
        for (nj, w) in next[1..=top].iter_mut().zip(q[..=top].windows(2)) {
            *nj = w[1] * a + w[0] * p;
        }
        top += 1;
        next[top] = q[top - 1] * p;
        std::mem::swap(&mut q, &mut next);
    }
    q
}

/// Every query's value with its rigorous bound, or None when one of them is below `FLOOR` (then the caller
/// uses the tilted engine for all of them). Queries the support decides are answered by the caller first;
/// here every threshold is read from the law.
pub fn evaluate(model: &Model, queries: &[(u64, Side)]) -> Option<Vec<Value>> {
    let q = law(model);
    let n = q.len() - 1;
    let nf = n as f64;
    let entry = gamma(3.0 * nf);
    let underflow = up(2.0 * (nf + 1.0) * nf * ETA * (1.0 + entry));
    let shift = model.shift;
    let mut out = Vec::with_capacity(queries.len());
    for &(k, side) in queries {
        // Index of k among the random exposures' counts (k may lie below the shift or above the top).
        let j = k as i128 - shift as i128;
        let (range, terms) = match side {
            Side::Upper => (j.max(0)..=n as i128, n),
            Side::Lower => (0..=j.min(n as i128), n),
            Side::Point => (j..=j, 1),
        };
        let mut sum = 0.0;
        for i in range {
            if (0..=n as i128).contains(&i) {
                sum += q[i as usize];
            }
        }
        if sum.is_nan() || sum < FLOOR {
            return None;
        }
        // The computed sum is truth (1 + theta) + e with |theta| <= rel and |e| <= underflow, so
        // |sum - truth| <= rel truth + e and truth <= (sum + e) / (1 - rel).
        let rel = up(entry + gamma(terms as f64) + entry * gamma(terms as f64));
        let truth_max = up(up(sum + underflow) / (1.0 - rel) * (1.0 + 2.0 * f64::EPSILON));
        let abs_err = up(up(truth_max * rel) + underflow);
        let value = sum.min(1.0);
        let rel_err = up(abs_err / ((value - abs_err) * (1.0 - 2.0 * f64::EPSILON)));
        out.push(Value { value, ln_value: value.ln(), abs_err, rel_err, kind: BoundKind::Rigorous });
    }
    Some(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Brute force over all 2^n outcomes in exact binary fractions: with probabilities that are multiples of
    /// 1/8 and n <= 12, every product and sum is exact in f64, so the enumeration is the truth.
    #[test]
    fn recursion_matches_enumeration_of_dyadic_books() {
        let ps = [0.125, 0.5, 0.875, 0.25, 0.375, 0.625, 0.75, 0.125, 0.5, 0.25];
        let model = Model::from_parts(&ps, &[(2, 0.375)], 0.0);
        let n = ps.len() + 2;
        let all: Vec<f64> = ps.iter().copied().chain([0.375, 0.375]).collect();
        let mut truth = vec![0.0; n + 1];
        for mask in 0u32..(1 << n) {
            let mut pr = 1.0;
            for (i, &p) in all.iter().enumerate() {
                pr *= if mask >> i & 1 == 1 { p } else { 1.0 - p };
            }
            truth[mask.count_ones() as usize] += pr;
        }
        let queries: Vec<(u64, Side)> =
            (0..=n as u64).flat_map(|k| [(k, Side::Upper), (k, Side::Lower), (k, Side::Point)]).collect();
        let vals = evaluate(&model, &queries).expect("no value below the floor");
        for (&(k, side), v) in queries.iter().zip(&vals) {
            let k = k as usize;
            let t: f64 = match side {
                Side::Upper => truth[k..].iter().sum(),
                Side::Lower => truth[..=k].iter().sum(),
                Side::Point => truth[k],
            };
            assert!((v.value - t).abs() <= v.abs_err, "{k} {side:?}: {} vs {t}", v.value);
        }
    }

    /// The underflow allowance is not zero (2^-1075 rounds to 0 in f64; 2^-1074 does not).
    #[test]
    fn underflow_allowance_is_positive() {
        assert!(ETA > 0.0 && ETA == f64::from_bits(1));
    }

    /// A value below the floor is left to the tilted engine.
    #[test]
    fn tiny_values_are_declined() {
        let model = Model::from_parts(&[1e-200, 1e-200], &[], 0.0);
        assert!(evaluate(&model, &[(2, Side::Upper)]).is_none());
        assert!(evaluate(&model, &[(1, Side::Upper)]).is_some());
    }
}
