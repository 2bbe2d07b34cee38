//! The tilted law of a book with loss units from its characteristic function
//! (src/engine/exact/characteristic_lattice.rs) against exact references and against the product tree:
//! - small books in units (listed exposures, groups, certain exposures, probabilities a / 512, a span and an
//!   offset) against De Pril's recursion in exact rationals (De Pril 1986, tests/common/de_pril.rs; for the
//!   larger books the product of the generating functions in exact integers, equal to it), and books with
//!   compound Poisson sources against Panjer's recursion in exact rationals (Panjer 1981, as in
//!   tests/compound.rs, with e^-lambda enclosed in a dyadic interval): every window entry, the law rebuilt from
//!   tilted windows, and P(S >= k) from `exact::upper_tail_of` far into the tail, with the bound's tightness
//!   measured;
//! - random books of 400 to 3000 exposures (units drawn several ways, groups, compound sources, certain
//!   exposures, probabilities near 1/2): `characteristic_lattice::build` against the product tree
//!   (`lattice::tilted_tree`), against itself at a second tilt, and `exact::evaluate` against the tree, each
//!   within the sum of the two rigorous bounds;
//! - a tilted probability of exactly 1/2, where `build` gives None and the exact method falls back to the tree.
//!
//! Run with --nocapture for the figures (observed error over bound, the bound's looseness, how often `build`
//! gave None, the time of each construction).

#[path = "common/bignum.rs"]
mod bignum;
#[path = "common/de_pril.rs"]
mod de_pril;

use de_pril::{de_pril, rat, Class};
use num_bigint::BigInt;
use num_rational::BigRational;
use num_traits::{One, Signed, ToPrimitive, Zero};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use tailtally::engine::exact::{self, characteristic_lattice, lattice, window::Window, Tilted};
use tailtally::engine::numerics::{cgf, float::U, moments::Moments};
use tailtally::engine::{Side, Value};
use tailtally::portfolio::Model;

fn int(n: u64) -> BigRational {
    BigRational::from_integer(n.into())
}

/// [lo, hi] enclosing e^-lambda (lambda a non-negative rational), from the series of e^lambda to N terms.
/// Source: tests/compound.rs (`exp_minus`): sum_(n <= N) lambda^n / n! <= e^lambda <= that + 2 lambda^(N+1) /
/// (N+1)! for lambda <= (N + 2) / 2.
fn exp_minus(lambda: &BigRational) -> (BigRational, BigRational) {
    const N: u64 = 200;
    assert!(lambda <= &int((N + 2) / 2), "the remainder bound needs lambda <= (N + 2) / 2");
    let (mut sum, mut term) = (BigRational::zero(), BigRational::one());
    for n in 0..=N {
        sum += &term;
        term = term * lambda / int(n + 1);
    }
    let upper = &sum + &term * int(2);
    (upper.recip(), sum.recip())
}

/// Source: Panjer's recursion (H. H. Panjer, "Recursive evaluation of a family of compound distributions",
/// ASTIN Bulletin 12, 1981, the (a, b) = (0, lambda) case), in rationals as in tests/compound.rs: the compound
/// Poisson law of `parts` (size in steps, rate) up to `top` is e^-lambda times the returned vector, lambda the
/// total rate: h_0 = 1, h_k = (1 / k) sum_j j (lambda f_j) h_(k - j).
fn panjer(parts: &[(u64, BigRational)], top: usize) -> (Vec<BigRational>, BigRational) {
    let lambda: BigRational = parts.iter().map(|p| p.1.clone()).sum();
    let mut lf = vec![BigRational::zero(); top + 1];
    for (s, r) in parts {
        if (*s as usize) <= top {
            lf[*s as usize] += r;
        }
    }
    let sizes: Vec<usize> = (1..=top).filter(|&j| !lf[j].is_zero()).collect();
    let mut h = vec![BigRational::zero(); top + 1];
    h[0] = BigRational::one();
    for k in 1..=top {
        let mut acc = BigRational::zero();
        for &j in sizes.iter().take_while(|&&j| j <= k) {
            if !h[k - j].is_zero() {
                acc += &lf[j] * int(j as u64) * &h[k - j];
            }
        }
        h[k] = acc / int(k as u64);
    }
    (h, lambda)
}

/// lcm(a, b) for positive integers, through the reduced fraction a / b = (a / g) / (b / g).
fn lcm(a: &BigInt, b: &BigInt) -> BigInt {
    a * BigRational::new(a.clone(), b.clone()).denom()
}

