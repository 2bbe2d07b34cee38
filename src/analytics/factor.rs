//! The law under the one-factor model: every figure the analytics ask (tail probabilities, expected layers,
//! an approximation's estimates, moments, contributions) as an integral over the factor Z of the conditional
//! portfolio's figure, by adaptive Gauss-Kronrod panels (`engine::numerics::mixture`).
//!
//! Where the panels go. Given Z = z the count has conditional mean m(z) (decreasing in z) and sd s(z); a tail
//! at k moves from near 1 to near 0 as m(z) crosses k, over a width w = s / |m'| in z that shrinks like
//! 1/sqrt(n) for a large pool. So each count asked gets breakpoints at its crossing z*(k) and at z* +- 3w and
//! +- 7w (from a compressed profile of the portfolio, `dependence::Profile`); many counts whose crossings
//! overlap (a distribution, a layer) share one run of breakpoints about 3w apart, panels sized by the
//! conditional sd. Outside z* +- 7w a tail is within 1e-12 of 0 or 1 and the monotone bracket settles it.
//!
//! At a node. One conditional model is built (O(n) normal cdfs), its moments give a Bernstein bound (Bernstein
//! 1924; Boucheron, Lugosi and Massart 2013, Thm 2.10) for every figure asked, and the figures whose bound is
//! below 1e-6 of the absolute tolerance are taken as that bound (value half of it, error half of it) without
//! the exact engine; the rest come from one call of the exact engine for all of them (nearby thresholds share
//! a tilted law). The model is then dropped: at most one per worker thread is alive.
//!
//! In units (and with compound sources), the questions that read many values of one law (quantiles, a
//! distribution table, layers) take them from the whole conditional pmf mixed over the factor once
//! (`MixedLaw`), not from one integral per probe: one lattice law per node instead of one per node per probe.
//!
//! What is reported. The value is the sum of the panels' estimates; its bound adds the quadrature's error
//! estimate (which refinement drives below max(absolute, relative x value)), the truncated mass, and the
//! node values' own bounds integrated; it is an estimate (bound kind `estimated`), covered in the tests against
//! fixtures/reference/factor.json (mpmath at 40 digits) and against an independent Gauss-Legendre reference on
//! thousands of random small pools.

use super::cancel::Cancel;
use super::dependence::{conditional, Loads, Profile};
use crate::engine::exact::{self, lattice, leave_one_out};
use crate::engine::numerics::float::{up, U};
use crate::engine::numerics::mixture::{
    self, gk15, normal_mass, qk15, Integral, Options, Outcome, Shape, Spec, Tol, LIMIT,
};
use crate::engine::numerics::moments::Moments;
use crate::engine::numerics::normal_law;
use crate::engine::{BoundKind, MethodId, Prepared, Side, Tolerance, Value};
use crate::portfolio::Model;
use std::collections::HashMap;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::OnceLock;

/// Most nodes one integration evaluates; past it the answer carries the errors it has.
pub const MAX_NODES: usize = 6000;

/// Most distinct counts integrated together; a larger set (a long distribution table) is cut into runs of
/// consecutive counts, each with its own panels, so that memory stays O(counts x panels) per run.
const CHUNK: usize = 256;

/// Nearby thresholds share a tilted law at a node within this many tilted sd (`exact::evaluate_reach`).
const REACH: f64 = 8.0;

/// A figure at a node is taken from its Bernstein bound when the bound is below this share of the absolute
/// tolerance.
const PIN_SHARE: f64 = 1e-6;

/// Breakpoints either side of a crossing, in steps of its width.
const NEAR: f64 = 3.0;
const FAR: f64 = 7.0;

/// A coarse grid for integrands without a sharp step (small pools, approximations, moments).
const COARSE: [f64; 11] = [-12.0, -8.0, -5.0, -3.0, -1.5, 0.0, 1.5, 3.0, 5.0, 8.0, 12.0];

pub struct Factor {
    pub model: Model,
    pub loads: Loads,
    pub profile: Profile,
    pub tol: Tol,
    /// The loading of exposures without their own.
    pub rho: f64,
    /// The unconditional mean (E m(Z) = the independent mean, since E p_i(Z) = p_i).
    mean: f64,
    moments: OnceLock<Moments>,
    mixed: OnceLock<MixedLaw>,
    nodes: AtomicUsize,
    gauss: AtomicUsize,
    cancel: Cancel,
    parallel: bool,
}

/// Bernstein's bound on P(S - ES >= x) (and on P(ES - S >= x)) for a sum of independent parts each within
/// `step` of its mean (Bernoulli and binomial exposures, 1 for a count and their largest lattice step in units;
/// the Poisson part as their limit), variance v.
fn bernstein(x: f64, v: f64, step: f64) -> f64 {
    if x <= 0.0 {
        1.0
    } else {
        (-x * x / (2.0 * (v + step * x / 3.0))).exp()
    }
}

/// The compound sources' mean in steps, sum of r s over their parts (it does not depend on the factor).
fn compound_mean(model: &Model) -> f64 {
    model.scaled_poisson.iter().map(|&(s, r)| r * s as f64).sum()
}

/// A figure known from its bound alone: in [0, bound] (or [cap - bound, cap]), given as the midpoint.
fn pinned(low: bool, bound: f64, cap: f64) -> Value {
    let v = if low { 0.5 * bound } else { cap - 0.5 * bound };
    Value { value: v, ln_value: v.ln(), abs_err: 0.5 * bound, rel_err: 0.5 * bound / v, kind: BoundKind::Rigorous }
}

/// The tail figure at a node from Bernstein's bound, when it is below `pin`.
fn pin_tail(mom: &Moments, step: f64, k: u64, side: Side, pin: f64) -> Option<Value> {
    if pin <= 0.0 {
        return None;
    }
    // A margin for the rounding of the conditional mean.
    let slack = 1e-9 * (1.0 + mom.mean.abs());
    let (m, v, kf) = (mom.mean, mom.variance, k as f64);
    let up_x = kf - m - slack; // k above the mean
    let dn_x = m - kf - slack; // k below the mean
    let b = |x: f64| bernstein(x, v, step);
    let got = match side {
        Side::Upper => {
            if b(up_x) <= pin {
                Some(pinned(true, b(up_x), 1.0))
            } else if b(dn_x + 1.0) <= pin {
                Some(pinned(false, b(dn_x + 1.0), 1.0))
            } else {
                None
            }
        }
        Side::Lower => {
            if b(dn_x) <= pin {
                Some(pinned(true, b(dn_x), 1.0))
            } else if b(up_x + 1.0) <= pin {
                Some(pinned(false, b(up_x + 1.0), 1.0))
            } else {
                None
            }
        }
        Side::Point => {
            let x = up_x.max(dn_x);
            (b(x) <= pin).then(|| pinned(true, b(x), 1.0))
        }
    };
    got.filter(|v| v.value > 0.0)
}

