//! The exact engine against an exact reference: every probability recomputed in arbitrary-precision rational
//! arithmetic (num-rational's BigRational, a general-purpose library) from the same f64 inputs, which are
//! dyadic rationals and so convert without loss.

#[path = "common/bignum.rs"]
mod bignum;

use num_bigint::BigInt;
use num_rational::BigRational;
use num_traits::{One, Signed, ToPrimitive, Zero};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use tailtally::engine::{exact, numerics::moments::Moments, Side};
use tailtally::portfolio::Model;

fn rat(x: f64) -> BigRational {
    BigRational::from_float(x).expect("finite")
}

/// p = a / 2^e exactly, with a an integer (every finite f64 is a dyadic rational).
fn dyadic(p: f64) -> (BigInt, u32) {
    let r = rat(p);
    let e = r.denom().bits() - 1;
    (r.numer().clone(), e as u32)
}

/// Exact pmf of the model (no Poisson part) by polynomial multiplication in integers: every probability is
/// written over the common denominator 2^E, so the j-th coefficient is P(S = j) * 2^(E m) for m factors.
fn exact_pmf(model: &Model) -> Vec<BigRational> {
    let mut ps: Vec<f64> = model.bernoulli.clone();
    for b in &model.binomials {
        ps.extend(std::iter::repeat_n(b.p, b.size as usize));
    }
    let e = ps.iter().map(|&p| dyadic(p).1).max().unwrap_or(0);
    let one = BigInt::one() << e;
    let mut c = vec![BigInt::one()];
    for &p in &ps {
        let (a, ea) = dyadic(p);
        let a = a << (e - ea);
        let q = &one - &a;
        let mut n = vec![BigInt::zero(); c.len() + 1];
        for (j, x) in c.iter().enumerate() {
            n[j] += x * &q;
            n[j + 1] += x * &a;
        }
        c = n;
    }
    let den = BigInt::one() << (e as usize * ps.len());
    let mut out = vec![BigRational::zero(); model.shift as usize];
    out.extend(c.into_iter().map(|x| BigRational::new(x, den.clone())));
    out
}

/// ln of a positive rational (-inf for 0).
fn ln_rat(x: &BigRational) -> f64 {
    if x.is_zero() {
        return f64::NEG_INFINITY;
    }
    bignum::ln_ratio(x.numer().magnitude(), x.denom().magnitude())
}

fn random_model(rng: &mut ChaCha8Rng) -> Model {
    let n = rng.gen_range(1..=160);
    let mut ps = Vec::new();
    for _ in 0..n {
        let kind = rng.gen_range(0..10);
        let p: f64 = match kind {
            0 => 0.0,
            1 => 1.0,
            2 | 3 => 10f64.powf(-rng.gen_range(1.0..12.0)),
            4 => 1.0 - 10f64.powf(-rng.gen_range(1.0..9.0)),
            _ => rng.gen_range(0.0..1.0),
        };
        ps.push(p);
    }
    let mut groups = Vec::new();
    if rng.gen_bool(0.3) {
        groups.push((rng.gen_range(2..40), rng.gen_range(0.01..0.9)));
    }
    Model::from_parts(&ps, &groups, 0.0)
}

#[test]
fn random_portfolios_agree_with_rational_arithmetic() {
    // Worst observed errors, reported on failure so a regression is visible.
    let mut worst_rel: f64 = 0.0;
    let (mut checked, mut recursion_cases) = (0usize, 0usize);
    let mut rng = ChaCha8Rng::seed_from_u64(20261201);
    for case in 0..36 {
        let model = random_model(&mut rng);
        let pmf = exact_pmf(&model);
        let n = pmf.len() as u64;
        let mom = Moments::of(&model);
        let mut queries = Vec::new();
        for k in 0..=n {
            for side in [Side::Upper, Side::Lower, Side::Point] {
                queries.push((k, side));
            }
        }
        // Both paths of the exact method: `evaluate` (the recursion of `exact::small` for books this small,
        // unless a value is below its floor) and tilted laws alone.
        let (vals, work) = exact::evaluate(&model, &mom, &queries);
        recursion_cases += usize::from(work.tilts == 0);
        let by_path = [("evaluate", vals), ("tilted", exact::evaluate_tilted(&model, &mom, &queries).0)];
        // Prefix sums in exact arithmetic.
        let mut cdf = Vec::with_capacity(pmf.len());
        let mut acc = BigRational::zero();
        for x in &pmf {
            acc += x;
            cdf.push(acc.clone());
        }
        let total = acc;
        assert!(total == BigRational::one(), "case {case}: the reference pmf must sum to 1");
        for (&(k, side), v, path) in
            by_path.iter().flat_map(|(path, vals)| queries.iter().zip(vals).map(move |(q, v)| (q, v, *path)))
        {
            let ki = k as usize;
            let truth = match side {
                Side::Point => pmf.get(ki).cloned().unwrap_or_else(BigRational::zero),
                Side::Lower => cdf.get(ki).cloned().unwrap_or_else(|| total.clone()),
                Side::Upper => {
                    if ki == 0 {
                        total.clone()
                    } else {
                        &total - cdf.get(ki - 1).cloned().unwrap_or_else(|| total.clone())
                    }
                }
            };
            checked += 1;
            if truth.is_zero() {
                assert_eq!(v.value, 0.0, "{path} case {case} k={k} {side:?}: truth is 0");
                continue;
            }
            let ln_truth = ln_rat(&truth);
            let rel = if v.value >= f64::MIN_POSITIVE {
                // Representable: the relative error itself, in exact arithmetic.
                let diff = (rat(v.value) - &truth).abs();
                assert!(
                    diff <= rat(v.abs_err),
                    "{path} case {case} k={k} {side:?}: |p - truth| exceeds the bound {}",
                    v.abs_err
                );
                (diff / &truth).to_f64().unwrap()
            } else {
                // Below f64's range only the logarithm is returned; its own ulp limits the comparison.
                let tol = 1e-13 + 4.0 * f64::EPSILON * ln_truth.abs();
                assert!(
                    (v.ln_value - ln_truth).abs() <= tol,
                    "{path} case {case} k={k} {side:?}: ln {} vs {}",
                    v.ln_value,
                    ln_truth
                );
                (v.ln_value - ln_truth).abs().exp_m1()
            };
            assert!(
                rel <= 1e-13,
                "{path} case {case} k={k} {side:?}: relative error {rel:e} (p = {}, truth ~ e^{ln_truth})",
                v.value
            );
            assert!(
                rel <= v.rel_err,
                "{path} case {case} k={k} {side:?}: relative bound {} < observed {rel:e}",
                v.rel_err
            );
            worst_rel = worst_rel.max(rel);
        }
    }
    assert!(checked > 5000, "checked {checked}");
    // Most books here are answered by the recursion; the rest had a value below its floor.
    assert!(recursion_cases >= 12, "{recursion_cases} of 36 books by the recursion");
    eprintln!(
        "checked {checked} values ({recursion_cases} of 36 books by the recursion), worst relative error {worst_rel:e}"
    );
}
