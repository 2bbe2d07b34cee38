//! Compound Poisson sources (the collective risk model) against exact references in rational arithmetic:
//! - Panjer's recursion for the compound Poisson law (H. H. Panjer, "Recursive evaluation of a family of
//!   compound distributions", ASTIN Bulletin 12, 1981, the (a, b) = (0, lambda) case):
//!   g_0 = e^-lambda, g_k = (lambda / k) sum_j j f_j g_(k - j), for several sources at once (their sum is one
//!   compound Poisson law of rate sum lambda_i and severity sum lambda_i f_i / lambda), convolved with De Pril's
//!   pmf of the Bernoulli exposures in units (tests/common/de_pril.rs).
//!   Rates and probabilities are dyadic rationals, so every input is exact and e^-lambda is the only
//!   transcendental: it is enclosed in rationals by the truncated series of e^lambda with its remainder bound,
//!   sum_(n <= N) lambda^n / n! <= e^lambda <= that + 2 lambda^(N+1) / (N+1)! (for lambda <= (N + 2) / 2), and
//!   every truth below is an interval whose width is part of the allowance;
//! - the compound Poisson approximation (method `poisson` in units) against the same recursion on its
//!   all-Poisson model (its value), and its Le Cam bound covering its distance to the portfolio's true law;
//! - bound coverage over 10,000 random books in units with compound sources against an f64 reference (the naive
//!   lattice recursion and Panjer in f64, all terms non-negative).

use num_rational::BigRational;
use num_traits::{One, Signed, ToPrimitive, Zero};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use tailtally::engine::exact::{self, lattice};
use tailtally::engine::{self as eng, numerics::moments::Moments, BoundKind, MethodId, Prepared, Side, Value};
use tailtally::portfolio::spec::{CompoundSourceSpec, GroupSpec, PortfolioSpec, SeveritySpec};
use tailtally::portfolio::validate::{build_model, Limits};
use tailtally::portfolio::Model;

#[path = "common/de_pril.rs"]
mod de_pril;
use de_pril::{de_pril, rat, Class};

fn int(n: u64) -> BigRational {
    BigRational::from_integer(n.into())
}

/// [lo, hi] enclosing e^-lambda (lambda a non-negative rational), from the series of e^lambda to N terms.
fn exp_minus(lambda: &BigRational) -> (BigRational, BigRational) {
    const N: u64 = 200;
    assert!(lambda <= &int((N + 2) / 2), "the remainder bound needs lambda <= (N + 2) / 2");
    let (mut sum, mut term) = (BigRational::zero(), BigRational::one());
    for n in 0..=N {
        sum += &term;
        term = term * lambda / int(n + 1);
    }
    // term is now lambda^(N+1) / (N+1)!; the tail of the series is at most twice it.
    let upper = &sum + &term * int(2);
    (upper.recip(), sum.recip())
}

/// The compound Poisson law of `parts` (size in units, rate) up to `top`, as e^-lambda times the returned
/// rational vector (Panjer 1981), with lambda the total rate.
fn panjer(parts: &[(u64, BigRational)], top: usize) -> (Vec<BigRational>, BigRational) {
    let lambda: BigRational = parts.iter().map(|p| p.1.clone()).sum();
    // lambda f_j for each size j.
    let mut lf = vec![BigRational::zero(); top + 1];
    for (s, r) in parts {
        if (*s as usize) <= top {
            lf[*s as usize] += r;
        }
    }
    let mut h = vec![BigRational::zero(); top + 1];
    h[0] = BigRational::one();
    for k in 1..=top {
        let mut acc = BigRational::zero();
        for j in 1..=k {
            if !lf[j].is_zero() && !h[k - j].is_zero() {
                acc += &lf[j] * int(j as u64) * &h[k - j];
            }
        }
        h[k] = acc / int(k as u64);
    }
    (h, lambda)
}

fn convolve(a: &[BigRational], b: &[BigRational], top: usize) -> Vec<BigRational> {
    let mut c = vec![BigRational::zero(); top + 1];
    for (i, x) in a.iter().enumerate().filter(|(_, x)| !x.is_zero()) {
        for (j, y) in b.iter().enumerate().take(top + 1 - i.min(top + 1)) {
            if !y.is_zero() {
                c[i + j] += x * y;
            }
        }
    }
    c
}

