//! Contributions in units from one law's samples divided by each exposure's factor
//! (src/engine/exact/characteristic_lattice.rs, `contributions`; docs/characteristic.md, "Leaving one exposure
//! out"), which books of 321 exposures or more on lattices wider than 4,096 steps take at thresholds above the
//! mean where its cost model finds it cheaper than a law per class (here it is forced on a book of 400, where
//! it is not), checked for every sampled exposure against
//!
//! * the law of S_{-i} by the textbook recursion over the whole lattice in f64 (f_j <- f_j (1 - p) + f_(j-u) p:
//!   every term non-negative, so each entry is within 2 n U relative of the exact one; the tails and ranges here
//!   are summed from it, well within 1e-12 relative at these sizes);
//! * the same two figures from the product tree on the lattice (`lattice::tilted_tree`, rigorous bounds) for
//!   S_{-i} built as its own book: they agree within the sum of the two rigorous bounds.
//!
//! Every value also lies within its own rigorous bound of the recursion's.

use tailtally::engine::exact::{self, characteristic_lattice, lattice, leave_one_out};
use tailtally::engine::numerics::float::U;
use tailtally::engine::numerics::{cgf, moments::Moments};
use tailtally::engine::Side;
use tailtally::portfolio::Model;

/// A book of n exposures: p in (0, 0.06) with every 37th near 0.4 (tilted near q = 1/2 at these thresholds),
/// units from 1 to 300 by an integer formula, one certain exposure of 5 units.
fn book(n: usize) -> (Vec<f64>, Vec<u64>) {
    let ps = (0..n).map(|i| if i % 37 == 5 { 0.4 } else { ((i * 7919) % 600 + 1) as f64 / 10_000.0 }).collect();
    let us = (0..n).map(|i| 1 + ((i * 7907) % 307) as u64 * ((i * 31) % 300) as u64 / 307).collect();
    (ps, us)
}

fn model(ps: &[f64], us: &[u64], skip: Option<usize>) -> Model {
    let mut m = Model::default();
    for (i, (&p, &u)) in ps.iter().zip(us).enumerate() {
        if Some(i) != skip {
            m.push_weighted(p, u);
        }
    }
    m.push_weighted(1.0, 5);
    m.set_lattice();
    m
}

/// pmf of sum u_j B_j (without exposure `skip`) by the recursion in f64, on 0..=sum u.
fn pmf(ps: &[f64], us: &[u64], skip: usize) -> Vec<f64> {
    let width: u64 = us.iter().sum();
    let mut f = vec![0.0; width as usize + 1];
    f[0] = 1.0;
    let mut top = 0usize;
    for (j, (&p, &u)) in ps.iter().zip(us).enumerate() {
        if j == skip {
            continue;
        }
        let u = u as usize;
        top += u;
        for x in (u..=top).rev() {
            f[x] = f[x] * (1.0 - p) + f[x - u] * p;
        }
        for x in f.iter_mut().take(u.min(top + 1)) {
            *x *= 1.0 - p;
        }
    }
    f
}

/// P(S >= k) of a book (lattice index k) by the product tree, with its rigorous bound.
fn tree_tail(m: &Model, k: u64) -> (f64, f64) {
    let mo = Moments::of(m);
    let t = cgf::solve(m, &mo, k as f64, 0.05 * mo.sd().min(10.0)).t.max(0.0);
    let v = exact::upper_tail_of(&lattice::tilted_tree(m, t), k);
    (v.value, v.abs_err)
}