/// The bound on E[min((S - a)+, l)] at a node above the mean: sum_{j >= 1} P(S >= a + j) with Bernstein's
/// exponent f convex, so the terms fall at least geometrically by exp(-f'(x0)) from x0 = a + 1 - m.
fn pin_layer(mom: &Moments, step: f64, a: u64, limit: Option<u64>, pin: f64) -> Option<Value> {
    // The geometric fall of the terms below is derived for unit steps; losses in units go to the exact engine.
    if pin <= 0.0 || step > 1.0 {
        return None;
    }
    let x0 = a as f64 + 1.0 - mom.mean - 1e-9 * (1.0 + mom.mean.abs());
    if x0 <= 0.0 {
        return None;
    }
    let c = 3.0 * mom.variance;
    let slope = 1.5 * (x0 * x0 + 2.0 * c * x0) / ((c + x0) * (c + x0));
    let first = bernstein(x0, mom.variance, 1.0);
    let mut bound = first / -(-slope).exp_m1();
    if let Some(l) = limit {
        bound = bound.min(l as f64 * first);
    }
    (bound <= pin && bound > 0.0).then(|| pinned(true, bound, f64::INFINITY))
}

/// A value from an integral, with the quadrature's and the nodes' errors and the given range.
fn to_value(i: &Integral, lo: f64, hi: f64) -> Value {
    let value = i.value.clamp(lo, hi);
    let abs_err = up(i.quad_err + i.node_err + 2.0 * U * value.abs());
    let ln_value = if value == i.value { i.ln_value } else { value.ln() };
    Value {
        value,
        ln_value: ln_value.min(hi.ln()),
        abs_err,
        rel_err: if value > 0.0 { up(abs_err / value) } else { f64::INFINITY },
        kind: BoundKind::Estimated,
    }
}

/// The event level of a tail query: where the conditional mean crossing it halves the tail.
fn level(k: u64, side: Side) -> f64 {
    match side {
        Side::Upper => k as f64 - 0.5,
        Side::Lower => k as f64 + 0.5,
        Side::Point => k as f64,
    }
}

/// Tail queries with the companions a point query's bracket needs: (query, spec) with `target` false for the
/// companions nobody asked for.
fn with_companions(queries: &[(u64, Side)]) -> (Vec<(u64, Side)>, Vec<Spec>, Vec<usize>) {
    let mut idx: HashMap<(u64, Side), usize> = HashMap::new();
    let mut all: Vec<(u64, Side)> = Vec::new();
    let mut target: Vec<bool> = Vec::new();
    let mut add = |q: (u64, Side), t: bool, all: &mut Vec<(u64, Side)>, target: &mut Vec<bool>| -> usize {
        let i = *idx.entry(q).or_insert_with(|| {
            all.push(q);
            target.push(false);
            all.len() - 1
        });
        target[i] |= t;
        i
    };
    let asked: Vec<usize> = queries.iter().map(|&q| add(q, true, &mut all, &mut target)).collect();
    let mut specs: Vec<Spec> = Vec::new();
    let mut i = 0;
    while i < all.len() {
        let (k, side) = all[i];
        let shape = match side {
            Side::Upper => Shape::Decreasing,
            Side::Lower => Shape::Increasing,
            Side::Point => {
                let d = add((k, Side::Upper), false, &mut all, &mut target);
                let c = add((k, Side::Lower), false, &mut all, &mut target);
                Shape::Below { decreasing: d, increasing: c }
            }
        };
        specs.push(Spec { shape, range: (0.0, 1.0), target: true });
        i += 1;
    }
    for (s, &t) in specs.iter_mut().zip(&target) {
        s.target = t;
    }
    (all, specs, asked)
}

impl Factor {
    pub fn new(model: Model, rho: f64, tol: Tol, cancel: Cancel) -> Factor {
        let loads = Loads::of(&model, rho);
        let profile = Profile::of(&model, &loads);
        let mean = Moments::of(&model).mean;
        // Threads pay off once a node costs more than a few tens of microseconds.
        let cost = model.bernoulli.len() as f64
            + model.binomials.iter().map(|b| 25.0 * (b.size as f64).sqrt()).sum::<f64>()
            + if model.poisson > 0.0 { 25.0 * model.poisson.sqrt() } else { 0.0 };
        Factor {
            model,
            loads,
            profile,
            tol,
            rho,
            mean,
            moments: OnceLock::new(),
            mixed: OnceLock::new(),
            nodes: AtomicUsize::new(0),
            gauss: AtomicUsize::new(0),
            cancel,
            parallel: cost > 2000.0,
        }
    }

    pub fn set_cancel(&mut self, cancel: Cancel) {
        self.cancel = cancel;
    }

    /// The conditional portfolio at z and its moments.
    pub fn at(&self, z: f64) -> (Model, Moments) {
        let m = conditional(&self.model, &self.loads, z);
        let mom = Moments::of(&m);
        (m, mom)
    }

    /// Nodes evaluated so far, and how many of them were Gauss nodes.
    pub fn nodes_used(&self) -> (usize, usize) {
        (self.nodes.load(Ordering::Relaxed), self.gauss.load(Ordering::Relaxed))
    }

    fn options(&self, tol: Tol) -> Options {
        Options { tol, max_nodes: MAX_NODES, parallel: self.parallel }
    }

    fn pin(&self) -> f64 {
        PIN_SHARE * self.tol.abs
    }

    fn run<F>(&self, specs: &[Spec], breaks: &[f64], tol: Tol, f: F) -> Outcome
    where
        F: Fn(f64) -> Vec<Value> + Sync,
    {
        let cancel = &self.cancel;
        let out = mixture::integrate(specs, breaks, &self.options(tol), f, &|| cancel.is_cancelled());
        self.nodes.fetch_add(out.nodes, Ordering::Relaxed);
        self.gauss.fetch_add(out.gauss_nodes, Ordering::Relaxed);
        out
    }

    /// Breakpoints for integrands that step where the conditional mean crosses each of `levels`.
    pub fn breakpoints(&self, levels: &[f64], smooth: bool) -> Vec<f64> {
        let mut lv: Vec<f64> = levels.to_vec();
        lv.sort_by(f64::total_cmp);
        lv.dedup();
        let mut missing = false;
        let mut found: Vec<(f64, f64)> = Vec::new();
        if lv.len() <= 48 {
            for &x in &lv {
                match self.profile.crossing(x) {
                    Some(c) => found.push(c),
                    None => missing = true,
                }
            }
        } else {
            // Many levels: crossings only where the neighbours' are more than NEAR widths apart (the levels
            // between them then share the run of breakpoints).
            let ends = [self.profile.crossing(lv[0]), self.profile.crossing(lv[lv.len() - 1])];
            missing = ends.iter().any(Option::is_none);
            let mut stack = vec![(0usize, lv.len() - 1, ends[0], ends[1])];
            found.extend(ends.iter().flatten());
            while let Some((i, j, ci, cj)) = stack.pop() {
                if j - i <= 1 {
                    continue;
                }
                let close = match (ci, cj) {
                    (Some(a), Some(b)) => (a.0 - b.0).abs() <= NEAR * a.1.min(b.1),
                    _ => false,
                };
                if close {
                    continue;
                }
                let mid = (i + j) / 2;
                let cm = self.profile.crossing(lv[mid]);
                match cm {
                    Some(c) => found.push(c),
                    None => missing = true,
                }
                stack.push((i, mid, ci, cm));
                stack.push((mid, j, cm, cj));
            }
        }
        let mut pts: Vec<f64> = Vec::new();
        if smooth || missing || found.is_empty() || found.iter().any(|&(_, w)| w > 0.5) {
            pts.extend(COARSE);
        }
        found.sort_by(|a, b| a.0.total_cmp(&b.0));
        let mut i = 0;
        while i < found.len() {
            // One cluster: crossings closer than FAR widths to the previous one.
            let mut j = i + 1;
            while j < found.len() && found[j].0 - found[j - 1].0 <= 2.0 * FAR * found[j].1.max(found[j - 1].1) {
                j += 1;
            }
            let (z0, w0) = found[i];
            let (z1, w1) = found[j - 1];
            pts.extend([z0 - FAR * w0, z0 - NEAR * w0]);
            let mut last = f64::NEG_INFINITY;
            for &(z, w) in &found[i..j] {
                if z - last >= NEAR * w {
                    pts.push(z);
                    last = z;
                }
            }
            pts.extend([z1 + NEAR * w1, z1 + FAR * w1]);
            i = j;
        }
        pts.retain(|z| z.abs() < LIMIT);
        pts
    }