/// The truth for (k, side) as an interval: pmf = e^-lambda c with e^-lambda in [lo, hi]; `below[n]` is the sum
/// of c over 0..n (the upper tail as 1 minus the lower sum below k, c summing to e^lambda over all of N).
fn truth(
    c: &[BigRational],
    below: &[BigRational],
    e: &(BigRational, BigRational),
    k: usize,
    side: Side,
) -> (BigRational, BigRational) {
    match side {
        Side::Point => {
            let x = c.get(k).cloned().unwrap_or_else(BigRational::zero);
            (&x * &e.0, &x * &e.1)
        }
        Side::Lower => (&below[k + 1] * &e.0, &below[k + 1] * &e.1),
        Side::Upper => (BigRational::one() - &below[k] * &e.1, BigRational::one() - &below[k] * &e.0),
    }
}

fn prefix(c: &[BigRational]) -> Vec<BigRational> {
    let mut out = vec![BigRational::zero()];
    for x in c {
        let next = out.last().unwrap() + x;
        out.push(next);
    }
    out
}

/// The service's answers to (k, side) by `method` on a spec, through its own path (validated lattice model,
/// thresholds mapped onto it), with the model.
fn answers(spec: &PortfolioSpec, queries: &[(u64, Side)], method: MethodId) -> (Vec<Value>, Model) {
    let model = build_model(spec, "/portfolio", &Limits::default()).expect("valid");
    let prep = Prepared::new(&model);
    let mapped: Vec<_> = queries.iter().map(|&(k, s)| lattice::query(&model, k, s)).collect();
    let on: Vec<(u64, Side)> = mapped.iter().filter_map(|q| q.ok()).collect();
    let vals: Vec<Value> = if method == MethodId::Exact {
        exact::evaluate(&model, &Moments::of(&model), &on).0
    } else {
        eng::run(method, &prep, &on, None)
            .into_iter()
            .map(|e| {
                assert_eq!(e.bound_kind, BoundKind::Rigorous, "{method:?}");
                Value {
                    value: e.probability,
                    ln_value: e.ln_probability,
                    rel_err: f64::INFINITY,
                    abs_err: e.error_bound,
                    kind: e.bound_kind,
                }
            })
            .collect()
    };
    let mut vals = vals.into_iter();
    let out = mapped.iter().map(|q| q.map_or_else(Value::certain, |_| vals.next().unwrap())).collect();
    (out, model)
}

/// A random dyadic probability k / 1024 in (0, 1).
fn dyadic_p(rng: &mut ChaCha8Rng) -> f64 {
    rng.gen_range(1..1024) as f64 / 1024.0
}

/// A random book in units with `factor` in every size: Bernoulli exposures (some certain), a group, and one
/// to three compound sources with listed dyadic severities. Returns the spec, De Pril's classes and shift, and
/// the compound parts (size, rate) in rationals.
#[allow(clippy::type_complexity)]
fn random_book(rng: &mut ChaCha8Rng, case: usize) -> (PortfolioSpec, Vec<Class>, u64, Vec<(u64, BigRational)>) {
    let factor = [1u64, 1, 2, 3][case % 4];
    let mut spec = PortfolioSpec::default();
    let (mut classes, mut shift) = (Vec::new(), 0);
    for _ in 0..rng.gen_range(0..=6) {
        let u = factor * rng.gen_range(1..=8);
        let p = if rng.gen_bool(0.1) { 1.0 } else { dyadic_p(rng) };
        spec.probabilities.push(p);
        spec.units.push(u);
        if p >= 1.0 {
            shift += u;
        } else {
            classes.push(Class { units: u, p, count: 1 });
        }
    }
    if rng.gen_bool(0.5) {
        let (size, p, u) = (rng.gen_range(2..5), dyadic_p(rng) / 2.0, factor * rng.gen_range(1..=4));
        spec.groups.push(GroupSpec { size, probability: p, loading: None, units: Some(u) });
        classes.push(Class { units: u, p, count: size });
    }
    let mut parts = Vec::new();
    for _ in 0..rng.gen_range(1..=3) {
        let rate = rng.gen_range(1..=8) as f64 / 8.0;
        let n = rng.gen_range(1..=4);
        let sizes: Vec<u64> = (0..n).map(|_| factor * rng.gen_range(1..=6)).collect();
        // Probabilities in sixteenths summing to 1 (every size at least one sixteenth).
        let mut sixteenths = vec![1u64; n];
        for _ in 0..16 - n {
            sixteenths[rng.gen_range(0..n)] += 1;
        }
        let probabilities: Vec<f64> = sixteenths.iter().map(|&k| k as f64 / 16.0).collect();
        for (&s, &q) in sizes.iter().zip(&probabilities) {
            parts.push((s, rat(rate) * rat(q)));
        }
        spec.compound_sources
            .push(CompoundSourceSpec { rate, severity: SeveritySpec::Listed { sizes, probabilities } });
    }
    (spec, classes, shift, parts)
}