/// Source: the definition of the law of a sum of independent exposures, the product of their generating
/// functions prod_i (1 - p_i + p_i x^(u_i)) prod_g (1 - p_g + p_g x^(u_g))^(m_g), in exact integers: every p is
/// a dyadic rational a / d, so the coefficients are integers over the product of the d's. Returns (numerators
/// from lattice index 0, shifted by the certain steps; the common denominator). Equal to De Pril's recursion
/// (tests/common/de_pril.rs) exactly, asserted on the first small book; far cheaper in rationals.
fn product_pmf(model: &Model) -> (Vec<BigInt>, BigInt) {
    let step = |v: &[u64], i: usize| v.get(i).copied().unwrap_or(1) as usize;
    let mut factors: Vec<(f64, usize, u64)> =
        model.bernoulli.iter().enumerate().map(|(i, &p)| (p, step(&model.units, i), 1)).collect();
    factors.extend(model.binomials.iter().enumerate().map(|(i, g)| (g.p, step(&model.group_units, i), g.size)));
    let mut c = vec![BigInt::zero(); model.shift as usize];
    c.push(BigInt::one());
    let mut den = BigInt::one();
    for (p, u, m) in factors {
        let r = rat(p);
        let (a, d) = (r.numer().clone(), r.denom().clone());
        let b = &d - &a;
        for _ in 0..m {
            let mut next = vec![BigInt::zero(); c.len() + u];
            for (j, x) in c.iter().enumerate().filter(|(_, x)| !x.is_zero()) {
                next[j] += x * &b;
                next[j + u] += x * &a;
            }
            c = next;
            den *= &d;
        }
    }
    (c, den)
}

/// Bits of the dyadic enclosure of e^-lambda.
const E_BITS: usize = 256;

/// The exact law of a model's lattice index: P(S = j) in [num_j e.0, num_j e.1] / d, d = den 2^E_BITS with
/// sources (e.0 <= 2^E_BITS e^-lambda <= e.1 integers) and d = den, e = (1, 1) without them; num known up to
/// `num.len() - 1`. Held in integers over one denominator so that a check costs no gcd.
struct Exact {
    num: Vec<BigInt>,
    d: BigInt,
    e: (BigInt, BigInt),
    /// Prefix sums of num: below[k] = sum over 0..k.
    below: Vec<BigInt>,
    /// Without sources: the whole support is in num, and upper tails are summed directly.
    bounded: bool,
}

impl Exact {
    /// The product of the generating functions of the listed exposures and groups ([`product_pmf`]); with
    /// compound sources (and one-step Poisson events) convolved with Panjer's recursion above, up to `top`.
    fn of(model: &Model, top: usize) -> Exact {
        let (c, den) = product_pmf(model);
        let mut parts: Vec<(u64, BigRational)> = model.scaled_poisson.iter().map(|&(s, r)| (s, rat(r))).collect();
        if model.poisson > 0.0 {
            parts.push((1, rat(model.poisson)));
        }
        let (num, d, e, bounded) = if parts.is_empty() {
            (c, den, (BigInt::one(), BigInt::one()), true)
        } else {
            let (h, lambda) = panjer(&parts, top);
            // h over one common denominator, then an integer convolution.
            let l = h.iter().fold(BigInt::one(), |l, x| lcm(&l, x.denom()));
            let hn: Vec<BigInt> = h.iter().map(|x| x.numer() * (&l / x.denom())).collect();
            let mut num = vec![BigInt::zero(); top + 1];
            for (i, x) in c.iter().enumerate().filter(|(i, x)| *i <= top && !x.is_zero()) {
                for (j, y) in hn.iter().enumerate().take(top + 1 - i) {
                    num[i + j] += x * y;
                }
            }
            // e^-lambda in [lo, hi], widened outwards to multiples of 2^-E_BITS.
            let (lo, hi) = exp_minus(&lambda);
            let scale = BigRational::from_integer(BigInt::one() << E_BITS);
            let e = ((lo * &scale).floor().to_integer(), (hi * &scale).ceil().to_integer());
            (num, (den * l) << E_BITS, e, false)
        };
        let mut below = vec![BigInt::zero()];
        for x in &num {
            let next = below.last().unwrap() + x;
            below.push(next);
        }
        Exact { num, d, e, below, bounded }
    }

    /// P(S = j) as [lo, hi] / d.
    fn pmf(&self, j: u64) -> (BigInt, BigInt) {
        assert!(self.bounded || (j as usize) < self.num.len(), "j={j} beyond the reference");
        let x = self.num.get(j as usize).cloned().unwrap_or_else(BigInt::zero);
        (&x * &self.e.0, &x * &self.e.1)
    }

    /// P(S >= k) as [lo, hi] / d: the sum of the pmf from k up (bounded), 1 - e sum_(j < k) P(S = j) otherwise.
    fn upper(&self, k: u64) -> (BigInt, BigInt) {
        let k = k as usize;
        if self.bounded {
            let total = self.below.last().unwrap();
            let x = total - self.below.get(k).unwrap_or(total);
            (x.clone(), x)
        } else {
            let b = &self.below[k];
            (&self.d - b * &self.e.1, &self.d - b * &self.e.0)
        }
    }
}

/// x / d as a double (d > 0) from the top 60 bits of each: within 2^-52 of it, relative.
fn ratio(x: &BigInt, d: &BigInt) -> f64 {
    if x.is_zero() {
        return 0.0;
    }
    let top = |m: &num_bigint::BigUint| {
        let sh = m.bits().saturating_sub(60);
        ((m >> sh).to_f64().unwrap(), sh as i64)
    };
    let ((a, ea), (b, eb)) = (top(x.magnitude()), top(d.magnitude()));
    let e = (ea - eb).clamp(-4000, 4000) as i32;
    let v = a / b * 2f64.powi(e / 2) * 2f64.powi(e - e / 2);
    if x.is_negative() {
        -v
    } else {
        v
    }
}