    /// Exact values of tail queries under the factor, in order.
    pub fn exact(&self, queries: &[(u64, Side)]) -> Vec<Value> {
        let mut out = vec![Value::default(); queries.len()];
        let mut open: Vec<usize> = Vec::new();
        for (i, &(k, side)) in queries.iter().enumerate() {
            match exact::trivial(&self.model, k, side) {
                Some(p) => out[i] = Value { kind: BoundKind::Estimated, ..Value::certain(p) },
                None => open.push(i),
            }
        }
        // Runs of at most CHUNK distinct counts.
        open.sort_by_key(|&i| queries[i].0);
        let mut start = 0;
        while start < open.len() {
            let mut end = start;
            let mut counts = 0;
            while end < open.len() {
                if end == start || queries[open[end]].0 != queries[open[end - 1]].0 {
                    if counts == CHUNK {
                        break;
                    }
                    counts += 1;
                }
                end += 1;
            }
            let idx = &open[start..end];
            let qs: Vec<(u64, Side)> = idx.iter().map(|&i| queries[i]).collect();
            for (&i, v) in idx.iter().zip(self.exact_run(&qs)) {
                out[i] = v;
            }
            start = end;
        }
        out
    }

    fn exact_run(&self, queries: &[(u64, Side)]) -> Vec<Value> {
        let (all, specs, asked) = with_companions(queries);
        let levels: Vec<f64> = all.iter().map(|&(k, s)| level(k, s)).collect();
        let breaks = self.breakpoints(&levels, false);
        let pin = self.pin();
        let node = |z: f64| -> Vec<Value> {
            let (m, mom) = self.at(z);
            let mut vals = vec![Value::default(); all.len()];
            let mut active: Vec<(u64, Side)> = Vec::new();
            let mut where_: Vec<usize> = Vec::new();
            for (i, &(k, side)) in all.iter().enumerate() {
                match exact::trivial(&m, k, side) {
                    Some(p) => vals[i] = Value::certain(p),
                    None => match pin_tail(&mom, m.max_step() as f64, k, side, pin) {
                        Some(v) => vals[i] = v,
                        None => {
                            active.push((k, side));
                            where_.push(i);
                        }
                    },
                }
            }
            if !active.is_empty() {
                let (got, _) = exact::evaluate_reach(&m, &mom, &active, REACH);
                for (&i, v) in where_.iter().zip(got) {
                    vals[i] = v;
                }
            }
            vals
        };
        let out = self.run(&specs, &breaks, self.tol, node);
        asked.iter().map(|&i| to_value(&out.integrals[i], 0.0, 1.0)).collect()
    }

    /// The largest value E[min((S - a)+, l) | z] can take.
    fn layer_cap(&self, a: u64, limit: Option<u64>) -> f64 {
        let top = match self.model.support_max() {
            Some(m) => m.saturating_sub(a) as f64,
            // E[(S - a)+ | z] <= E[S | z] <= the bounded part's largest count plus the Poisson rate and the
            // compound sources' mean (neither depends on z).
            None => {
                let bounded = if self.model.weighted() {
                    self.model.lattice_width()
                } else {
                    self.model.random_exposures_bounded()
                };
                (self.model.shift + bounded) as f64 + self.model.poisson + compound_mean(&self.model)
            }
        };
        limit.map_or(top, |l| top.min(l as f64))
    }

    /// E[min((S - a)+, l)] under the factor (no cap when `limit` is None).
    pub fn layer_expectation(&self, a: u64, limit: Option<u64>) -> Value {
        if self.model.weighted() {
            // In units (attachment and limit in units, the law on the lattice): read from the mixed law.
            return self.mixed_law().layer(&self.model, self.mean, a, limit);
        }
        let cap = self.layer_cap(a, limit);
        if cap <= 0.0 {
            return Value { kind: BoundKind::Estimated, ..Value::certain(0.0) };
        }
        let mut levels = vec![a as f64 + 0.5];
        if let Some(l) = limit {
            levels.push(a as f64 + l as f64 - 0.5);
        }
        let breaks = self.breakpoints(&levels, limit.is_none());
        let pin = self.pin();
        let node = |z: f64| -> Vec<Value> {
            let (m, mom) = self.at(z);
            let step = m.max_step() as f64;
            vec![pin_layer(&mom, step, a, limit, pin).unwrap_or_else(|| exact::layer_expectation(&m, &mom, a, limit))]
        };
        let specs = [Spec::new(Shape::Decreasing, (0.0, cap))];
        let out = self.run(&specs, &breaks, self.tol, node);
        to_value(&out.integrals[0], 0.0, f64::INFINITY)
    }

    /// One approximation's estimates at every node, mixed (no brackets: an approximation need not be monotone
    /// in z). The node errors are the method's own bounds, integrated.
    pub fn estimates(&self, id: MethodId, queries: &[(u64, Side)], tol: Option<Tolerance>) -> Vec<Value> {
        let levels: Vec<f64> = queries.iter().map(|&(k, s)| level(k, s)).collect();
        let breaks = self.breakpoints(&levels, true);
        let node = |z: f64| -> Vec<Value> {
            let (m, mom) = self.at(z);
            let prep = Prepared { model: &m, moments: mom };
            crate::engine::run(id, &prep, queries, tol).iter().map(|e| e.value()).collect()
        };
        let specs: Vec<Spec> = queries.iter().map(|_| Spec::new(Shape::Free, (-1.0, 2.0))).collect();
        let out = self.run(&specs, &breaks, self.tol, node);
        out.integrals.iter().map(|i| to_value(i, 0.0, 1.0)).collect()
    }