/// Every threshold from 0 to well beyond the bulk, every side, for exact, normal and the compound Poisson
/// approximation, on random books with compound sources, Bernoulli exposures in units, groups and certain
/// exposures, against Panjer convolved with De Pril in exact rationals.
#[test]
fn random_books_with_compound_sources_agree_with_panjer_and_de_pril() {
    let mut rng = ChaCha8Rng::seed_from_u64(19810601);
    let (mut worst, mut checked, mut worst_approx) = (0.0f64, 0usize, 0.0f64);
    for case in 0..16 {
        let (spec, classes, shift, parts) = random_book(&mut rng, case);
        let bounded = de_pril(&classes, shift);
        let mean: f64 = parts.iter().map(|(s, r)| *s as f64 * r.to_f64().unwrap()).sum();
        let var: f64 = parts.iter().map(|(s, r)| (s * s) as f64 * r.to_f64().unwrap()).sum();
        let top = bounded.len() + (mean + 12.0 * var.sqrt()) as usize + 10;
        let (h, lambda) = panjer(&parts, top);
        let e = exp_minus(&lambda);
        let c = convolve(&bounded, &h, top);
        // The compound Poisson approximation's own law: every Bernoulli exposure u Poisson(p), each group
        // u Poisson(m p), the sources kept, the certain units a shift.
        let mut all = parts.clone();
        for cl in &classes {
            all.push((cl.units, rat(cl.p) * int(cl.count)));
        }
        let (ha, la) = panjer(&all, top);
        let ea = exp_minus(&la);
        let mut ca = vec![BigRational::zero(); shift as usize];
        ca.extend(ha);
        ca.truncate(top + 1);
        let (below, below_a) = (prefix(&c), prefix(&ca));
        let mut queries = Vec::new();
        for k in 0..=(top as u64 - 2) {
            queries.extend([(k, Side::Upper), (k, Side::Lower), (k, Side::Point)]);
        }
        let (exact_vals, model) = answers(&spec, &queries, MethodId::Exact);
        let (normal_vals, _) = answers(&spec, &queries, MethodId::Normal);
        let (approx_vals, _) = answers(&spec, &queries, MethodId::Poisson);
        let le_cam = Moments::of(&model).sum_p_squared;
        for (i, &(k, side)) in queries.iter().enumerate() {
            let (lo, hi) = truth(&c, &below, &e, k as usize, side);
            let mid = (&lo + &hi) / int(2);
            let gap = (&hi - &lo) / int(2);
            let at = format!("case {case} k={k} {side:?}");
            let v = &exact_vals[i];
            let diff = (rat(v.value) - &mid).abs();
            assert!(diff <= rat(v.abs_err) + &gap, "{at}: exact {} off the truth by more than {}", v.value, v.abs_err);
            if lo > rat(1e-290) && gap < &lo * rat(1e-20) {
                let rel = (&diff / &lo).to_f64().unwrap();
                assert!(rel <= 1e-11, "{at}: exact relative error {rel:e} ({} vs {})", v.value, mid.to_f64().unwrap());
                worst = worst.max(rel);
            }
            let n = &normal_vals[i];
            let miss = (rat(n.value) - &mid).abs();
            assert!(
                miss <= rat(n.abs_err) + &gap,
                "{at}: normal misses by {} over {}",
                miss.to_f64().unwrap(),
                n.abs_err
            );
            // The approximation: its value is its all-Poisson law (to the exact engine's accuracy), and its
            // bound (Le Cam's plus that engine's) covers its distance to the portfolio's law.
            let a = &approx_vals[i];
            let miss = (rat(a.value) - &mid).abs();
            assert!(
                miss <= rat(a.abs_err) + &gap,
                "{at}: poisson misses by {} over {}",
                miss.to_f64().unwrap(),
                a.abs_err
            );
            let open = lattice::query(&model, k, side).is_ok_and(|(j, s)| exact::trivial(&model, j, s).is_none());
            if open {
                assert!(a.abs_err >= le_cam.min(1.0), "{at}: the bound includes Le Cam's {le_cam}");
                let (alo, ahi) = truth(&ca, &below_a, &ea, k as usize, side);
                let amid = (&alo + &ahi) / int(2);
                if alo > rat(1e-290) && (&ahi - &alo) < &alo * rat(1e-20) {
                    let rel = ((rat(a.value) - &amid).abs() / &alo).to_f64().unwrap();
                    assert!(rel <= 1e-11, "{at}: the approximation's value {} vs its law {rel:e}", a.value);
                    worst_approx = worst_approx.max(rel);
                }
            }
            checked += 1;
        }
    }
    eprintln!(
        "Panjer x De Pril: {checked} answers, worst relative error exact {worst:e}, approximation {worst_approx:e}"
    );
    assert!(checked > 3000, "{checked}");
}