/// got - x / d, formed exactly in integers (got is a dyadic rational) and rounded once by [`ratio`].
fn minus(got: f64, x: &BigInt, d: &BigInt) -> f64 {
    let g = rat(got);
    ratio(&(g.numer() * d - x * g.denom()), &(g.denom() * d))
}

/// The window's entry at j (0 outside it).
fn at(w: &Window, j: u64) -> f64 {
    if j >= w.lo && j <= w.hi() {
        w.w[(j - w.lo) as usize]
    } else {
        0.0
    }
}

/// The tilt the exact method takes for P(S >= k): as `exact::solve_tilt` (crate-private) does, the root of
/// K'(t) = x with x clamped inside the support, to 0.05 sd, and t >= 0.
fn tilt_for(model: &Model, moments: &Moments, k: u64) -> f64 {
    let lo = model.support_min() as f64 + 0.5;
    let x = match model.support_max() {
        Some(m) if (m as f64) - 0.5 > lo => (k as f64).clamp(lo, m as f64 - 0.5),
        _ => (k as f64).max(lo.min(moments.mean)),
    };
    let sd = moments.sd().max(1.0);
    cgf::solve(model, moments, x, 0.05 * sd.min(10.0)).t.max(0.0)
}

/// Worst figures of the rational checks, for the report.
#[derive(Default, Debug)]
struct Figures {
    /// max over entries of |w_j - f_j| / inf at t = 0 (must be <= 1).
    entry_obs_over_bound: f64,
    /// max over laws of inf / max(max_j |w_j - f_j|, 2^-54 max_j f_j) at t = 0: how loose the per-entry bound is.
    entry_looseness: f64,
    /// max over entries of |rebuilt - f_j| / bound at t != 0.
    rebuilt_obs_over_bound: f64,
    /// max over tails of |v - P| / (rel_err P).
    tail_obs_over_bound: f64,
    /// max over tails of rel_err / max(|v - P| / P, 2^-54).
    tail_looseness: f64,
    /// largest and smallest rel_err seen.
    tail_rel_max: f64,
    tail_rel_min: f64,
    /// smallest tail checked.
    smallest_tail: f64,
    entries: usize,
    tails: usize,
}

const FLOOR: f64 = 1.0 / (1u64 << 54) as f64;

