//! Tail drivers: for a threshold k and every Bernoulli exposure i, the sensitivity dP(S >= k)/dp_i, which equals
//! P(S_{-i} = k - 1) (S_{-i} is the count without exposure i), and the tail P(S_{-i} >= k) with i removed.
//!
//! How, in O(n log n) products and without deconvolution. Dividing the law of S by one exposure's factor
//! (naive deconvolution) subtracts nearly equal numbers and blows up rounding errors; instead every law here
//! is a product of non-negative factors. The exposures' tilted laws (tilted at the threshold, as in `exact`)
//! sit in leaf blocks of 32; a binary tree over the blocks holds the product of each subtree. Going down,
//! the law of everything outside a node (its complement) is the parent's complement times the sibling's
//! subtree law; at a leaf block that is the law of all other blocks (and the binomial and Poisson parts).
//! Within a block, the law of its other 31 exposures is a prefix product times a suffix product. Then
//!   P_t(S_{-i} = k - 1) = sum_m h_i(m) C(k - 1 - m),    (h_i: the block without i; C: the complement)
//! an O(32) sum, and the tail is the same sum against C's weighted suffix sums
//!   U(x) = sum_{j >= x} C(j) e^{-t (j - x)}  (so P_t-weighted tail = sum_m h_i(m) U(k - m)),
//! built once per block by the backward recursion U(x) = C(x) + e^{-t} U(x + 1). Below the mean (t < 0) the
//! tail is one minus the lower sum, built the same way downwards. Scaling back uses K_{-i}(t) = K(t) - ln M_i(t).
//! Errors follow the exact engine's model (`exact::window`): relative for the direct products, absolute (L1)
//! for FFT products and truncation.

use super::{convolve, leaf, window::Window, Dir, Tilted};
use crate::engine::numerics::cgf::{self, tilt, TiltConsts};
use crate::engine::numerics::float::{compose, gamma, log1m_exp, up, U};
use crate::engine::numerics::moments::Moments;
use crate::engine::vocabulary::{BoundKind::Rigorous, Side, Value};
use crate::portfolio::Model;
use std::collections::HashMap;

/// One exposure's figures.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Contribution {
    /// P(S_{-i} = k - 1) = dP(S >= k) / dp_i.
    pub sensitivity: Value,
    /// P(S_{-i} >= k).
    pub tail_without: Value,
}

struct Node {
    law: Window,
    children: Option<(usize, usize)>,
    /// First and one-past-last leaf block under this node.
    blocks: (usize, usize),
}

fn build(leaves: &[Window], lo: usize, hi: usize, arena: &mut Vec<Node>) -> usize {
    if hi - lo == 1 {
        arena.push(Node { law: leaves[lo].clone(), children: None, blocks: (lo, hi) });
        return arena.len() - 1;
    }
    let mid = lo + (hi - lo) / 2;
    let (l, r) = (build(leaves, lo, mid, arena), build(leaves, mid, hi, arena));
    // Once stopped, point masses stand in for the products (the answer is thrown away).
    let stopped = crate::engine::interrupt::requested();
    let law = if stopped { Window::point() } else { convolve::product(&arena[l].law, &arena[r].law) };
    arena.push(Node { law, children: Some((l, r)), blocks: (lo, hi) });
    arena.len() - 1
}

/// Visit every leaf block with its complement (the law of all other blocks and parts), left to right. Each
/// complement is used and dropped before the next is made, so at most one per tree level is alive at once.
fn complements(arena: &[Node], node: usize, comp: Window, visit: &mut dyn FnMut(usize, Window)) {
    match arena[node].children {
        None => visit(arena[node].blocks.0, comp),
        Some((l, r)) => {
            let (cl, cr) = if crate::engine::interrupt::requested() {
                (Window::point(), Window::point())
            } else {
                (convolve::product(&comp, &arena[r].law), convolve::product(&comp, &arena[l].law))
            };
            drop(comp);
            complements(arena, l, cl, visit);
            complements(arena, r, cr, visit);
        }
    }
}

/// Tilted law (as a plain polynomial from count 0) of the exposures `ps`, by the Bernoulli recursion.
fn block_law(ps: &[f64], c: &TiltConsts) -> Vec<f64> {
    let mut w = vec![1.0];
    for &p in ps {
        let (q, r) = cgf::tilt_qr(p, c);
        w.push(0.0);
        for j in (1..w.len()).rev() {
            w[j] = w[j] * r + w[j - 1] * q;
        }
        w[0] *= r;
    }
    w
}