/// The generated severity: sizes first, first + step, ... up to largest, probabilities in the ratio `ratio`
/// renormalised over the sizes kept (closed form: ratio^k (1 - ratio) / (1 - ratio^n)).
#[test]
fn geometric_severity_expands_to_its_closed_form() {
    let sev = SeveritySpec::Geometric { first: 3, step: 4, largest: 41, ratio: 0.75 };
    let mut got = Vec::new();
    sev.expand(|s, q| got.push((s, q)));
    assert_eq!(got.len(), 10);
    let norm = (1.0 - 0.75f64.powi(10)) / 0.25;
    for (k, &(s, q)) in got.iter().enumerate() {
        assert_eq!(s, 3 + 4 * k as u64);
        let want = 0.75f64.powi(k as i32) / norm;
        assert!((q - want).abs() <= 1e-15 * want, "k={k}: {q} vs {want}");
    }
    for (ratio, n) in [(1.0, 5u64), (0.0, 5), (1e-300, 3)] {
        let sev = SeveritySpec::Geometric { first: 1, step: 1, largest: n, ratio };
        let mut sum = 0.0;
        sev.expand(|_, q| sum += q);
        assert!((sum - 1.0).abs() < 1e-15, "ratio {ratio}: {sum}");
    }
}

/// Compound sources of one unit are a Poisson part: the same model as `poisson_rates`, so the same answers.
#[test]
fn sources_of_unit_size_are_the_poisson_part() {
    let one = PortfolioSpec {
        probabilities: vec![0.1, 0.3],
        compound_sources: vec![CompoundSourceSpec {
            rate: 2.5,
            severity: SeveritySpec::Listed { sizes: vec![1], probabilities: vec![1.0] },
        }],
        ..PortfolioSpec::default()
    };
    let plain = PortfolioSpec { probabilities: vec![0.1, 0.3], poisson_rates: vec![2.5], ..PortfolioSpec::default() };
    let l = Limits::default();
    assert_eq!(build_model(&one, "", &l).unwrap(), build_model(&plain, "", &l).unwrap());
}

/// The exact law of the book in f64: the naive lattice recursion for the Bernoulli exposures and Panjer's
/// recursion for the compound parts, both with non-negative terms only (each entry within a few n ulps,
/// Higham 2002 section 3.1), convolved.
fn reference_f64(book: &[(u64, f64)], parts: &[(u64, f64)], top: usize) -> Vec<f64> {
    let mut f = vec![0.0f64; top + 1];
    f[0] = 1.0;
    for &(u, p) in book {
        let u = u as usize;
        for j in (u..=top).rev() {
            f[j] = f[j] * (1.0 - p) + f[j - u] * p;
        }
        for x in &mut f[..u.min(top + 1)] {
            *x *= 1.0 - p;
        }
    }
    let lambda: f64 = parts.iter().map(|p| p.1).sum();
    let mut lf = vec![0.0; top + 1];
    for &(s, r) in parts {
        if (s as usize) <= top {
            lf[s as usize] += r;
        }
    }
    let mut g = vec![0.0; top + 1];
    g[0] = (-lambda).exp();
    for k in 1..=top {
        let mut acc = 0.0;
        for j in 1..=k {
            acc += lf[j] * j as f64 * g[k - j];
        }
        g[k] = acc / k as f64;
    }
    let mut c = vec![0.0; top + 1];
    for (i, &x) in f.iter().enumerate().filter(|(_, &x)| x > 0.0) {
        for (j, &y) in g.iter().enumerate().take(top + 1 - i) {
            c[i + j] += x * y;
        }
    }
    c
}