#[test]
fn divided_samples_match_the_recursion_and_the_tree() {
    let (ps, us) = book(400);
    let m = model(&ps, &us, None);
    assert_eq!(m.span(), 1);
    assert!(m.lattice_width() > 4096, "the lattice must be wide for this construction");
    let mo = Moments::of(&m);
    let mut checked = 0;
    let mut worst: f64 = 0.0;
    for z in [2.0, 4.0, 7.0] {
        // The threshold in units (S includes the certain 5).
        let k = (mo.mean + z * mo.sd()).ceil() as u64;
        let (x, _) = lattice::query(&m, k, Side::Upper).unwrap();
        assert!(characteristic_lattice::contributions_apply(&m, &mo, x), "z = {z}");
        // Whatever the cost model says (on this book of 400 the laws per class are cheaper).
        let got = characteristic_lattice::contributions_with(&m, &mo, x, true).expect("the construction applies");
        assert_eq!(got.len(), ps.len());
        for i in (0..ps.len()).step_by(41).chain([5, 42]) {
            let f = pmf(&ps, &us, i);
            // S_-i = 5 + sum_(j != i) u_j B_j in units; its tail at k and the range [k - u_i, k).
            let kk = (k - 5) as usize;
            let tail: f64 = f[kk.min(f.len())..].iter().sum();
            let lo = kk.saturating_sub(us[i] as usize);
            let range: f64 = f[lo..kk.min(f.len())].iter().sum();
            let c = got[i];
            for (name, v, truth) in [("tail", c.tail_without, tail), ("sensitivity", c.sensitivity, range)] {
                let err = (v.value - truth).abs();
                assert!(
                    err <= v.abs_err + 1e-12 * truth,
                    "z = {z}, i = {i}, {name}: {} vs {truth:e} (bound {:e})",
                    v.value,
                    v.abs_err
                );
                assert!(v.rel_err < 1e-9, "z = {z}, i = {i}, {name}: bound {:e} relative", v.rel_err);
                worst = worst.max(v.rel_err);
            }
            // The product tree on S_-i as its own book: tails at k and at k - u_i (lattice indices).
            let mi = model(&ps, &us, Some(i));
            let (xi, _) = lattice::query(&mi, k, Side::Upper).unwrap();
            let (a, ea) = tree_tail(&mi, xi);
            assert!(
                (a - c.tail_without.value).abs() <= ea + c.tail_without.abs_err,
                "z = {z}, i = {i}: tree {a:e} (+- {ea:e}) vs {:e}",
                c.tail_without.value
            );
            checked += 1;
        }
    }
    println!("{checked} exposures checked, largest relative bound {worst:e}");
    assert!(checked >= 36);
}

/// The public entry point: on this book of 400 the cost model leaves the answer to the laws per class, which
/// agree with the divided samples within the sum of both rigorous bounds.
#[test]
fn the_public_path_agrees_with_the_divided_samples() {
    let (ps, us) = book(400);
    let m = model(&ps, &us, None);
    let mo = Moments::of(&m);
    let k = (mo.mean + 4.0 * mo.sd()).ceil() as u64;
    let (x, _) = lattice::query(&m, k, Side::Upper).unwrap();
    let spectral = characteristic_lattice::contributions_with(&m, &mo, x, true).unwrap();
    assert!(characteristic_lattice::contributions(&m, &mo, x).is_none(), "the laws per class are cheaper here");
    let public = leave_one_out::contributions_in_units(&m, k);
    for i in (0..ps.len()).step_by(97) {
        for (a, b) in
            [(public[i].sensitivity, spectral[i].sensitivity), (public[i].tail_without, spectral[i].tail_without)]
        {
            assert!((a.value - b.value).abs() <= a.abs_err + b.abs_err + 4.0 * U * a.value, "i = {i}: {a:?} vs {b:?}");
        }
    }
}

/// Below the mean, and for small books, the construction is not taken (the per-class laws answer).
#[test]
fn other_thresholds_and_books_take_the_laws_per_class() {
    let (ps, us) = book(400);
    let m = model(&ps, &us, None);
    let mo = Moments::of(&m);
    let below = (mo.mean - mo.sd()).floor() as u64;
    assert!(!characteristic_lattice::contributions_apply(&m, &mo, below));
    let (ps, us) = book(200);
    let small = model(&ps, &us, None);
    let mo = Moments::of(&small);
    let k = (mo.mean + 3.0 * mo.sd()) as u64;
    assert!(!characteristic_lattice::contributions_apply(&small, &mo, k));
}