/// Sensitivities and leave-one-out tails at threshold k, for every entry of `model.bernoulli` in order.
pub fn contributions(model: &Model, moments: &Moments, k: u64) -> Vec<Contribution> {
    let n = model.bernoulli.len();
    if n == 0 {
        return vec![];
    }
    let shift = model.shift;
    let zero = Value::certain(0.0);
    let one = Value::certain(1.0);
    // Below the support of every S_{-i}: none of them reaches k - 1, and all of them reach k.
    if k <= shift {
        return vec![Contribution { sensitivity: zero, tail_without: one }; n];
    }
    if model.support_max().is_some_and(|m| k > m) {
        return vec![Contribution { sensitivity: zero, tail_without: zero }; n];
    }
    let kf = k as f64 - 0.5;
    let up_side = kf > moments.mean;
    let t = super::solve_tilt(model, moments, kf, if up_side { Dir::Up } else { Dir::Down });
    let c = TiltConsts::new(t);
    let sc = cgf::scale(model, t);
    let blocks: Vec<&[f64]> = model.bernoulli.chunks(leaf::BLOCK).collect();
    let leaves: Vec<Window> = blocks.iter().map(|b| leaf::bernoulli_block(b, &c)).collect();
    let mut others = Vec::new();
    for b in &model.binomials {
        others.push(leaf::binomial(b.size, b.p, &c));
    }
    if model.poisson > 0.0 {
        others.push(leaf::poisson(model.poisson, &c));
    }
    let mut arena = Vec::with_capacity(2 * leaves.len());
    let root = build(&leaves, 0, leaves.len(), &mut arena);
    // k' = k - shift in the unshifted coordinates of the windows.
    let kk = k - shift;
    let rho = (-t.abs()).exp();
    // Relative error of a block's 31-exposure law (the recursion's per-exposure error, as in `leaf`) and of
    // the product of prefix and suffix.
    let per = compose(cgf::TILT_REL, gamma(2.0));
    let h_rel = compose((1.0 + per).powi(leaf::BLOCK as i32) - 1.0, gamma(leaf::BLOCK as f64 + 1.0));
    let mut out = Vec::with_capacity(n);
    let mut per_block = |bi: usize, cw: Window| {
        let ps = blocks[bi];
        if crate::engine::interrupt::requested() {
            // Stopped: the caller throws the answer away, but it still gets one figure per exposure.
            out.extend(std::iter::repeat_n(Contribution { sensitivity: zero, tail_without: zero }, ps.len()));
            return;
        }
        let (clo, chi) = (cw.lo, cw.hi());
        let at = |x: u64| if x >= clo && x <= chi { cw.w[(x - clo) as usize] } else { 0.0 };
        // Weighted partial sums of the complement: U (upwards, t >= 0) or L (downwards, t < 0).
        let len = cw.w.len();
        let mut acc = vec![0.0; len];
        if up_side {
            let mut s = 0.0;
            for (a, &w) in acc.iter_mut().zip(&cw.w).rev() {
                s = w + rho * s;
                *a = s;
            }
        } else {
            let mut s = 0.0;
            for (a, &w) in acc.iter_mut().zip(&cw.w) {
                s = w + rho * s;
                *a = s;
            }
        }
        let acc_at = |x: i64| -> f64 {
            if up_side {
                if x > chi as i64 {
                    0.0
                } else if x < clo as i64 {
                    acc[0] * rho.powf((clo as i64 - x) as f64)
                } else {
                    acc[(x - clo as i64) as usize]
                }
            } else if x < clo as i64 {
                0.0
            } else if x > chi as i64 {
                acc[len - 1] * rho.powf((x - chi as i64) as f64)
            } else {
                acc[(x - clo as i64) as usize]
            }
        };
        let rel = compose(cw.rel, h_rel);
        let dbar = len as f64 + leaf::BLOCK as f64;
        // Prefix and suffix laws of the block.
        let m = ps.len();
        let mut prefix = Vec::with_capacity(m + 1);
        for j in 0..=m {
            prefix.push(block_law(&ps[..j], &c));
        }
        let mut suffix = Vec::with_capacity(m + 1);
        for j in 0..=m {
            suffix.push(block_law(&ps[j..], &c));
        }
        for (i, &p) in ps.iter().enumerate() {
            let (a, b) = (&prefix[i], &suffix[i + 1]);
            let mut h = vec![0.0; a.len() + b.len() - 1];
            for (x, &va) in a.iter().enumerate() {
                for (y, &vb) in b.iter().enumerate() {
                    h[x + y] += va * vb;
                }
            }
            // Scale of S_{-i}: K(t) - ln M_i(t), i.e. phi - phi_i and B - b_i.
            let ti = tilt(p, &c);
            let mut s = sc;
            s.phi = sc.phi - ti.phi;
            s.phi_err = sc.phi_err + 8.0 * U * ti.phi.abs() + U * s.phi.abs();
            s.b = sc.b - ti.b as u8 as f64;
            let tl = Tilted { t, window: Window::point(), scale: s, var: 0.0, spectrum: None };
            let (mut point, mut tail) = (0.0f64, 0.0f64);
            for (mm, &hv) in h.iter().enumerate() {
                if hv == 0.0 {
                    continue;
                }
                let mm = mm as u64;
                if kk > mm {
                    point += hv * at(kk - 1 - mm);
                }
                let x = if up_side { kk as i64 - mm as i64 } else { kk as i64 - 1 - mm as i64 };
                tail += hv * acc_at(x);
            }
            let terms = h.len();
            let sensitivity = super::finish(&tl, k - 1, point, 0.0, terms, rel, cw.abs);
            let tail_without = if up_side {
                super::finish(&tl, k, tail, tail * dbar, terms + len, rel, cw.abs)
            } else {
                let lower = super::finish(&tl, k - 1, tail, tail * dbar, terms + len, rel, cw.abs);
                let p = (1.0 - lower.value).max(0.0);
                let abs_err = up(lower.abs_err + U * p);
                Value {
                    value: p,
                    ln_value: log1m_exp(lower.ln_value),
                    rel_err: if p > 0.0 { up(abs_err / p) } else { f64::INFINITY },
                    abs_err,
                    kind: Rigorous,
                }
            };
            out.push(Contribution { sensitivity, tail_without });
        }
    };
    complements(&arena, root, convolve::product_all(others), &mut per_block);
    drop(arena);
    out
}