/// Every check of a small book against its exact law: the window entries at t = 0, the law rebuilt from the
/// windows at t_up > 0 and t_down < 0, and P(S >= k) at mean + z sd for every z in `zs` (and the support's
/// last point when bounded), each from the law built at its own tilt, with the figures.
fn check_book(name: &str, model: &Model, ts: [f64; 2], zs: &[f64], fig: &mut Figures) {
    let moments = Moments::of(model);
    let (mean, sd) = (moments.mean, moments.sd());
    let mut ks: Vec<u64> = zs.iter().map(|z| (mean + z * sd).ceil() as u64).collect();
    if let Some(m) = model.support_max() {
        ks.extend([m - 1, m]);
        ks.retain(|&k| k <= m);
    }
    let laws: Vec<Tilted> = [0.0, ts[0], ts[1]]
        .iter()
        .map(|&t| characteristic_lattice::build(model, t).unwrap_or_else(|| panic!("{name}: build at t={t} gave None")))
        .collect();
    let tail_laws: Vec<(u64, Tilted)> = ks
        .iter()
        .map(|&k| {
            let t = tilt_for(model, &moments, k);
            let law = characteristic_lattice::build(model, t)
                .unwrap_or_else(|| panic!("{name}: build at t={t} for k={k} gave None"));
            (k, law)
        })
        .collect();
    // The reference reaches the last entry of every window compared and every threshold.
    let top = laws.iter().map(|l| l.window.hi()).max().unwrap();
    let top = top.max(*ks.iter().max().unwrap()) as usize + 2;
    let exact = Exact::of(model, top);
    let (d, d2) = (&exact.d, &exact.d * 2);
    // Source: the exact law. At t = 0 the window is the law itself: every entry within the window's per-entry
    // bound `inf` (plus U of the value, as in tests/characteristic.rs; observed without it). The differences
    // are formed in exact integers and rounded once (2^-52 of themselves), far below the bound's margin.
    {
        let law = &laws[0];
        let w = &law.window;
        assert_eq!(law.t, 0.0);
        assert_eq!(w.rel, 0.0, "{name}: the construction has absolute errors only");
        let hi = if exact.bounded { exact.num.len() as u64 - 1 } else { w.hi() + 1 };
        let (mut worst, mut biggest) = (0.0f64, 0.0f64);
        for j in 0..=hi {
            let (lo, up) = exact.pmf(j);
            let gap = ratio(&(&up - &lo), &d2);
            let truth = ratio(&up, d);
            let got = at(w, j);
            let diff = minus(got, &(&lo + &up), &d2).abs();
            assert!(diff <= w.inf + U * truth + gap, "{name} t=0 j={j}: {got:e} vs {truth:e}, inf {:e}", w.inf);
            let obs = (diff - gap).max(0.0);
            worst = worst.max(obs);
            biggest = biggest.max(truth);
            fig.entry_obs_over_bound = fig.entry_obs_over_bound.max(obs / w.inf);
            fig.entries += 1;
        }
        let loose = w.inf / worst.max(FLOOR * biggest);
        eprintln!(
            "{name}: t=0 window [{}, {}], inf {:.2e}, worst entry error {worst:.2e} ({loose:.0}x)",
            w.lo,
            w.hi(),
            w.inf
        );
        fig.entry_looseness = fig.entry_looseness.max(loose);
        // The bound is not vacuous: far below the largest entry (as tests/characteristic.rs asks).
        assert!(w.inf < 1e-13, "{name}: inf {:e}", w.inf);
    }
    // Source: the exact law. At t != 0, P(S = j) = exp(K(t) - t j) w_j (the Esscher transform), within the
    // scale's bound and the window's `inf` scaled back, as tests/characteristic.rs states it.
    for law in &laws[1..] {
        let (w, t) = (&law.window, law.t);
        assert_ne!(t, 0.0);
        let hi = if exact.bounded { exact.num.len() as u64 - 1 } else { w.hi() };
        let mut worst = 0.0f64;
        for j in 0..=hi {
            let (lo, up) = exact.pmf(j);
            let truth = ratio(&(&lo + &up), &d2);
            let gap = ratio(&(&up - &lo), &d2);
            let got = at(w, j);
            let (ln_s, err) = law.scale.ln_scale(t, j as f64);
            let s = ln_s.exp();
            let rebuilt = s * got;
            let bound = s * w.inf * (1.0 + 1e-9) + (err.exp_m1() + 8.0 * U) * (truth + s * w.inf) + gap + 1e-300;
            let diff = (rebuilt - truth).abs();
            assert!(diff <= bound, "{name} t={t} j={j}: {rebuilt:e} vs {truth:e}, bound {bound:e}");
            worst = worst.max(diff / bound);
            fig.entries += 1;
        }
        fig.rebuilt_obs_over_bound = fig.rebuilt_obs_over_bound.max(worst);
        assert!(w.inf < 1e-13, "{name} t={t}: inf {:e}", w.inf);
    }
    // Source: the exact law's upper tails. P(S >= k) from the law tilted for k: |v - P| <= rel_err P, and the
    // logarithm within ln(1 + rel_err) / (1 - rel_err) and a few ulps of itself of ln P (ln P from the exact
    // integers by tests/common/bignum.rs).
    for (k, law) in &tail_laws {
        let k = *k;
        let v = exact::upper_tail_of(law, k);
        let (lo, up) = exact.upper(k);
        assert!(lo.is_positive(), "{name} k={k}: the reference's interval reaches 0");
        let p = ratio(&lo, d);
        let gap = ratio(&(&up - &lo), &d2);
        assert!(gap < p * 1e-20, "{name} k={k}: the reference is too wide");
        let diff = minus(v.value, &(&lo + &up), &d2).abs();
        let at_k = format!("{name} k={k} (z={:.1}, t={})", (k as f64 - mean) / sd, law.t);
        assert!(diff <= v.rel_err * p + gap, "{at_k}: {:e} vs {p:e}, rel_err {:e}", v.value, v.rel_err);
        let obs = (diff - gap).max(0.0) / p;
        let ln_p = bignum::ln_ratio((&lo + &up).magnitude(), d2.magnitude());
        let ln_bound = v.rel_err / (1.0 - v.rel_err) * (1.0 + 1e-9) + 4.0 * U * ln_p.abs() + 1e-300;
        assert!((v.ln_value - ln_p).abs() <= ln_bound, "{at_k}: ln {} vs {ln_p}", v.ln_value);
        fig.tail_obs_over_bound = fig.tail_obs_over_bound.max(obs / v.rel_err);
        fig.tail_looseness = fig.tail_looseness.max(v.rel_err / obs.max(FLOOR));
        fig.tail_rel_max = fig.tail_rel_max.max(v.rel_err);
        fig.tail_rel_min = if fig.tails == 0 { v.rel_err } else { fig.tail_rel_min.min(v.rel_err) };
        fig.smallest_tail = if fig.tails == 0 { v.value } else { fig.smallest_tail.min(v.value) };
        fig.tails += 1;
        eprintln!("{at_k}: P {:.3e}, observed {obs:.2e}, rel_err {:.2e}", v.value, v.rel_err);
    }
}

