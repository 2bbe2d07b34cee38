//! The invented book in loss units shared by the unit timing examples (each includes this file with
//! `#[path]`): n exposures with p ~ U(0, 0.05) and units log-uniform in 1..=1000, drawn by xorshift from a
//! fixed seed so that every example and every run sees the same doubles.
#![allow(dead_code)] // each example uses the pieces it needs

use tailtally::portfolio::Model;

/// Probabilities and units of the book of n exposures drawn from `seed`.
pub fn book(n: usize, seed: u64) -> (Vec<f64>, Vec<u64>) {
    let mut x = seed;
    let mut next = || {
        x ^= x << 13;
        x ^= x >> 7;
        x ^= x << 17;
        (x >> 11) as f64 / (1u64 << 53) as f64
    };
    let ps: Vec<f64> = (0..n).map(|_| 0.05 * next()).collect();
    let us: Vec<u64> = (0..n).map(|_| (1000f64.powf(next())).floor().clamp(1.0, 1000.0) as u64).collect();
    (ps, us)
}

/// The book as a model on its lattice.
pub fn model(ps: &[f64], us: &[u64]) -> Model {
    let mut m = Model::default();
    for (&p, &u) in ps.iter().zip(us) {
        m.push_weighted(p, u);
    }
    m.set_lattice();
    m
}