/// Losses in units (the model on its lattice): exposure i adds u_i units, so dP(S >= k)/dp_i = P(S_{-i} >= k -
/// u_i) - P(S_{-i} >= k), and the tail without it is P(S_{-i} >= k), k in units. Each S_{-i} is its own exact law
/// on the full model's lattice (which contains S_{-i}'s), computed once per distinct (p_i, u_i) among the
/// exposures ([`classes_in_units`] of them: books in units repeat their classes): O(classes x n) rather than the
/// product tree's O(n log n), which does not yet run on the lattice. Both tails carry the exact engine's
/// rigorous bounds; the sensitivity's bound is their sum plus the rounding of the difference.
///
/// From 321 exposures on a wide lattice, at a threshold above the mean, every exposure's figures come instead
/// from one law's samples divided by the exposure's factor (`characteristic_lattice::contributions`), in
/// O(n x samples) for the whole book.
pub fn contributions_in_units(model: &Model, k: u64) -> Vec<Contribution> {
    contributions_in_units_spectrum(model, k).unwrap_or_else(|| contributions_in_units_by_class(model, k))
}

/// [`contributions_in_units`] from one law's samples (`characteristic_lattice::contributions`), or None where
/// that construction does not apply or would cost more than the laws per class.
pub fn contributions_in_units_spectrum(model: &Model, k: u64) -> Option<Vec<Contribution>> {
    let moments = Moments::of(model);
    let (x, _) = super::lattice::query(model, k, Side::Upper).ok()?;
    super::characteristic_lattice::contributions(model, &moments, x)
}

/// [`contributions_in_units`] by one exact law per class of exposures.
pub fn contributions_in_units_by_class(model: &Model, k: u64) -> Vec<Contribution> {
    let span = model.span();
    let steps = |j: usize| model.units.get(j).copied().unwrap_or(1);
    let mut seen: HashMap<(u64, u64), Contribution> = HashMap::new();
    let mut out = Vec::with_capacity(model.bernoulli.len());
    for (j, &p) in model.bernoulli.iter().enumerate() {
        let key = (p.to_bits(), steps(j));
        if let Some(c) = seen.get(&key) {
            out.push(*c);
            continue;
        }
        if crate::engine::interrupt::requested() {
            out.push(Contribution { sensitivity: Value::certain(0.0), tail_without: Value::certain(0.0) });
            continue;
        }
        let mut m = model.clone();
        m.bernoulli.remove(j);
        if !m.units.is_empty() {
            m.units.remove(j);
        }
        if !m.loadings.is_empty() {
            m.loadings.remove(j);
        }
        m.exposures = m.exposures.saturating_sub(1);
        let u = span * steps(j);
        let moments = Moments::of(&m);
        let tails = upper_in_units(&m, &moments, &[k.saturating_sub(u), k]);
        let c = Contribution { sensitivity: difference(tails[0], tails[1]), tail_without: tails[1] };
        seen.insert(key, c);
        out.push(c);
    }
    out
}