/// A small book in units: `n` listed exposures with probabilities a / 512 (some near 1/2) of `unit(i)` units,
/// two groups (12 and 5 members) of `groups` units, certain exposures of `certain` units.
fn small_book(n: usize, unit: impl Fn(usize) -> u64, groups: [u64; 2], certain: &[u64]) -> Model {
    let mut m = Model::default();
    for i in 0..n {
        // a in 1..=300, with 255 and 200 (q near 1/2, the factors whose modulus has no a-priori lower bound),
        // never 256: at q = 1/2 exactly a factor vanishes on the sample grid and `build` gives None (see
        // `exactly_one_half_falls_back_to_the_tree`).
        let a = match i % 9 {
            4 => 255,
            7 => 200,
            _ => match 1 + (i * 97 % 300) as u64 {
                256 => 257,
                a => a,
            },
        };
        m.push_weighted(a as f64 / 512.0, unit(i));
    }
    m.push_group_weighted(12, 32.0 / 512.0, groups[0]);
    m.push_group_weighted(5, 96.0 / 512.0, groups[1]);
    for &u in certain {
        m.push_weighted(1.0, u);
    }
    m
}

/// Source: De Pril's recursion in exact rationals (asserted equal, on the first book, to the product of the
/// generating functions in exact integers, which is the reference for the larger books), and Panjer's
/// recursion in rationals convolved with it (books with sources). Checks every window entry at t = 0, the law
/// rebuilt at a positive and a negative tilt, and P(S >= k) from the bulk to mean + 12 sd or the support's last
/// point, each within its bound; and the bound's looseness, reported in the figures.
#[test]
fn small_books_in_units_match_exact_rationals() {
    let mut fig = Figures::default();
    let zs = [0.0, 1.0, 3.0, 6.0, 9.0, 12.0];
    // 1. Units 1..=40 (unit 1 among them: span 1), two groups, certain exposures (shift 7). The reference, the
    // product of the generating functions, equals De Pril's recursion exactly here (a few seconds in rationals;
    // the larger books below would take minutes).
    let mut m = small_book(8, |i| 1 + (i * 13 % 40) as u64, [3, 5], &[3, 4]);
    m.set_lattice();
    assert_eq!((m.span(), m.offset, m.shift), (1, 0, 7));
    let step = |v: &[u64], i: usize| v.get(i).copied().unwrap_or(1);
    let mut classes: Vec<Class> =
        m.bernoulli.iter().enumerate().map(|(i, &p)| Class { units: step(&m.units, i), p, count: 1 }).collect();
    classes.extend(m.binomials.iter().enumerate().map(|(i, g)| Class {
        units: step(&m.group_units, i),
        p: g.p,
        count: g.size,
    }));
    let de_pril_pmf = de_pril(&classes, m.shift);
    let (num, den) = product_pmf(&m);
    assert_eq!(de_pril_pmf.len(), num.len());
    for (j, (a, b)) in de_pril_pmf.iter().zip(&num).enumerate() {
        assert_eq!(a, &BigRational::new(b.clone(), den.clone()), "j={j}: De Pril and the product differ");
    }
    check_book("units 1..40", &m, [0.05, -0.3], &zs, &mut fig);
    // 1b. The same with 40 exposures (against the product only).
    let mut m = small_book(40, |i| 1 + (i * 13 % 40) as u64, [7, 13], &[3, 4]);
    m.set_lattice();
    check_book("40 exposures, units 1..40", &m, [0.05, -0.3], &zs, &mut fig);
    // 2. Even units but one exposure of 1 unit: |phi| has a second peak of almost full height at theta = pi.
    let mut m = small_book(28, |i| if i == 3 { 1 } else { 2 * (1 + (i * 7 % 20) as u64) }, [8, 14], &[5]);
    m.set_lattice();
    check_book("even units and one odd", &m, [0.08, -0.2], &zs, &mut fig);
    // 3. A common factor 2 in every random unit and an odd certain exposure: span 2, offset 1.
    let mut m = small_book(24, |i| 2 * (1 + (i * 11 % 17) as u64), [4, 10], &[3]);
    m.set_lattice();
    assert_eq!((m.span(), m.offset, m.shift), (2, 1, 1));
    check_book("span 2, offset 1", &m, [0.1, -0.25], &zs, &mut fig);
    // 4. Compound sources (sizes 3, 8, 11 at dyadic rates) and one-step Poisson events with listed exposures
    // and groups.
    let mut m = small_book(12, |i| 1 + (i * 29 % 16) as u64, [7, 13], &[2]);
    m.push_scaled_poisson(3, 0.375);
    m.push_scaled_poisson(8, 0.5);
    m.push_scaled_poisson(11, 0.25);
    m.poisson = 0.75;
    m.set_lattice();
    assert_eq!(m.scaled_poisson.len(), 3);
    check_book("sources with exposures", &m, [0.06, -0.3], &zs, &mut fig);
    // 5. Sources only, sizes with a common factor 2 among themselves but not with the one exposure of 5 units.
    let mut m = Model::default();
    m.push_weighted(40.0 / 512.0, 5);
    m.push_scaled_poisson(2, 1.5);
    m.push_scaled_poisson(6, 0.625);
    m.push_scaled_poisson(14, 0.125);
    m.set_lattice();
    check_book("sources only", &m, [0.1, -0.4], &zs, &mut fig);
    eprintln!("{fig:?}");
    // The bound's honesty and tightness: observed error never above it, and at most 1e4 times the observed error
    // (floored at 2^-54 of the largest entry or of the tail).
    assert!(fig.entry_obs_over_bound <= 1.0 && fig.rebuilt_obs_over_bound <= 1.0 && fig.tail_obs_over_bound <= 1.0);
    assert!(fig.entry_looseness <= 1e4, "{fig:?}");
    assert!(fig.tail_looseness <= 1e4, "{fig:?}");
    assert!(fig.entries > 2000 && fig.tails >= 30, "{fig:?}");
}