    /// Moments of the mixture: the law of total variance and its third-moment analogue, integrated about the
    /// exact unconditional mean. The Berry-Esseen and Poisson sums are the conditional ones averaged, for
    /// completeness only.
    pub fn moments(&self) -> Moments {
        *self.moments.get_or_init(|| {
            let mu = self.mean;
            // In units the bounded part spans its lattice width; a compound source's conditional variance and
            // third cumulant are sum r s^2 and sum r s^3 (constant in z), both below top^2 and top^3 once the
            // latter is added (top >= 1, s >= 1).
            let bounded =
                if self.model.weighted() { self.model.lattice_width() } else { self.model.random_exposures_bounded() };
            let cubes: f64 = self.model.scaled_poisson.iter().map(|&(s, r)| r * (s as f64).powi(3)).sum();
            let top = (bounded as f64 + self.model.poisson + cubes + 1.0).max(1.0);
            let r = |k: i32| (-top.powi(k), top.powi(k));
            // v, (m - mu)^2, k3, v (m - mu), (m - mu)^3, third-abs sum, sum p^2
            let specs: Vec<Spec> = [r(1), r(2), r(1), r(2), r(3), r(1), r(1)]
                .into_iter()
                .map(|range| Spec::new(Shape::Free, range))
                .collect();
            let node = |z: f64| -> Vec<Value> {
                let (_, m) = self.at(z);
                let d = m.mean - mu;
                let xs =
                    [m.variance, d * d, m.third_central, m.variance * d, d * d * d, m.third_abs_sum, m.sum_p_squared];
                xs.iter().map(|&x| Value { value: x, ln_value: x.abs().ln(), ..Value::certain(0.0) }).collect()
            };
            let sd = self.profile.at(0.0).1.sqrt() + 1.0;
            // Tolerances on the scale of each moment (relative 1e-9 of an independent-sized sd's power).
            let tol = Tol { rel: 1e-9, abs: 1e-12 * sd.powi(3) };
            let breaks = self.breakpoints(&[], true);
            let out = self.run(&specs, &breaks, tol, node);
            let v: Vec<f64> = out.integrals.iter().map(|i| i.value).collect();
            let variance = (v[0] + v[1]).max(0.0);
            Moments {
                mean: mu,
                variance,
                third_central: v[2] + 3.0 * v[3] + v[4],
                third_abs_sum: v[5],
                sum_p_squared: v[6],
            }
        })
    }

    /// A first guess of the quantile at `level`.
    pub fn quantile_guess(&self, level: f64) -> u64 {
        self.profile.quantile_guess(level).max(0.0).round() as u64
    }

    /// Sensitivities dP(S >= k)/dp_i and leave-one-out tails P(S_{-i} >= k) under the factor, for every entry of
    /// `model.bernoulli` in order, with P(S >= k); and for impossible or certain exposures (p = 0 or 1, with their
    /// loading) the same figures, computed as described in `contributions.rs`.
    ///
    /// dP/dp_i = E[P(S_{-i} = k - 1 | Z) dp_i(Z)/dp_i] where phi(z) dp_i(z)/dp_i = phi(z) phi(u_i(z)) /
    /// (sqrt(1 - rho_i) phi(c_i)) is the N(sqrt(rho_i) c_i, 1 - rho_i) density (the factor given the exposure's
    /// latent variable at its threshold c_i = Phi^-1(p_i)). Pass 1 refines the panels on P(S >= k - 1, k, k + 1),
    /// P(S <= k) and P(S = k - 1), P(S = k) (the shapes of every exposure's integrands); pass 2 evaluates the
    /// exact engine's leave-one-out tree (`leave_one_out`) at the Kronrod nodes of those panels and brackets the
    /// rest: P(S_{-i} = k - 1 | z) <= min(P(S >= k - 1 | z), P(S <= k | z)) and P(S >= k + 1 | z) <= P(S_{-i} >= k |
    /// z) <= P(S >= k | z), all monotone in z.
    pub fn contributions(&self, k: u64, fixed: &[(f64, f64)]) -> FactorContributions {
        let n = self.model.bernoulli.len();
        let est = |v: f64| Value { kind: BoundKind::Estimated, ..Value::certain(v) };
        if k == 0 {
            let each = (est(0.0), est(1.0));
            return FactorContributions { tail: est(1.0), each: vec![each; n], fixed: vec![each; fixed.len()] };
        }
        let pin = self.pin();
        let (tail, each, out) = self.leave_one_out(k, 1, false, &|z, m: &Model, mom: &Moments, pr: &[Value]| {
            self.loo_node(z, m, mom, pr, k, pin)
        });
        // Impossible and certain exposures.
        let ints = &out.integrals;
        let fixed_out = fixed
            .iter()
            .map(|&(p, r)| {
                if r == 0.0 {
                    // Independent of the factor: S without it is S (p = 0) or S - 1 (p = 1).
                    if p <= 0.0 {
                        (to_value(&ints[4], 0.0, 1.0), tail)
                    } else {
                        (to_value(&ints[5], 0.0, 1.0), to_value(&ints[2], 0.0, 1.0))
                    }
                } else {
                    // The factor given the latent variable at -inf (p = 0) or +inf (p = 1): the end of the range.
                    let z = if p <= 0.0 { -LIMIT } else { LIMIT };
                    let (m, mom) = self.at(z);
                    let kk = if p <= 0.0 { k - 1 } else { k };
                    let v = exact::evaluate(&m, &mom, &[(kk, Side::Point)]).0[0];
                    let s = Value { kind: BoundKind::Estimated, ..v };
                    if p <= 0.0 {
                        (s, tail)
                    } else {
                        (s, to_value(&ints[2], 0.0, 1.0))
                    }
                }
            })
            .collect();
        FactorContributions { tail, each, fixed: fixed_out }
    }

    /// [`Factor::contributions`] on a book in loss units (or with compound sources), k in units: exposure i adds
    /// u_i units, so dP(S >= k)/dp_i = E[(P(S_{-i} >= k - u_i | Z) - P(S_{-i} >= k | Z)) dp_i(Z)/dp_i] and the
    /// tail without it is E[P(S_{-i} >= k | Z)]. `fixed` lists the impossible and certain exposures as (p,
    /// loading, units).
    ///
    /// On the lattice (S = offset + span J, K the index of k, u_i in steps, U the largest): pass 1 refines the
    /// panels on P(J >= K), P(J >= K - U), P(J >= K + U), P(J <= K - 1 + U) and the band P(K - U <= J <= K - 1 +
    /// U); pass 2 evaluates at the Kronrod nodes each S_{-i}'s exact law on the lattice, once per distinct
    /// (p_i(z), u_i) (`leave_one_out::contributions_in_units`, rigorous bounds), and brackets the rest: since
    /// S_{-i} <= S <= S_{-i} + u_i, P(k - u_i <= S_{-i} < k | z) <= min(P(J >= K - U | z), P(J <= K - 1 + U | z))
    /// and P(J >= K + U | z) <= P(S_{-i} >= k | z) <= P(J >= K | z), all monotone in z. Each figure's bound adds
    /// the quadrature's estimate to the nodes' exact bounds integrated.
    pub fn contributions_in_units(&self, k: u64, fixed: &[(f64, f64, u64)]) -> FactorContributions {
        let n = self.model.bernoulli.len();
        let est = |v: f64| Value { kind: BoundKind::Estimated, ..Value::certain(v) };
        let kk = lattice::query(&self.model, k, Side::Upper).map_or(0, |q| q.0);
        let (tail, each) = if kk == 0 {
            // Every total, with or without any one random exposure, is at least the offset, which is >= k.
            (est(1.0), vec![(est(0.0), est(1.0)); n])
        } else {
            let step = self.model.units.iter().copied().max().unwrap_or(1);
            let pin = self.pin();
            let (tail, each, _) = self.leave_one_out(kk, step, true, &|z, m: &Model, mom: &Moments, pr: &[Value]| {
                self.loo_node_units(z, m, mom, pr, k, pin)
            });
            (tail, each)
        };
        // The factor's tail P(S >= x) for x in units (an exact 0 or 1 off the lattice), each once.
        let mut tails: HashMap<u64, Value> = HashMap::from([(k, tail)]);
        let mut upper = |x: u64| -> Value {
            *tails.entry(x).or_insert_with(|| match lattice::query(&self.model, x, Side::Upper) {
                Ok(q) => self.exact(&[q])[0],
                Err(p) => est(p),
            })
        };
        let fixed_out = fixed
            .iter()
            .map(|&(p, r, u)| {
                // S without it is S (p = 0) or S - u (p = 1).
                let without = if p <= 0.0 { tail } else { upper(k.saturating_add(u)) };
                let s = if r == 0.0 {
                    // Independent of the factor: a difference of two of its tails.
                    if p <= 0.0 {
                        leave_one_out::difference(upper(k.saturating_sub(u)), tail)
                    } else {
                        leave_one_out::difference(tail, without)
                    }
                } else {
                    // The factor given the latent variable at -inf (p = 0) or +inf (p = 1): the end of the range.
                    let z = if p <= 0.0 { -LIMIT } else { LIMIT };
                    let (m, mom) = self.at(z);
                    let ks = if p <= 0.0 { [k.saturating_sub(u), k] } else { [k, k.saturating_add(u)] };
                    let t = leave_one_out::upper_in_units(&m, &mom, &ks);
                    leave_one_out::difference(t[0], t[1])
                };
                (Value { kind: BoundKind::Estimated, ..s }, without)
            })
            .collect();
        FactorContributions { tail, each, fixed: fixed_out }
    }

