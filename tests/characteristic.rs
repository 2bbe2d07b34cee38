//! The tilted law by its characteristic function (src/engine/exact/characteristic.rs) against exact rationals
//! (De Pril 1986, tests/common/de_pril.rs) on small books, and against the product tree (`exact::tilted_tree`)
//! on random books: the two constructions must agree within the sum of their rigorous bounds.

#[path = "common/de_pril.rs"]
mod de_pril;

use de_pril::{de_pril, Class};
use num_traits::ToPrimitive;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use tailtally::engine::exact::{self, characteristic};
use tailtally::engine::numerics::float::U;
use tailtally::portfolio::Model;

/// Source: De Pril's recursion in exact rationals. Every entry of the untilted law (t = 0, where the window is
/// the law itself) is within the window's per-entry bound `inf` of the exact probability (rounded to a double:
/// U of it); at t = 0.1 and t = -0.6 the probability rebuilt from the window, exp(K(t) - t j) w_j, is within
/// the scale's and the window's bounds of it.
#[test]
fn small_books_match_de_pril_in_rationals() {
    // Probabilities with short binary expansions (a / 512), so that the rationals stay small.
    let ps: Vec<f64> = (0..30).map(|i| (1 + (i * 37 % 31) * (i * 37 % 31) / 6) as f64 / 512.0).collect();
    let mut all = ps.clone();
    all.extend([1.0, 1.0]);
    let groups = [(12u64, 0.0625f64), (5, 0.1875)];
    let model = Model::from_parts(&all, &groups, 0.0);
    assert_eq!(model.shift, 2);
    let mut classes: Vec<Class> = ps.iter().map(|&p| Class { units: 1, p, count: 1 }).collect();
    classes.extend(groups.iter().map(|&(n, p)| Class { units: 1, p, count: n }));
    let exact_pmf: Vec<f64> = de_pril(&classes, 2).iter().map(|r| r.to_f64().unwrap()).collect();
    let mut checked = 0;
    for t in [0.0, 0.1, -0.6] {
        let law = characteristic::build(&model, t).expect("the series converges here");
        let w = &law.window;
        assert_eq!(w.rel, 0.0);
        for (j, &truth) in exact_pmf.iter().enumerate() {
            let j = j as u64;
            let got = if j >= w.lo && j <= w.hi() { w.w[(j - w.lo) as usize] } else { 0.0 };
            if t == 0.0 {
                assert!((got - truth).abs() <= w.inf + U * truth, "j={j}: {got:e} vs {truth:e}, inf {:e}", w.inf);
            } else {
                let (ln_s, err) = law.scale.ln_scale(t, j as f64);
                let s = ln_s.exp();
                let rebuilt = s * got;
                let bound = s * w.inf * (1.0 + 1e-9) + (err.exp_m1() + 8.0 * U) * (truth + s * w.inf) + 1e-300;
                assert!((rebuilt - truth).abs() <= bound, "t={t} j={j}: {rebuilt:e} vs {truth:e}, bound {bound:e}");
            }
            checked += 1;
        }
        // The bound is not vacuous: far below the largest entry.
        assert!(w.inf < 1e-13, "t={t}: inf {:e}", w.inf);
    }
    assert!(checked > 100);
}

/// Random books (listed exposures, groups, a Poisson part, certain exposures; tilts up and down): where the
/// characteristic function applies, its window and the tree's agree entry by entry within the sum of their
/// bounds (the tree's relative one included), their scales K(t) within the sum of theirs, and the tails read
/// from them within the sum of their absolute bounds.
#[test]
fn agrees_with_the_tree_within_both_bounds() {
    let mut rng = ChaCha8Rng::seed_from_u64(20261203);
    let mut taken = 0;
    for case in 0..120 {
        let n = rng.gen_range(330..2500);
        let top = [0.02, 0.2, 0.35, 0.45][case % 4];
        let mut ps: Vec<f64> = (0..n).map(|_| rng.gen::<f64>() * top).collect();
        if case % 5 == 0 {
            ps.extend([1.0; 3]);
        }
        let groups: Vec<(u64, f64)> =
            if case % 3 == 0 { vec![(rng.gen_range(1..500), rng.gen::<f64>() * top)] } else { vec![] };
        let lambda = if case % 7 == 0 { rng.gen::<f64>() * 20.0 } else { 0.0 };
        let model = Model::from_parts(&ps, &groups, lambda);
        let t = rng.gen_range(-1.0..1.0) * [0.05, 0.3, 1.0][case % 3];
        let Some(cf) = characteristic::build(&model, t) else { continue };
        taken += 1;
        let tree = exact::tilted_tree(&model, t);
        let (a, b) = (&cf.window, &tree.window);
        let lo = a.lo.min(b.lo);
        let hi = a.hi().max(b.hi());
        let at = |w: &tailtally::engine::exact::window::Window, j: u64| {
            if j >= w.lo && j <= w.hi() {
                w.w[(j - w.lo) as usize]
            } else {
                0.0
            }
        };
        for j in lo..=hi {
            let (x, y) = (at(a, j), at(b, j));
            let bound = a.inf + b.inf + b.rel * (y + b.inf) / (1.0 - b.rel) + 1e-300;
            assert!((x - y).abs() <= bound, "case {case} j={j}: cf {x:e} tree {y:e} bound {bound:e}");
        }
        let (ka, ea) = cf.scale.ln_scale(t, 0.0);
        let (kb, eb) = tree.scale.ln_scale(t, 0.0);
        assert!((ka - kb).abs() <= ea + eb + 4.0 * U * ka.abs(), "case {case}: K {ka} vs {kb}");
        if t > 0.0 {
            let k = (a.mean + 2.0 * a.var.sqrt()) as u64;
            let (va, vb) = (exact::upper_tail_of(&cf, k), exact::upper_tail_of(&tree, k));
            assert!((va.value - vb.value).abs() <= va.abs_err + vb.abs_err, "case {case}: {va:?} vs {vb:?}");
        }
    }
    assert!(taken >= 60, "the characteristic function applied in only {taken} cases");
}