/// How the units of a random book are drawn.
#[derive(Clone, Copy, Debug, PartialEq)]
enum Units {
    /// Log-uniform on 1..=1000.
    LogUniform,
    /// 3, 5 or 7.
    Few,
    /// Even (2..=120) but for a few odd exposures: |phi| has a second peak near theta = pi.
    MostlyEven,
    /// 1..=10, and one exposure of 10^5 units.
    Giant,
}

const KINDS: [Units; 4] = [Units::LogUniform, Units::Few, Units::MostlyEven, Units::Giant];

fn draw_unit(rng: &mut ChaCha8Rng, kind: Units) -> u64 {
    match kind {
        Units::LogUniform => (rng.gen::<f64>() * 1000f64.ln()).exp().round().clamp(1.0, 1000.0) as u64,
        Units::Few => [3, 5, 7][rng.gen_range(0..3)],
        Units::MostlyEven => 2 * rng.gen_range(1..=60),
        Units::Giant => rng.gen_range(1..=10),
    }
}

/// A random book of 400 to 3000 exposures: units by `kind`, probabilities uniform below a cap (0.01, 0.1 or
/// 0.3), a few near 1/2 (0.3 to 0.6) in half the books, groups with units in a third, certain exposures in a
/// fifth, compound sources in a fifth (with one-step Poisson events in a tenth).
fn random_book(rng: &mut ChaCha8Rng, case: usize) -> Model {
    let kind = KINDS[case % 4];
    // Books with a giant exposure cost the characteristic function a window of 2^17 to 2^22 points whatever
    // their size (the giant's Bennett radius): kept to 400..1200 exposures for the test's time.
    let n = if kind == Units::Giant { rng.gen_range(400..1200) } else { rng.gen_range(400..3000) };
    let cap = [0.01, 0.1, 0.3][case / 4 % 3];
    let mut m = Model::default();
    for _ in 0..n {
        let u = draw_unit(rng, kind);
        m.push_weighted(rng.gen::<f64>().max(1e-6) * cap, u);
    }
    match kind {
        Units::MostlyEven => {
            for _ in 0..rng.gen_range(1..=4) {
                m.push_weighted(rng.gen::<f64>().max(1e-6) * cap, 2 * rng.gen_range(0..10) + 1);
            }
        }
        Units::Giant => m.push_weighted(rng.gen_range(0.01..0.3), 100_000),
        _ => {}
    }
    if case % 2 == 0 {
        for _ in 0..rng.gen_range(1..6) {
            let u = draw_unit(rng, kind);
            m.push_weighted(rng.gen_range(0.3..0.6), u);
        }
    }
    if case % 3 == 0 {
        for _ in 0..rng.gen_range(1..=2) {
            let u = draw_unit(rng, kind);
            m.push_group_weighted(rng.gen_range(2..200), rng.gen::<f64>().max(1e-6) * cap, u);
        }
    }
    if case % 5 == 1 {
        for _ in 0..rng.gen_range(1..=3) {
            let u = draw_unit(rng, kind);
            m.push_weighted(1.0, u);
        }
    }
    if case % 5 == 0 {
        for _ in 0..rng.gen_range(1..=4) {
            let u = draw_unit(rng, kind);
            m.push_scaled_poisson(u, rng.gen_range(0.5..10.0));
        }
        if case % 10 == 0 {
            m.poisson = rng.gen_range(0.5..5.0);
        }
    }
    m.set_lattice();
    m
}

/// The tails P(S >= k) of two laws agree within the sum of their bounds: |a - b| <= abs_a + abs_b, and in
/// logarithms (where the values underflow) |ln a - ln b| <= -ln(1 - rel_a) - ln(1 - rel_b) plus 4 U of each
/// logarithm. Returns the larger of the two |difference| / bound, or None when either bound is infinite (a
/// law whose window misses k).
fn agree(at_k: &str, va: &Value, vb: &Value) -> Option<f64> {
    let sum = va.abs_err + vb.abs_err;
    let diff = (va.value - vb.value).abs();
    assert!(diff <= sum, "{at_k}: {va:?} vs {vb:?}");
    if !(va.rel_err < 1.0 && vb.rel_err < 1.0) {
        return None;
    }
    let ln_bound = -(-va.rel_err).ln_1p() - (-vb.rel_err).ln_1p() + 4.0 * U * (va.ln_value.abs() + vb.ln_value.abs());
    let ln_diff = (va.ln_value - vb.ln_value).abs();
    assert!(ln_diff <= ln_bound, "{at_k}: ln {} vs {}, bound {ln_bound:e}", va.ln_value, vb.ln_value);
    Some((ln_diff / ln_bound).max(if sum > 0.0 { diff / sum } else { 0.0 }))
}