    /// The two passes both contribution integrals share, on the lattice index (the count's own when there are
    /// no units): threshold `k` >= 1, `step` the largest step one exposure adds. Pass 1 integrates the proxies
    /// P(J >= k), P(J >= k - step), P(J >= k + step), P(J <= k - 1 + step) and then either P(J = k - 1), P(J = k)
    /// (the count, `band` false) or the band P(k - step <= J <= k - 1 + step) (`band` true); pass 2 integrates
    /// every exposure's (sensitivity, tail without) from `node` (given z, the conditional model, its moments and
    /// the proxies there) at the Kronrod nodes of pass 1's panels, and from the proxies' brackets elsewhere.
    /// Returns P(J >= k), the per-exposure figures, and pass 1's outcome.
    #[allow(clippy::type_complexity)]
    fn leave_one_out(
        &self,
        k: u64,
        step: u64,
        band: bool,
        node: &(dyn Fn(f64, &Model, &Moments, &[Value]) -> Vec<(Value, Value)> + Sync),
    ) -> (Value, Vec<(Value, Value)>, Outcome) {
        let n = self.model.bernoulli.len();
        // Pass 1.
        let mut qs = vec![
            (k, Side::Upper),
            (k.saturating_sub(step), Side::Upper),
            (k + step, Side::Upper),
            (k - 1 + step, Side::Lower),
        ];
        let mut specs = vec![
            Spec::new(Shape::Decreasing, (0.0, 1.0)),
            Spec::new(Shape::Decreasing, (0.0, 1.0)),
            Spec::new(Shape::Decreasing, (0.0, 1.0)),
            Spec::new(Shape::Increasing, (0.0, 1.0)),
        ];
        if band {
            specs.push(Spec::new(Shape::Below { decreasing: 1, increasing: 3 }, (0.0, 1.0)));
        } else {
            qs.extend([(k - 1, Side::Point), (k, Side::Point)]);
            specs.extend([
                Spec::new(Shape::Below { decreasing: 1, increasing: 3 }, (0.0, 1.0)),
                Spec::new(Shape::Below { decreasing: 0, increasing: 3 }, (0.0, 1.0)),
            ]);
        }
        let levels: Vec<f64> = qs.iter().map(|&(k, s)| level(k, s)).collect();
        let breaks = self.breakpoints(&levels, false);
        let pin = self.pin();
        let proxies = |m: &Model, mom: &Moments| -> Vec<Value> {
            let mut vals = vec![Value::default(); qs.len()];
            let mut active = Vec::new();
            let mut where_ = Vec::new();
            for (i, &(kk, side)) in qs.iter().enumerate() {
                match exact::trivial(m, kk, side)
                    .map(Value::certain)
                    .or_else(|| pin_tail(mom, m.max_step() as f64, kk, side, pin))
                {
                    Some(v) => vals[i] = v,
                    None => {
                        active.push((kk, side));
                        where_.push(i);
                    }
                }
            }
            if !active.is_empty() {
                for (&i, v) in where_.iter().zip(exact::evaluate_reach(m, mom, &active, REACH).0) {
                    vals[i] = v;
                }
            }
            if band {
                // P(k - step <= J <= k - 1 + step) = P(J >= k - step) - P(J >= k + step).
                vals.push(leave_one_out::difference(vals[1], vals[2]));
            }
            vals
        };
        let out = self.run(&specs, &breaks, self.tol, |z: f64| {
            let (m, mom) = self.at(z);
            proxies(&m, &mom)
        });
        let tail = to_value(&out.integrals[0], 0.0, 1.0);
        // Per exposure: the centre and sd of the factor given the latent variable at c_i.
        let rho_of = |i: usize| if self.model.loaded() { self.model.loadings[i] } else { self.rho };
        let cons: Vec<(f64, f64)> = (0..n)
            .map(|i| {
                let r = rho_of(i);
                let c = normal_law::normal_quantile(self.model.bernoulli[i]);
                (r.sqrt() * c, (1.0 - r).sqrt())
            })
            .collect();
        // Pass 2: accumulate (value, quadrature error, node error) per exposure for both figures.
        let mut sens = vec![(0.0f64, 0.0f64, 0.0f64); n];
        let mut without = vec![(0.0f64, 0.0f64, 0.0f64); n];
        let bound_at = |end: Option<usize>, q: usize, hi: bool| -> f64 {
            match end {
                None => {
                    if hi {
                        1.0
                    } else {
                        0.0
                    }
                }
                Some(e) => {
                    let (v, err) = out.ends[e].1[q];
                    if hi {
                        (v + err).min(1.0)
                    } else {
                        (v - err).max(0.0)
                    }
                }
            }
        };
        for p in &out.panels {
            if self.cancel.is_cancelled() {
                break;
            }
            if !p.kronrod {
                // Brackets from the proxies at the panel's ends.
                let s_hi = bound_at(p.left, 1, true).min(bound_at(p.right, 3, true));
                let (t_lo, t_hi) =
                    (bound_at(p.right, 2, false), bound_at(p.left, 0, true).max(bound_at(p.right, 2, false)));
                let (mass, mass_err) = normal_mass(p.a, p.b);
                for i in 0..n {
                    let (centre, sd) = cons[i];
                    let (g, g_err) = normal_mass((p.a - centre) / sd, (p.b - centre) / sd);
                    let w = s_hi * (g + g_err);
                    sens[i].0 += 0.5 * w;
                    sens[i].1 += 0.5 * w;
                    without[i].0 += 0.5 * (t_lo + t_hi) * mass;
                    without[i].1 += 0.5 * (t_hi - t_lo) * mass + t_hi * mass_err;
                }
                continue;
            }
            let rule = gk15(p.a, p.b);
            let zs: Vec<f64> = rule.iter().map(|r| r.0).collect();
            let at_nodes = mixture::evaluate_all(&zs, self.parallel, &|z: f64| {
                let (m, mom) = self.at(z);
                let pr = proxies(&m, &mom);
                node(z, &m, &mom, &pr)
            });
            self.nodes.fetch_add(15, Ordering::Relaxed);
            self.gauss.fetch_add(7, Ordering::Relaxed);
            let lnphi: Vec<f64> = zs.iter().map(|&z| normal_law::ln_pdf(z)).collect();
            for i in 0..n {
                let (centre, sd) = cons[i];
                let mut fs = [0.0; 15];
                let mut ft = [0.0; 15];
                let (mut es, mut et) = (0.0, 0.0);
                // phi(z) dp_i(z)/dp_i = the N(centre, sd^2) density.
                for j in 0..15 {
                    let (s, t) = at_nodes[j][i];
                    let u = (zs[j] - centre) / sd;
                    let dens = (normal_law::ln_pdf(u)).exp() / sd;
                    let phi = lnphi[j].exp();
                    fs[j] = dens * s.value;
                    ft[j] = phi * t.value;
                    // Both figures are probabilities in [0, 1], so no node's error exceeds 1; a node that
                    // could not bound its own (an infinite bound) must not turn a zero weight into NaN.
                    es += rule[j].1 * dens * s.abs_err.min(1.0);
                    et += rule[j].1 * phi * t.abs_err.min(1.0);
                }
                let (ks, qs_err, _) = qk15(&rule, &fs);
                let (kt, qt_err, _) = qk15(&rule, &ft);
                sens[i].0 += ks;
                sens[i].1 += qs_err;
                sens[i].2 += es;
                without[i].0 += kt;
                without[i].1 += qt_err;
                without[i].2 += et;
            }
        }
        let fin = |(v, q, e): (f64, f64, f64), hi: f64| -> Value {
            let i = Integral {
                value: v,
                ln_value: v.ln(),
                quad_err: q * (1.0 + 1e-12) + mixture::OMITTED_MASS * hi,
                node_err: e,
            };
            to_value(&i, 0.0, hi)
        };
        // dP/dp_i = E[D_i(Z) dp_i(Z)/dp_i] (D_i the conditional sensitivity), and dp_i(z)/dp_i phi(z) is the
        // density of Z given the latent variable at c_i, N(sqrt(r) c_i, 1 - r), which integrates to 1: so the
        // sensitivity lies in [0, 1], and the weight's mass outside [-LIMIT, LIMIT] is that normal law's two tails
        // there (not the factor's own, which is far smaller when sqrt(r) |c_i| is near LIMIT, i.e. rho near 1).
        let each: Vec<(Value, Value)> = sens
            .into_iter()
            .zip(without)
            .zip(&cons)
            .map(|((s, t), &(mu, sd))| {
                let outside =
                    if sd > 0.0 { normal_law::sf((LIMIT - mu) / sd) + normal_law::sf((LIMIT + mu) / sd) } else { 0.0 };
                let s = fin((s.0, s.1 + up(outside * (1.0 + 1e-12)), s.2), 1.0);
                (s, fin(t, 1.0))
            })
            .collect();
        (tail, each, out)
    }

