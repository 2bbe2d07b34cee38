//! Moments of the count: mean, variance, third central and absolute central moments, support.
//!
//! These are the one-pass summaries that the approximations need and that every response reports. Sums are
//! compensated so that n = 10^7 exposures lose no more than a few ulps.

use super::float::Sum;
use crate::portfolio::Model;

#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Moments {
    pub mean: f64,
    pub variance: f64,
    /// E[(S - ES)^3].
    pub third_central: f64,
    /// Sum over independent parts of E|X - EX|^3 (Berry-Esseen numerator).
    pub third_abs_sum: f64,
    /// Sum of p_i^2 over Bernoulli and binomial exposures (Poisson approximation error).
    pub sum_p_squared: f64,
}

/// Terms per block of plain summation, and the number of independent lanes within a block.
const BLOCK: usize = 1024;
const LANES: usize = 4;

impl Moments {
    pub fn of(model: &Model) -> Moments {
        if model.weighted() {
            return Self::weighted(model);
        }
        let mut acc = [Sum::default(), Sum::default(), Sum::default(), Sum::default(), Sum::default()];
        // Plain sums in LANES independent lanes over blocks of BLOCK terms, compensated across blocks: the plain
        // inner loop is what lets the compiler keep it in vector registers (five compensated sums per term cost
        // five times as much), and a block of BLOCK / LANES terms per lane loses at most (BLOCK / LANES) ulps of
        // the block's absolute sum. The blocks are then added with Neumaier's compensation, so n = 10^7 loses no
        // more than that. Measured against a fully compensated sum in the tests below.
        // Each sum in an array of its own, and each group of LANES terms as an array: the compiler then keeps
        // every sum's lanes in one vector register (with the lanes as one [[f64; LANES]; 5] indexed by an
        // enumerate it did not: 2.4 times slower at 10^6, the same bits).
        for block in model.bernoulli.chunks(BLOCK) {
            let [mut l0, mut l1, mut l2, mut l3, mut l4] = [[0.0f64; LANES]; 5];
            let mut quads = block.chunks_exact(LANES);
            for quad in &mut quads {
                let quad: &[f64; LANES] = quad.try_into().expect("chunks_exact gives LANES terms");
                for j in 0..LANES {
                    let p = quad[j];
                    let q = 1.0 - p;
                    let v = p * q;
                    l0[j] += p;
                    l1[j] += v;
                    l2[j] += v * (q - p);
                    l3[j] += v * (p * p + q * q);
                    l4[j] += p * p;
                }
            }
            let mut lanes = [l0, l1, l2, l3, l4];
            for &p in quads.remainder() {
                let q = 1.0 - p;
                let v = p * q;
                lanes[0][0] += p;
                lanes[1][0] += v;
                lanes[2][0] += v * (q - p);
                lanes[3][0] += v * (p * p + q * q);
                lanes[4][0] += p * p;
            }
            for (a, l) in acc.iter_mut().zip(lanes.iter()) {
                a.add((l[0] + l[1]) + (l[2] + l[3]));
            }
        }
        for b in &model.binomials {
            let (m, p) = (b.size as f64, b.p);
            let q = 1.0 - p;
            let v = p * q;
            for (a, x) in acc.iter_mut().zip([m * p, m * v, m * v * (q - p), m * v * (p * p + q * q), m * p * p]) {
                a.add(x);
            }
        }
        Moments::finish(model, acc)
    }

    /// The moments from the compensated sums (mean, variance, third central, third absolute, sum p^2) of the
    /// Bernoulli and binomial parts: the certain exposures' shift and the unit Poisson source added.
    fn finish(model: &Model, [mean, var, m3, a3, p2]: [Sum; 5]) -> Moments {
        let lam = model.poisson;
        Moments {
            mean: mean.value() + model.shift as f64 + lam,
            variance: var.value() + lam,
            third_central: m3.value() + lam,
            // Poisson(lambda) as the limit of many tiny Bernoullis: sum p(1-p)(p^2+(1-p)^2) -> lambda.
            third_abs_sum: a3.value() + lam,
            sum_p_squared: p2.value(),
        }
    }

    /// [`Moments::of`] for losses in units, in lattice steps: exposure i adds u_i X_i, so its central moments
    /// are u_i^r times those of its Bernoulli (a group's m members each alike); compensated per term.
    fn weighted(model: &Model) -> Moments {
        let mut acc = [Sum::default(), Sum::default(), Sum::default(), Sum::default(), Sum::default()];
        let mut add = |m: f64, p: f64, u: f64| {
            let q = 1.0 - p;
            let v = p * q;
            let u3 = u * u * u;
            for (a, x) in acc.iter_mut().zip([
                m * u * p,
                m * u * u * v,
                m * u3 * v * (q - p),
                m * u3 * v * (p * p + q * q),
                m * p * p,
            ]) {
                a.add(x);
            }
        };
        let step = |v: &[u64], i: usize| v.get(i).map_or(1.0, |&u| u as f64);
        for (i, &p) in model.bernoulli.iter().enumerate() {
            add(1.0, p, step(&model.units, i));
        }
        for (i, b) in model.binomials.iter().enumerate() {
            add(b.size as f64, b.p, step(&model.group_units, i));
        }
        let [mut mean, mut var, mut m3, mut a3, p2] = acc;
        scaled_poisson_terms(model, [&mut mean, &mut var, &mut m3, &mut a3]);
        Moments::finish(model, [mean, var, m3, a3, p2])
    }