/// What a run over random books saw, for the report.
#[derive(Default)]
struct Tally {
    compared: usize,
    none: Vec<(usize, Units, f64, usize)>,
    second_missed: usize,
    worst_tree: f64,
    worst_tilts: f64,
    worst_eval: f64,
    /// rel_err of the characteristic function's tail over the tree's, at the same tilt.
    bound_ratio: Vec<f64>,
    time_cf: f64,
    time_tree: f64,
    /// Seconds per kind of units: (whole book, builds at the thresholds, trees).
    by_kind: [(f64, f64, f64); 4],
}

/// Source: the product tree (`lattice::tilted_tree`, blocks of exposures by direct recursion and FFT products,
/// each with its own rigorous bound). On the random books `cases` (each from its own seed), at thresholds
/// mean + z sd (z = 1, 3, 6, 10) and the tilt the exact method takes for them, the law from the characteristic
/// function and the tree's agree entry by entry within the sum of their bounds (the tree's relative one
/// included), and their tails P(S >= k) within the sum of their bounds (absolute, and relative in logarithms
/// where the values underflow). Also, once per book: the characteristic function's tail from a second tilt
/// (that of k - sd / 2) within both of its bounds, and `exact::evaluate` (which takes the characteristic
/// function from 321 exposures on lattices wider than 4096 steps) against the tree at z = 3.
fn random_books(cases: std::ops::Range<usize>) -> Tally {
    let mut tl = Tally::default();
    let start = std::time::Instant::now();
    let n_cases = cases.len();
    for case in cases {
        let book_clock = std::time::Instant::now();
        let (cf0, tree0) = (tl.time_cf, tl.time_tree);
        let mut rng = ChaCha8Rng::seed_from_u64(20261203 + case as u64);
        let model = random_book(&mut rng, case);
        let kind = KINDS[case % 4];
        let moments = Moments::of(&model);
        let (mean, sd) = (moments.mean, moments.sd());
        for z in [1.0, 3.0, 6.0, 10.0] {
            let k = (mean + z * sd).ceil() as u64;
            if model.support_max().is_some_and(|m| k > m) {
                continue;
            }
            let t = tilt_for(&model, &moments, k);
            let at_k = format!("case {case} ({kind:?}, n={}) z={z} k={k} t={t}", model.random_exposures_bounded());
            let clock = std::time::Instant::now();
            let built = characteristic_lattice::build(&model, t);
            tl.time_cf += clock.elapsed().as_secs_f64();
            let clock = std::time::Instant::now();
            let tree = lattice::tilted_tree(&model, t);
            tl.time_tree += clock.elapsed().as_secs_f64();
            let Some(cf) = built else {
                tl.none.push((case, kind, z, tree.window.w.len()));
                continue;
            };
            assert_eq!(cf.t, tree.t, "{at_k}");
            // Entry by entry: |cf - tree| <= cf.inf + tree.inf + tree.rel (tree + tree.inf) / (1 - tree.rel).
            let (a, b) = (&cf.window, &tree.window);
            assert_eq!(a.rel, 0.0);
            for j in a.lo.min(b.lo)..=a.hi().max(b.hi()) {
                let (x, y) = (at(a, j), at(b, j));
                let bound = a.inf + b.inf + b.rel * (y + b.inf) / (1.0 - b.rel) + 1e-300;
                assert!((x - y).abs() <= bound, "{at_k} j={j}: cf {x:e} tree {y:e} bound {bound:e}");
            }
            let (va, vb) = (exact::upper_tail_of(&cf, k), exact::upper_tail_of(&tree, k));
            // Useful bounds: the characteristic function's within 1e-9 and a few ulps of ln P (the scale's
            // rounding, which grows with |ln P|: e^-1939306 is among these tails).
            let useful = |v: &Value, r: f64| v.rel_err < r + 1e-15 * v.ln_value.abs();
            assert!(useful(&va, 1e-9) && useful(&vb, 1e-6), "{at_k}: bounds not useful: {va:?} vs {vb:?}");
            tl.worst_tree = tl.worst_tree.max(agree(&at_k, &va, &vb).unwrap());
            tl.bound_ratio.push(va.rel_err / vb.rel_err);
            // The characteristic function at a second tilt, for the same k (its window may miss k: then its bound
            // is infinite and only the absolute comparison is made).
            if z == [1.0, 3.0, 6.0, 10.0][case / 4 % 4] {
                let t2 = tilt_for(&model, &moments, (k as f64 - 0.5 * sd) as u64);
                if let Some(cf2) = characteristic_lattice::build(&model, t2) {
                    let v2 = exact::upper_tail_of(&cf2, k);
                    match agree(&format!("{at_k} t2={t2}"), &va, &v2) {
                        Some(r) => tl.worst_tilts = tl.worst_tilts.max(r),
                        None => tl.second_missed += 1,
                    }
                }
            }
            if z == 3.0 {
                let ve = exact::evaluate(&model, &moments, &[(k, Side::Upper)]).0[0];
                tl.worst_eval = tl.worst_eval.max(agree(&format!("{at_k} evaluate"), &ve, &vb).unwrap());
            }
            tl.compared += 1;
        }
        let kb = &mut tl.by_kind[case % 4];
        kb.0 += book_clock.elapsed().as_secs_f64();
        kb.1 += tl.time_cf - cf0;
        kb.2 += tl.time_tree - tree0;
    }
    tl.bound_ratio.sort_by(f64::total_cmp);
    let r = &tl.bound_ratio;
    eprintln!(
        "{n_cases} books, {} thresholds compared, build None {} times (case, kind, z, tree window) {:?}, second \
         tilt's window missed k {} times; worst |difference| / (sum of bounds): cf vs tree {:.2e}, between tilts \
         {:.2e}, evaluate vs tree {:.2e}; cf rel_err / tree rel_err: min {:.2e} median {:.2e} max {:.2e}; {:.1} s \
         (build {:.1} s, tree {:.1} s; by kind {KINDS:?} (book, build, tree) {:.1?})",
        tl.compared,
        tl.none.len(),
        tl.none,
        tl.second_missed,
        tl.worst_tree,
        tl.worst_tilts,
        tl.worst_eval,
        r.first().unwrap_or(&f64::NAN),
        r.get(r.len() / 2).unwrap_or(&f64::NAN),
        r.last().unwrap_or(&f64::NAN),
        start.elapsed().as_secs_f64(),
        tl.time_cf,
        tl.time_tree,
        tl.by_kind,
    );
    // `build` gives Some for every book but a book with one exposure of 10^5 steps at a small tilt: its window
    // then reaches the giant exposure's Bennett radius (2^21 to 2^22 points) and the samples to evaluate exceed
    // the construction's work limit (`MAX_WORK`), where the tree is the better tool.
    assert!(tl.none.iter().all(|&(_, kind, z, _)| kind == Units::Giant && z == 1.0), "build gave None: {:?}", tl.none);
    assert!(tl.none.len() * 20 <= n_cases, "build gave None in {} of {n_cases} books", tl.none.len());
    tl
}