/// Whether [`contributions_in_units_spectrum`] may answer at k in units (then it costs at most the work of
/// four exact evaluations: its law, and the divisions and weights, which its cost model keeps below a law per
/// class); where it declines, [`contributions_in_units_by_class`] costs one evaluation per class.
pub fn spectrum_may_answer(model: &Model, k: u64) -> bool {
    let moments = Moments::of(model);
    matches!(super::lattice::query(model, k, Side::Upper),
        Ok((x, _)) if super::characteristic_lattice::contributions_apply(model, &moments, x))
}

/// Distinct (p_i, u_i) among the model's Bernoulli exposures: the exact laws [`contributions_in_units`] builds.
pub fn classes_in_units(model: &Model) -> usize {
    let steps = |j: usize| model.units.get(j).copied().unwrap_or(1);
    let set: std::collections::HashSet<(u64, u64)> =
        model.bernoulli.iter().enumerate().map(|(j, p)| (p.to_bits(), steps(j))).collect();
    set.len()
}

/// P(S >= k) for thresholds k in units, each mapped onto the lattice (an exact 0 or 1 off it).
pub fn upper_in_units(model: &Model, moments: &Moments, ks: &[u64]) -> Vec<Value> {
    let mapped: Vec<Result<(u64, Side), f64>> =
        ks.iter().map(|&k| super::lattice::query(model, k, Side::Upper)).collect();
    let queries: Vec<(u64, Side)> = mapped.iter().filter_map(|q| q.ok()).collect();
    let mut on_lattice = super::evaluate(model, moments, &queries).0.into_iter();
    mapped
        .iter()
        .map(|q| match q {
            Ok(_) => on_lattice.next().expect("one value per lattice query"),
            Err(p) => Value::certain(*p),
        })
        .collect()
}

/// a - b for tails a >= b (a at the lower threshold), with the sum of their bounds and the subtraction's
/// rounding; clipped at 0 (the truth is non-negative).
pub fn difference(a: Value, b: Value) -> Value {
    let d = a.value - b.value;
    let value = d.max(0.0);
    let abs_err = up(a.abs_err + b.abs_err + U * d.abs());
    // Certain tails whose difference is one of them or 0 (off the lattice, or beyond the support) are exact.
    if a.abs_err == 0.0 && b.abs_err == 0.0 && (b.value == 0.0 || a.value == b.value) {
        return Value::certain(value);
    }
    Value {
        value,
        ln_value: value.ln(),
        rel_err: if value > 0.0 { up(abs_err / value) } else { f64::INFINITY },
        abs_err,
        kind: a.kind.and(b.kind),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Leaving each exposure out and recomputing the whole law by the naive recursion.
    #[test]
    fn each_exposure_matches_the_naive_leave_one_out_recursion() {
        let ps: Vec<f64> = (0..70).map(|i| 0.01 + 0.5 * ((i * 13 % 29) as f64 / 29.0).powi(2)).collect();
        let model = Model::from_parts(&ps, &[], 0.0);
        let moments = Moments::of(&model);
        for k in [3u64, 12, 30] {
            let got = contributions(&model, &moments, k);
            for (i, c) in got.iter().enumerate() {
                let mut w = vec![1.0];
                for (j, &p) in ps.iter().enumerate() {
                    if j == i {
                        continue;
                    }
                    w.push(0.0);
                    for m in (1..w.len()).rev() {
                        w[m] = w[m] * (1.0 - p) + w[m - 1] * p;
                    }
                    w[0] *= 1.0 - p;
                }
                let point = w[k as usize - 1];
                let tail: f64 = w[k as usize..].iter().sum();
                let rel = |a: f64, b: f64| (a - b).abs() / b;
                assert!(rel(c.sensitivity.value, point) < 1e-10, "k={k} i={i}");
                assert!(rel(c.tail_without.value, tail) < 1e-10, "k={k} i={i}");
                assert!((c.tail_without.value - tail).abs() <= c.tail_without.abs_err + 1e-14 * tail, "k={k} i={i}");
            }
        }
    }
}