    /// At a node: every Bernoulli exposure's (P(S_{-i} = k - 1 | z), P(S_{-i} >= k | z)), from the
    /// leave-one-out tree, or from the proxies' Bernstein bounds when they settle all of them.
    fn loo_node(&self, z: f64, m: &Model, mom: &Moments, pr: &[Value], k: u64, pin: f64) -> Vec<(Value, Value)> {
        let n = self.model.bernoulli.len();
        if let Some(all) = settled(pr, pin, n) {
            return all;
        }
        // Exposures whose p_i(z) rounded to 0 or 1 are not in the conditional model: S without them is S, or
        // S - 1.
        let fixed =
            exact::evaluate(m, mom, &[(k - 1, Side::Point), (k, Side::Upper), (k, Side::Point), (k + 1, Side::Upper)])
                .0;
        let tree = leave_one_out::contributions(m, mom, k);
        let mut next = tree.iter();
        let mut out = Vec::with_capacity(n);
        for i in 0..n {
            let (a, b) = (self.loads.alpha[i], self.loads.beta_of(i));
            let p = normal_law::cdf(a - b * z);
            if p <= 0.0 {
                out.push((fixed[0], fixed[1]));
            } else if p >= 1.0 {
                out.push((fixed[2], fixed[3]));
            } else {
                let c = next.next().expect("one figure per random exposure");
                out.push((c.sensitivity, c.tail_without));
            }
        }
        out
    }

    /// At a node, in units (k in units): every Bernoulli exposure's (P(S_{-i} >= k - u_i | z) - P(S_{-i} >= k |
    /// z), P(S_{-i} >= k | z)), each S_{-i} an exact law on the lattice, or from the proxies' Bernstein bounds
    /// when they settle all of them.
    fn loo_node_units(&self, z: f64, m: &Model, mom: &Moments, pr: &[Value], k: u64, pin: f64) -> Vec<(Value, Value)> {
        let n = self.model.bernoulli.len();
        if let Some(all) = settled(pr, pin, n) {
            return all;
        }
        let per = leave_one_out::contributions_in_units(m, k);
        let mut next = per.iter();
        // Exposures whose p_i(z) rounded to 0 or 1 are not in the conditional model: S without them is S, or
        // S - u_i; their tails at k - u_i, k, k + u_i once per u_i.
        let mut certain: HashMap<u64, Vec<Value>> = HashMap::new();
        let span = self.model.span();
        let mut out = Vec::with_capacity(n);
        for i in 0..n {
            let (a, b) = (self.loads.alpha[i], self.loads.beta_of(i));
            let p = normal_law::cdf(a - b * z);
            if p <= 0.0 || p >= 1.0 {
                let u = span * self.model.units.get(i).copied().unwrap_or(1);
                let t = certain.entry(u).or_insert_with(|| {
                    leave_one_out::upper_in_units(m, mom, &[k.saturating_sub(u), k, k.saturating_add(u)])
                });
                out.push(if p <= 0.0 {
                    (leave_one_out::difference(t[0], t[1]), t[1])
                } else {
                    (leave_one_out::difference(t[1], t[2]), t[2])
                });
            } else {
                let c = next.next().expect("one figure per random exposure");
                out.push((c.sensitivity, c.tail_without));
            }
        }
        out
    }
}

/// Every exposure's figures at a node settled by the proxies (see [`Factor::leave_one_out`]) when their bounds
/// are below `pin`: P(J >= k - step) or P(J <= k - 1 + step) below it settles every sensitivity, P(J >= k) and
/// P(J >= k + step) both below it (or both above 1 - pin) every leave-one-out tail. None otherwise.
fn settled(pr: &[Value], pin: f64, n: usize) -> Option<Vec<(Value, Value)>> {
    let small = |v: &Value| v.value + v.abs_err <= pin;
    let sens_pinned = small(&pr[1]) || small(&pr[3]);
    let lo = pr[2];
    let tail_pinned = (small(&pr[0]) && small(&pr[2])) || (1.0 - pr[2].value + pr[2].abs_err <= pin);
    if !(sens_pinned && tail_pinned && pin > 0.0) {
        return None;
    }
    let s_hi = (pr[1].value + pr[1].abs_err).min(pr[3].value + pr[3].abs_err);
    let (t_lo, t_hi) = ((lo.value - lo.abs_err).max(0.0), (pr[0].value + pr[0].abs_err).min(1.0));
    let s = Value {
        value: 0.5 * s_hi,
        ln_value: (0.5 * s_hi).ln(),
        abs_err: 0.5 * s_hi,
        rel_err: 1.0,
        kind: BoundKind::Rigorous,
    };
    let t = Value {
        value: 0.5 * (t_lo + t_hi),
        ln_value: (0.5 * (t_lo + t_hi)).ln(),
        abs_err: 0.5 * (t_hi - t_lo),
        rel_err: 1.0,
        kind: BoundKind::Rigorous,
    };
    Some(vec![(s, t); n])
}