/// Random books 0..52 (13 of each kind of units): see [`random_books`].
#[test]
fn random_books_agree_with_the_tree_first_half() {
    let tl = random_books(0..52);
    assert!(tl.compared >= 150, "only {} thresholds compared", tl.compared);
}

/// Random books 52..104: see [`random_books`].
#[test]
fn random_books_agree_with_the_tree_second_half() {
    let tl = random_books(52..104);
    assert!(tl.compared >= 150, "only {} thresholds compared", tl.compared);
}

/// Source: the product tree (`lattice::tilted_tree`). An exposure whose tilted probability is exactly 1/2 has
/// a factor (1 + w^u) / 2 that vanishes at w^u = -1, a point of the sample grid; where the rest of the book
/// leaves |phi| above e^-CUT there (here every other unit is even and the exposure has one unit: theta = pi),
/// `characteristic_lattice::build` cannot bound that factor's relative error and gives None. The law the exact
/// method uses (`lattice::tilted`, 400 exposures on a lattice wider than 4096 steps) must then be the tree's,
/// and its tails agree with the tree's within both bounds at t = 0 and at a positive tilt.
#[test]
fn exactly_one_half_falls_back_to_the_tree() {
    let mut rng = ChaCha8Rng::seed_from_u64(5);
    let mut m = Model::default();
    for _ in 0..400 {
        m.push_weighted(rng.gen_range(0.01..0.2), 2 * rng.gen_range(1..=30));
    }
    m.push_weighted(0.5, 1);
    m.set_lattice();
    assert!(m.lattice_width() > 4096 && m.random_exposures_bounded() >= 321);
    let moments = Moments::of(&m);
    for z in [0.0, 2.0] {
        let k = (moments.mean + z * moments.sd()).ceil() as u64;
        let t = if z == 0.0 { 0.0 } else { tilt_for(&m, &moments, k) };
        let cf = characteristic_lattice::build(&m, t);
        eprintln!("p = 1/2 at t={t}: build gave {}", if cf.is_some() { "Some" } else { "None" });
        let (law, tree) = (lattice::tilted(&m, t), lattice::tilted_tree(&m, t));
        if cf.is_none() {
            assert!(law.spectrum.is_none() && law.window.w == tree.window.w, "t={t}: not the tree's law");
        }
        let at_k = format!("p = 1/2, t={t} k={k}");
        let (va, vb) = (exact::upper_tail_of(&law, k), exact::upper_tail_of(&tree, k));
        agree(&at_k, &va, &vb).expect("finite bounds");
        let ve = exact::evaluate(&m, &moments, &[(k, Side::Upper)]).0[0];
        agree(&format!("{at_k} evaluate"), &ve, &vb).expect("finite bounds");
    }
}