    pub fn sd(&self) -> f64 {
        self.variance.sqrt()
    }

    pub fn skewness(&self) -> f64 {
        if self.variance > 0.0 {
            self.third_central / self.variance.powf(1.5)
        } else {
            0.0
        }
    }

    /// Lyapunov ratio sum E|X - EX|^3 / sd^3: small means the normal law is trustworthy.
    pub fn lyapunov_ratio(&self) -> f64 {
        if self.variance > 0.0 {
            self.third_abs_sum / self.variance.powf(1.5)
        } else {
            f64::INFINITY
        }
    }
}

/// The compound sources' scaled Poisson parts: s times Poisson(lambda) has cumulants kappa_r = lambda s^r, and
/// (as the limit of many rare Bernoulli events of s steps) sum E|X - EX|^3 = lambda s^3.
fn scaled_poisson_terms(model: &Model, [mean, var, m3, a3]: [&mut Sum; 4]) {
    for &(s, lam) in &model.scaled_poisson {
        let s = s as f64;
        mean.add(lam * s);
        var.add(lam * s * s);
        m3.add(lam * s * s * s);
        a3.add(lam * s * s * s);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The blocked sums against one compensated sum per term (the layout this replaced).
    /// The lanes held as five arrays give the very bits of the lanes held as one array of five indexed term
    /// by term (the form before, written out here as the reference), on books of every remainder.
    #[test]
    fn the_lanes_as_arrays_sum_as_before() {
        fn reference(ps: &[f64]) -> [f64; 5] {
            let mut acc = [Sum::default(), Sum::default(), Sum::default(), Sum::default(), Sum::default()];
            for block in ps.chunks(BLOCK) {
                let mut lanes = [[0.0f64; LANES]; 5];
                for (i, &p) in block.iter().enumerate() {
                    let j = if i < block.len() / LANES * LANES { i % LANES } else { 0 };
                    let q = 1.0 - p;
                    let v = p * q;
                    lanes[0][j] += p;
                    lanes[1][j] += v;
                    lanes[2][j] += v * (q - p);
                    lanes[3][j] += v * (p * p + q * q);
                    lanes[4][j] += p * p;
                }
                for (a, l) in acc.iter_mut().zip(lanes.iter()) {
                    a.add((l[0] + l[1]) + (l[2] + l[3]));
                }
            }
            acc.map(|a| a.value())
        }
        let mut x = 0x9e37_79b9_7f4a_7c15u64;
        for n in [1usize, 3, 1024, 1027, 5000, 100_001] {
            let ps: Vec<f64> = (0..n)
                .map(|_| {
                    x ^= x << 13;
                    x ^= x >> 7;
                    x ^= x << 17;
                    (x >> 11) as f64 / (1u64 << 53) as f64 * 0.999 + 1e-4
                })
                .collect();
            let m = Moments::of(&Model::from_parts(&ps, &[], 0.0));
            let [mean, var, m3, a3, p2] = reference(&ps);
            let got = [m.mean, m.variance, m.third_central, m.third_abs_sum, m.sum_p_squared];
            assert_eq!(got.map(f64::to_bits), [mean, var, m3, a3, p2].map(f64::to_bits), "n={n}");
        }
    }

    #[test]
    fn blocked_sums_match_compensated_sums() {
        let mut x = 0x2545_f491_4f6c_dd1du64;
        let ps: Vec<f64> = (0..200_003)
            .map(|_| {
                x ^= x << 13;
                x ^= x >> 7;
                x ^= x << 17;
                let u = (x >> 11) as f64 / (1u64 << 53) as f64;
                u.powi(3).max(1e-300)
            })
            .collect();
        let m = Moments::of(&Model::from_parts(&ps, &[(7, 0.3)], 2.5));
        let (mut s0, mut s1, mut s2, mut s3, mut s4) =
            (Sum::default(), Sum::default(), Sum::default(), Sum::default(), Sum::default());
        for p in ps.iter().copied().chain(std::iter::repeat_n(0.3, 7)) {
            let q = 1.0 - p;
            let v = p * q;
            s0.add(p);
            s1.add(v);
            s2.add(v * (q - p));
            s3.add(v * (p * p + q * q));
            s4.add(p * p);
        }
        let close = |a: f64, b: f64, scale: f64| (a - b).abs() <= 1e-14 * scale;
        assert!(close(m.mean, s0.value() + 2.5, s0.value()));
        assert!(close(m.variance, s1.value() + 2.5, s1.value()));
        assert!(close(m.third_central, s2.value() + 2.5, s1.value()));
        assert!(close(m.third_abs_sum, s3.value() + 2.5, s3.value()));
        assert!(close(m.sum_p_squared, s4.value(), s4.value()));
    }
}