/// [`Factor::contributions`]' answer.
pub struct FactorContributions {
    pub tail: Value,
    /// (sensitivity, tail without) for every entry of `model.bernoulli`.
    pub each: Vec<(Value, Value)>,
    /// The same for the impossible and certain exposures given.
    pub fixed: Vec<(Value, Value)>,
}

/// Half-width of the factor's range for the mixed law: the factor's mass beyond +-MIX_LIMIT (2 Phi(-10), about
/// 1.5e-23) is counted whole in the mixed law's error, since no conditional pmf exceeds 1 in L1.
const MIX_LIMIT: f64 = 10.0;

/// Widest panel of the mixed law's Gauss-Kronrod rule before any refinement.
const MIX_PANEL: f64 = 1.0;

/// Narrowest panel the mixed law refines to; a narrower one is taken with the error it has.
const MIX_MIN_PANEL: f64 = 1e-4;

/// The whole law on the lattice, mixed over the factor once (`Factor::mixed_law`): the conditional pmf at
/// every node (the exact engine's untilted law, t = 0) weighted by the Gauss-Kronrod weights times phi(z), so
/// that quantiles, a distribution table and any cdf read one mixture instead of one integral per probe.
///
/// Errors. For an entry j the truth f_j = E[f_j(Z)] differs from `pmf[j]` by at most `err[j]` (the quadrature's
/// estimate |Kronrod - Gauss| per entry on each panel, and the nodes' relative errors rel f_j(z) integrated)
/// plus a share of `flat`; `flat` bounds in L1, once for any set of entries, the nodes' absolute errors
/// (truncations and the FFT's, `window::Window::abs`), the mass of the factor beyond +-MIX_LIMIT and the
/// rounding of the sums. So a sum over any set J of entries is within sum_J err + flat of the truth.
pub struct MixedLaw {
    /// Lattice index (in steps, the certain exposures' shift included) of `pmf[0]`.
    pub lo: u64,
    pub pmf: Vec<f64>,
    pub err: Vec<f64>,
    pub flat: f64,
    /// Prefix sums of `pmf` and `err` (P(S <= lo + i) and its per-entry error share), and suffix sums (P(S >=
    /// lo + i)), each summed from its own end so that both tails keep their small values.
    below: Vec<(f64, f64)>,
    above: Vec<(f64, f64)>,
}

/// A sum of the mixed law with its error, as a probability (kind `estimated`, as every figure under the factor).
fn mixed_value(v: f64, e: f64) -> Value {
    let value = v.clamp(0.0, 1.0);
    let abs_err = up(e + (v - value).abs());
    Value {
        value,
        ln_value: value.ln(),
        abs_err,
        rel_err: if value > 0.0 { up(abs_err / value) } else { f64::INFINITY },
        kind: BoundKind::Estimated,
    }
}

impl MixedLaw {
    fn new(lo: u64, pmf: Vec<f64>, err: Vec<f64>, flat: f64) -> MixedLaw {
        let n = pmf.len();
        let mut below = Vec::with_capacity(n);
        let (mut s, mut e) = (0.0, 0.0);
        for i in 0..n {
            s += pmf[i];
            e += err[i];
            below.push((s, e));
        }
        let mut above = vec![(0.0, 0.0); n];
        let (mut s, mut e) = (0.0, 0.0);
        for i in (0..n).rev() {
            s += pmf[i];
            e += err[i];
            above[i] = (s, e);
        }
        MixedLaw { lo, pmf, err, flat, below, above }
    }

    /// The index one past the last entry held.
    pub fn end(&self) -> u64 {
        self.lo + self.pmf.len() as u64
    }

    /// The rounding of a sum of `terms` non-negative terms of total `s` (each term itself a sum over the
    /// nodes, counted in `flat`).
    fn rounding(&self, s: f64) -> f64 {
        2.0 * U * s * (self.pmf.len() as f64).log2().max(1.0)
    }

    /// P(S = j).
    pub fn point(&self, j: u64) -> Value {
        if j < self.lo || j >= self.end() {
            return mixed_value(0.0, self.flat);
        }
        let i = (j - self.lo) as usize;
        mixed_value(self.pmf[i], self.err[i] + self.flat)
    }

    /// P(S <= j): the lower sum below the median, one minus the upper sum above it (both within their errors
    /// of the truth; the switch keeps the small side's relative accuracy).
    pub fn lower(&self, j: u64) -> Value {
        if j < self.lo {
            return mixed_value(0.0, self.flat);
        }
        let i = ((j - self.lo) as usize).min(self.pmf.len() - 1);
        let (s, e) = self.below[i];
        if s <= 0.5 || i + 1 == self.pmf.len() {
            return mixed_value(s, e + self.flat + self.rounding(s));
        }
        let (t, f) = self.above[i + 1];
        mixed_value(1.0 - t, f + self.flat + self.rounding(t) + U)
    }

    /// P(S >= j), the mirror of [`MixedLaw::lower`].
    pub fn upper(&self, j: u64) -> Value {
        if j <= self.lo {
            let v = self.lower(self.lo.saturating_sub(1));
            return if j < self.lo || self.lo == 0 {
                mixed_value(1.0, self.flat)
            } else {
                mixed_value(1.0 - v.value, v.abs_err + U)
            };
        }
        if j >= self.end() {
            return mixed_value(0.0, self.flat);
        }
        let i = (j - self.lo) as usize;
        let (t, f) = self.above[i];
        if t <= 0.5 {
            return mixed_value(t, f + self.flat + self.rounding(t));
        }
        let (s, e) = self.below[i - 1];
        mixed_value(1.0 - s, e + self.flat + self.rounding(s) + U)
    }

    /// E[min((S - a)+, l)] in units (no cap when `limit` is None), S = offset + span j on `model`'s lattice,
    /// with `mean` the law's exact mean in steps. A limited layer sums its payoff, at most l, against the pmf,
    /// so its error is the payoff against `err` plus l `flat`; an unlimited one is E S - a + E[(a - S)+], whose
    /// payoff a - S is at most a, so the unbounded tail of a Poisson or compound part needs no window.
    pub fn layer(&self, model: &Model, mean: f64, a: u64, limit: Option<u64>) -> Value {
        let (mut v, mut e) = (0.0f64, 0.0f64);
        for (i, (&p, &pe)) in self.pmf.iter().zip(&self.err).enumerate() {
            let x = model.units_of(self.lo + i as u64);
            let pay = match limit {
                Some(l) => x.saturating_sub(a).min(l),
                None => a.saturating_sub(x),
            } as f64;
            v += pay * p;
            e += pay * pe;
        }
        let terms = (self.pmf.len() as f64).log2().max(1.0) + 2.0;
        let (value, abs_err) = match limit {
            Some(l) => (v, e + l as f64 * self.flat + 2.0 * U * terms * v),
            None => {
                let h = model.span() as f64;
                let mean_units = model.offset as f64 + h * mean;
                // The mean is a sum over the exposures: its rounding is within (n + 8) U of it.
                let n = (model.bernoulli.len() + model.binomials.len() + model.scaled_poisson.len()) as f64 + 8.0;
                let m_err = n * U * mean_units;
                let value = mean_units - a as f64 + v;
                (value, e + a as f64 * self.flat + m_err + 2.0 * U * terms * (mean_units + a as f64 + v))
            }
        };
        let value_c = value.max(0.0);
        let abs_err = up(abs_err + (value_c - value));
        Value {
            value: value_c,
            ln_value: value_c.ln(),
            abs_err,
            rel_err: if value_c > 0.0 { up(abs_err / value_c) } else { f64::INFINITY },
            kind: BoundKind::Estimated,
        }
    }