/// Bound coverage over 10,000 random books in units with compound sources: the exact engine's rigorous bound
/// covers its distance to the f64 reference (whose own rounding, a few hundred ulps relative, is allowed for),
/// and every rigorous bound of normal and of the compound Poisson approximation covers its distance to exact.
#[test]
fn rigorous_bounds_hold_on_random_books_with_compound_sources() {
    let mut rng = ChaCha8Rng::seed_from_u64(1960);
    let (mut checked, mut violations) = (0usize, Vec::new());
    for case in 0..10_000 {
        let mut spec = PortfolioSpec::default();
        let mut book = Vec::new();
        for _ in 0..rng.gen_range(0..=20) {
            let (p, u) = (rng.gen_range(0.0..0.6f64), rng.gen_range(1..=10));
            spec.probabilities.push(p);
            spec.units.push(u);
            book.push((u, p));
        }
        if rng.gen_bool(0.3) {
            let (size, p, u) = (rng.gen_range(2..30), rng.gen_range(0.01..0.5), rng.gen_range(1..=6));
            spec.groups.push(GroupSpec { size, probability: p, loading: None, units: Some(u) });
            book.extend(std::iter::repeat_n((u, p), size as usize));
        }
        for _ in 0..rng.gen_range(1..=2) {
            let rate = rng.gen_range(0.0..6.0);
            let severity = if rng.gen_bool(0.5) {
                let n = rng.gen_range(1..=4);
                let sizes: Vec<u64> = (0..n).map(|_| rng.gen_range(1..=12)).collect();
                let w: Vec<f64> = (0..n).map(|_| rng.gen_range(0.1..1.0)).collect();
                let t: f64 = w.iter().sum();
                SeveritySpec::Listed { sizes, probabilities: w.iter().map(|x| x / t).collect() }
            } else {
                let first = rng.gen_range(1..=5);
                SeveritySpec::Geometric {
                    first,
                    step: rng.gen_range(1..=3),
                    largest: first + rng.gen_range(0..=15),
                    ratio: rng.gen_range(0.0..1.0),
                }
            };
            spec.compound_sources.push(CompoundSourceSpec { rate, severity });
        }
        let model = build_model(&spec, "/portfolio", &Limits::default()).expect("valid");
        let prep = Prepared::new(&model);
        // The model's parts in units, as the reference takes them.
        let h = model.span();
        let parts: Vec<(u64, f64)> = model
            .scaled_poisson
            .iter()
            .map(|&(s, r)| (s * h, r))
            .chain((model.poisson > 0.0).then_some((h, model.poisson)))
            .collect();
        let (mean, sd) = (prep.moments.mean, prep.moments.sd());
        let width: u64 = book.iter().map(|b| b.0).sum();
        let top = (width as f64 + (mean + 12.0 * sd + 40.0) * h as f64) as usize;
        let pmf = reference_f64(&book, &parts, top);
        let ulps = 400.0 * (book.len() + top) as f64 * f64::EPSILON;
        let side = [Side::Upper, Side::Lower, Side::Point][case % 3];
        let mut qs: Vec<(u64, Side)> = [-3.0, -1.0, 0.0, 1.0, 3.0, 6.0]
            .iter()
            .map(|z| (model.units_of(((mean + z * sd).round().max(0.0)) as u64), side))
            .collect();
        qs.dedup();
        let (ex, _) = answers(&spec, &qs, MethodId::Exact);
        for (&(k, _), x) in qs.iter().zip(&ex) {
            let k = k as usize;
            let truth: f64 = match side {
                Side::Upper => 1.0 - pmf[..k.min(top + 1)].iter().sum::<f64>(),
                Side::Lower => pmf[..=k.min(top)].iter().sum(),
                Side::Point => pmf.get(k).copied().unwrap_or(0.0),
            };
            // The upper tail by complement carries the reference's absolute rounding; the others relative.
            let allowance = if side == Side::Upper { ulps } else { ulps * truth };
            let err = (x.value - truth).abs();
            checked += 1;
            if err > x.abs_err + allowance {
                violations.push(format!("case {case} exact {side:?} k={k}: err {err:e} > bound {:e}", x.abs_err));
            }
        }
        for id in [MethodId::Normal, MethodId::Poisson] {
            let (vals, _) = answers(&spec, &qs, id);
            for ((&(k, _), v), x) in qs.iter().zip(&vals).zip(&ex) {
                checked += 1;
                let err = (v.value - x.value).abs();
                if err > v.abs_err + x.abs_err + 1e-15 {
                    violations.push(format!("case {case} {id:?} {side:?} k={k}: err {err:e} > bound {:e}", v.abs_err));
                }
            }
        }
    }
    assert!(checked > 100_000, "{checked}");
    assert!(
        violations.is_empty(),
        "{} violations of {checked}, e.g. {:?}",
        violations.len(),
        &violations[..violations.len().min(5)]
    );
}
