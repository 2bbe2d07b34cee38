//! Logarithms of exact big-number references, for tests that compare the engine with exact arithmetic.

use num_bigint::BigUint;
use num_traits::ToPrimitive;

/// (top 60 bits as f64, binary exponent) of a positive integer.
fn split(x: &BigUint) -> (f64, i64) {
    let shift = x.bits().saturating_sub(60);
    ((x >> shift).to_f64().unwrap(), shift as i64)
}

/// ln(num / den) for positive integers, with ln 2 in double-double so that values like e^-5000 keep full
/// accuracy (a plain f64 ln 2 times the exponent would already be off by 1e-13 there).
pub fn ln_ratio(num: &BigUint, den: &BigUint) -> f64 {
    const LN2_HI: f64 = std::f64::consts::LN_2;
    const LN2_LO: f64 = 2.319_046_813_846_299_6e-17;
    let (a, ea) = split(num);
    let (b, eb) = split(den);
    let e = (ea - eb) as f64;
    let hi = e * LN2_HI;
    let lo = e.mul_add(LN2_HI, -hi) + e * LN2_LO;
    hi + (lo + (a / b).ln())
}