    /// The value of a tail query on the lattice index.
    pub fn query(&self, k: u64, side: Side) -> Value {
        match side {
            Side::Upper => self.upper(k),
            Side::Lower => self.lower(k),
            Side::Point => self.point(k),
        }
    }
}

/// A growing vector indexed by lattice index.
struct Acc {
    lo: u64,
    v: Vec<f64>,
}

impl Acc {
    fn add(&mut self, lo: u64, xs: &[f64]) {
        if xs.is_empty() {
            return;
        }
        if self.v.is_empty() {
            self.lo = lo;
        }
        if lo < self.lo {
            let grow = (self.lo - lo) as usize;
            self.v.splice(0..0, std::iter::repeat_n(0.0, grow));
            self.lo = lo;
        }
        let at = (lo - self.lo) as usize;
        if at + xs.len() > self.v.len() {
            self.v.resize(at + xs.len(), 0.0);
        }
        for (d, &x) in self.v[at..].iter_mut().zip(xs) {
            *d += x;
        }
    }

    /// The values from `lo` over `len` entries (0 where nothing was added).
    fn span(&self, lo: u64, len: usize) -> Vec<f64> {
        let mut out = vec![0.0; len];
        for (i, o) in out.iter_mut().enumerate() {
            let j = lo + i as u64;
            if j >= self.lo && ((j - self.lo) as usize) < self.v.len() {
                *o = self.v[(j - self.lo) as usize];
            }
        }
        out
    }
}

/// The conditional law at one node: (first index, pmf, relative error, absolute L1 error).
type NodeLaw = (u64, Vec<f64>, f64, f64);

impl Factor {
    /// The whole law mixed over the factor, computed once and kept (see [`MixedLaw`]).
    ///
    /// Panels: the factor's range [-MIX_LIMIT, MIX_LIMIT] cut at the crossings of conditional means spread over
    /// the law (`breakpoints`) and into panels at most MIX_PANEL wide; a panel whose summed |Kronrod - Gauss|
    /// exceeds its share (by width) of the target is halved, until the target, MIX_MIN_PANEL or MAX_NODES. The
    /// target is the tolerance's relative part times 1e-2 in L1 (1e-9 by default), never below its absolute
    /// floor: a probability read from the mixture is then good to about 1e-9 absolutely, which is what a
    /// quantile's defining inequalities and a distribution table ask; far tails keep the tail route's
    /// relative accuracy only there (`Factor::exact`).
    pub fn mixed_law(&self) -> &MixedLaw {
        self.mixed.get_or_init(|| self.mix())
    }

    fn node_law(&self, z: f64) -> NodeLaw {
        let (m, _) = self.at(z);
        let t = exact::tilted(&m, 0.0);
        let w = t.window;
        (w.lo, w.w, w.rel, w.abs)
    }

    fn mix(&self) -> MixedLaw {
        let target = (1e-2 * self.tol.rel).max(self.tol.abs).max(1e-15);
        let total = 2.0 * MIX_LIMIT;
        // Breakpoints where conditional means spread over the law cross, as for a distribution table.
        let levels: Vec<f64> = (0..=64).map(|i| self.profile.at(MIX_LIMIT - i as f64 * total / 64.0).0).collect();
        let mut pts: Vec<f64> = self.breakpoints(&levels, true);
        pts.retain(|z| z.abs() < MIX_LIMIT);
        pts.extend([-MIX_LIMIT, MIX_LIMIT]);
        pts.sort_by(f64::total_cmp);
        pts.dedup();
        let mut stack: Vec<(f64, f64)> = Vec::new();
        for w in pts.windows(2).rev() {
            let pieces = ((w[1] - w[0]) / MIX_PANEL).ceil().max(1.0) as usize;
            let h = (w[1] - w[0]) / pieces as f64;
            for i in (0..pieces).rev() {
                let a = w[0] + i as f64 * h;
                let b = if i + 1 == pieces { w[1] } else { a + h };
                stack.push((a, b));
            }
        }
        let parallel = self.parallel || self.model.lattice_width() > 2000;
        let mut pmf = Acc { lo: 0, v: Vec::new() };
        let mut err = Acc { lo: 0, v: Vec::new() };
        // The factor's mass beyond the range, and each node's absolute error, in L1.
        let mut flat = 2.0 * normal_law::sf(MIX_LIMIT);
        let mut used = 0usize;
        while let Some((a, b)) = stack.pop() {
            if self.cancel.is_cancelled() {
                break;
            }
            let rule = gk15(a, b);
            let zs: Vec<f64> = rule.iter().map(|r| r.0).collect();
            let laws: Vec<NodeLaw> = mixture::evaluate_all(&zs, parallel, &|z: f64| self.node_law(z));
            used += 15;
            self.nodes.fetch_add(15, Ordering::Relaxed);
            self.gauss.fetch_add(7, Ordering::Relaxed);
            let lo = laws.iter().map(|l| l.0).min().unwrap_or(0);
            let hi = laws.iter().map(|l| l.0 + l.1.len() as u64).max().unwrap_or(lo);
            let len = (hi - lo) as usize;
            let (mut k, mut g, mut r) = (vec![0.0; len], vec![0.0; len], vec![0.0; len]);
            let mut node_abs = 0.0;
            for ((z, wk, wg), (l0, w, rel, abs)) in rule.iter().zip(&laws) {
                let phi = normal_law::ln_pdf(*z).exp();
                let (ck, cg) = (wk * phi, wg * phi);
                // |w - f| <= rel f + e with ||e||_1 <= abs, and f <= (w + |e|) / (1 - rel).
                let rr = if *rel < 0.5 { rel / (1.0 - rel) } else { f64::INFINITY };
                let at = (l0 - lo) as usize;
                for (i, &x) in w.iter().enumerate() {
                    k[at + i] += ck * x;
                    g[at + i] += cg * x;
                    r[at + i] += ck * rr * x;
                }
                node_abs += ck * abs * (1.0 + rr);
            }
            let mut d = 0.0;
            for i in 0..len {
                let e = (k[i] - g[i]).abs();
                d += e;
                r[i] += e;
            }
            if d > target * (b - a) / total && b - a > MIX_MIN_PANEL && used + 30 <= MAX_NODES {
                let c = 0.5 * (a + b);
                stack.push((c, b));
                stack.push((a, c));
                continue;
            }
            flat += node_abs;
            pmf.add(lo, &k);
            err.add(lo, &r);
        }
        if pmf.v.is_empty() {
            return MixedLaw::new(0, vec![0.0], vec![0.0], 1.0);
        }
        let (lo, len) = (pmf.lo, pmf.v.len());
        let e = err.span(lo, len);
        // The sums over nodes and panels: at most `used` non-negative terms per entry.
        let e: Vec<f64> = e.iter().zip(&pmf.v).map(|(&e, &p)| up(e + used as f64 * U * p)).collect();
        MixedLaw::new(lo, pmf.v, e, up(flat))
    }
}
