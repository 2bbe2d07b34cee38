//! The one-factor Gaussian model against the world.
//!
//! * fixtures/reference/factor.json, made by fixtures/reference/make_factor.py with mpmath at 40 digits and
//!   independent of any quadrature in the service (each value checked there by a second independent
//!   integral): homogeneous pools of 10^2..10^6 exposures as one group (and, up to 10^4, as listed exposures),
//!   and 40 small books with their own loadings. Every value within 1e-6 relative (1e-12 absolute below
//!   1e-6), and the reported bound covers the actual error in every case.
//! * Coverage: random small pools against a reference computed here, independently of the service's
//!   quadrature: a fixed composite Gauss-Legendre rule (nodes by Newton on the Legendre recurrence) on
//!   [-12, 12] cut at every crossing, with the conditional law by direct recursion in f64.
//! * Vasicek's large-pool limit ("The distribution of loan portfolio value", Risk 2002).
//! * Contributions under the factor against central finite differences of the dependent tail.

use serde_json::Value as Json;
use tailtally::analytics::dependence::Dependence;
use tailtally::analytics::law::Law;
use tailtally::engine::{BoundKind, Side, Value};
use tailtally::portfolio::Model;

fn fixture() -> Json {
    let text = std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/fixtures/reference/factor.json"))
        .expect("fixtures/reference/factor.json");
    serde_json::from_str(&text).unwrap()
}

/// The requirement: relative error <= 1e-6, or absolute <= 1e-12 for values below 1e-6.
fn close(got: f64, want: f64) -> bool {
    let err = (got - want).abs();
    if want < 1e-6 {
        err <= 1e-12 || err <= 1e-6 * want
    } else {
        err <= 1e-6 * want
    }
}

#[derive(Default)]
struct Stats {
    cases: usize,
    /// Largest relative error among values >= 1e-6, largest absolute error among the smaller ones.
    max_rel: f64,
    max_abs_small: f64,
    min_ratio: f64,
    worst: String,
}

impl Stats {
    fn add(&mut self, what: &str, v: &Value, want: f64) {
        let err = (v.value - want).abs();
        assert!(close(v.value, want), "{what}: {} vs {want} (rel {:.2e})", v.value, err / want);
        // The reference is the double nearest a 40-digit value: allow its half ulp.
        assert!(err <= v.abs_err + 1.2e-16 * want, "{what}: error {err:.3e} over the bound {:.3e}", v.abs_err);
        assert_eq!(v.kind, BoundKind::Estimated, "{what}");
        self.cases += 1;
        if want >= 1e-6 {
            self.max_rel = self.max_rel.max(err / want);
        } else {
            self.max_abs_small = self.max_abs_small.max(err);
        }
        let ratio = if err > 0.0 { v.abs_err / err } else { f64::INFINITY };
        if self.cases == 1 || ratio < self.min_ratio {
            self.min_ratio = ratio;
            self.worst = format!("{what}: {} vs {want}, bound {:.3e}", v.value, v.abs_err);
        }
    }
}

/// Every homogeneous case of the fixture, all thresholds of one (n, p, rho) in one call.
#[test]
fn homogeneous_pools_match_the_mpmath_reference() {
    let doc = fixture();
    let rows = doc["homogeneous"].as_array().unwrap();
    let mut keys: Vec<(u64, f64, f64)> = Vec::new();
    for r in rows {
        let key = (r["n"].as_u64().unwrap(), r["p"].as_f64().unwrap(), r["rho"].as_f64().unwrap());
        if !keys.contains(&key) {
            keys.push(key);
        }
    }
    let mut by_n: std::collections::BTreeMap<(u64, bool), Stats> = Default::default();
    for &(n, p, rho) in &keys {
        let cases: Vec<&Json> = rows
            .iter()
            .filter(|r| (r["n"].as_u64().unwrap(), r["p"].as_f64().unwrap(), r["rho"].as_f64().unwrap()) == (n, p, rho))
            .collect();
        let mut queries: Vec<(u64, Side)> = Vec::new();
        let mut wants: Vec<(f64, String)> = Vec::new();
        for c in &cases {
            let k = c["k"].as_u64().unwrap();
            queries.push((k, Side::Upper));
            wants.push((c["upper"].as_f64().unwrap(), format!("n={n} p={p} rho={rho} P(S>={k})")));
            if let Some(pt) = c["point"].as_f64() {
                queries.push((k, Side::Point));
                wants.push((pt, format!("n={n} p={p} rho={rho} P(S={k})")));
            }
        }
        let mut models = vec![(false, Model::from_parts(&[], &[(n, p)], 0.0))];
        if n <= 10_000 {
            models.push((true, Model::from_parts(&vec![p; n as usize], &[], 0.0)));
        }
        for (listed, model) in models {
            let law = Law::new(model, Dependence::one_factor(rho));
            let got = law.exact(&queries);
            let stats = by_n.entry((n, listed)).or_default();
            for (v, (want, what)) in got.iter().zip(&wants) {
                stats.add(&format!("{what} ({})", if listed { "listed" } else { "group" }), v, *want);
            }
        }
    }
    for ((n, listed), s) in &by_n {
        println!(
            "n = {n} as {}: {} values, max relative error {:.2e} (>= 1e-6), max absolute error {:.2e} (< 1e-6), min bound/error {:.1} at {}",
            if *listed { "listed" } else { "group" },
            s.cases,
            s.max_rel,
            s.max_abs_small,
            s.min_ratio,
            s.worst
        );
    }
}

/// Every book of the fixture: listed exposures with their own loadings and groups with theirs.
#[test]
fn books_with_their_own_loadings_match_the_mpmath_reference() {
    let doc = fixture();
    let mut stats = Stats::default();
    for (b, book) in doc["books"].as_array().unwrap().iter().enumerate() {
        let f = |v: &Json| -> Vec<f64> { v.as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect() };
        let probs = f(&book["probabilities"]);
        let loads = f(&book["loadings"]);
        let groups: Vec<(u64, f64, f64)> = book["groups"]
            .as_array()
            .unwrap()
            .iter()
            .map(|g| (g["size"].as_u64().unwrap(), g["probability"].as_f64().unwrap(), g["loading"].as_f64().unwrap()))
            .collect();
        let ks: Vec<u64> = book["thresholds"].as_array().unwrap().iter().map(|x| x.as_u64().unwrap()).collect();
        let want = f(&book["upper"]);
        let model = Model::from_parts_loaded(&probs, &loads, &groups, 0.0);
        // The common rho is a placeholder: every exposure has its own loading.
        let law = Law::new(model, Dependence::one_factor(0.3));
        let queries: Vec<(u64, Side)> = ks.iter().map(|&k| (k, Side::Upper)).collect();
        for ((v, &w), &k) in law.exact(&queries).iter().zip(&want).zip(&ks) {
            stats.add(&format!("book {b}, P(S>={k})"), v, w);
        }
    }
    println!(
        "books: {} values, max relative error {:.2e} (>= 1e-6), max absolute error {:.2e} (< 1e-6), min bound/error {:.1} at {}",
        stats.cases, stats.max_rel, stats.max_abs_small, stats.min_ratio, stats.worst
    );
}

// ---------------------------------------------------------------------------------------------------------
// An independent reference for small pools: composite Gauss-Legendre over [-12, 12], conditional law by
// direct recursion.

/// Nodes and weights of the n-point Gauss-Legendre rule on [-1, 1], by Newton's method on the three-term
/// recurrence from the usual cosine guesses.
fn legendre(n: usize) -> Vec<(f64, f64)> {
    (0..n)
        .map(|i| {
            let mut x = (std::f64::consts::PI * (i as f64 + 0.75) / (n as f64 + 0.5)).cos();
            let mut dp = 0.0;
            for _ in 0..100 {
                let (mut p0, mut p1) = (1.0, x);
                for k in 2..=n {
                    let p2 = ((2 * k - 1) as f64 * x * p1 - (k - 1) as f64 * p0) / k as f64;
                    p0 = p1;
                    p1 = p2;
                }
                dp = n as f64 * (x * p1 - p0) / (x * x - 1.0);
                let dx = p1 / dp;
                x -= dx;
                if dx.abs() < 1e-16 {
                    break;
                }
            }
            (x, 2.0 / ((1.0 - x * x) * dp * dp))
        })
        .collect()
}

fn ncdf(x: f64) -> f64 {
    0.5 * libm::erfc(-x / std::f64::consts::SQRT_2)
}

#[derive(Debug, Clone)]
struct Pool {
    ps: Vec<f64>,
    loads: Vec<f64>,
    group: Option<(u64, f64, f64)>,
}

impl Pool {
    fn size(&self) -> usize {
        self.ps.len() + self.group.map_or(0, |g| g.0 as usize)
    }

    fn cond_p(p: f64, r: f64, z: f64) -> f64 {
        let c = tailtally::engine::numerics::normal_law::normal_quantile(p);
        ncdf((c - r.sqrt() * z) / (1.0 - r).sqrt())
    }

    /// pmf of S given Z = z, by the recursion f_j <- (1 - p) f_j + p f_{j-1}, then the group's binomial pmf.
    fn cond_pmf(&self, z: f64) -> Vec<f64> {
        let mut f = vec![1.0];
        for (&p, &r) in self.ps.iter().zip(&self.loads) {
            let x = Self::cond_p(p, r, z);
            f.push(0.0);
            for j in (1..f.len()).rev() {
                f[j] = f[j] * (1.0 - x) + f[j - 1] * x;
            }
            f[0] *= 1.0 - x;
        }
        if let Some((m, p, r)) = self.group {
            let x = Self::cond_p(p, r, z);
            let mut b = vec![1.0];
            for _ in 0..m {
                b.push(0.0);
                for j in (1..b.len()).rev() {
                    b[j] = b[j] * (1.0 - x) + b[j - 1] * x;
                }
                b[0] *= 1.0 - x;
            }
            let mut g = vec![0.0; f.len() + b.len() - 1];
            for (i, &u) in f.iter().enumerate() {
                for (j, &v) in b.iter().enumerate() {
                    g[i + j] += u * v;
                }
            }
            f = g;
        }
        f
    }

    fn cond_mean(&self, z: f64) -> f64 {
        let mut m: f64 = self.ps.iter().zip(&self.loads).map(|(&p, &r)| Self::cond_p(p, r, z)).sum();
        if let Some((s, p, r)) = self.group {
            m += s as f64 * Self::cond_p(p, r, z);
        }
        m
    }

    /// E[pmf of S | Z] by 20-point Gauss-Legendre on panels of 0.25 over [-12, 12], cut at the crossings of
    /// the counts `ks` and 0.02, 0.05, 0.1 either side.
    fn reference(&self, ks: &[u64]) -> Vec<f64> {
        let mut cuts: Vec<f64> = (0..=96).map(|i| -12.0 + 0.25 * i as f64).collect();
        for &k in ks {
            for x in [k as f64 - 0.5, k as f64, k as f64 + 0.5] {
                let (mut lo, mut hi) = (-12.0f64, 12.0f64);
                if self.cond_mean(lo) < x || self.cond_mean(hi) > x {
                    continue;
                }
                for _ in 0..60 {
                    let mid = 0.5 * (lo + hi);
                    if self.cond_mean(mid) > x {
                        lo = mid;
                    } else {
                        hi = mid;
                    }
                }
                for d in [0.0, -0.02, 0.02, -0.05, 0.05, -0.1, 0.1] {
                    cuts.push((lo + d).clamp(-12.0, 12.0));
                }
            }
        }
        cuts.sort_by(f64::total_cmp);
        cuts.dedup_by(|a, b| (*a - *b).abs() < 1e-9);
        let rule = legendre(20);
        let mut acc = vec![0.0; self.size() + 1];
        for w in cuts.windows(2) {
            let (c, h) = (0.5 * (w[0] + w[1]), 0.5 * (w[1] - w[0]));
            for &(x, wt) in &rule {
                let z = c + h * x;
                let phi = (-0.5 * z * z).exp() / (2.0 * std::f64::consts::PI).sqrt();
                for (a, v) in acc.iter_mut().zip(self.cond_pmf(z)) {
                    *a += h * wt * phi * v;
                }
            }
        }
        acc
    }

    fn model(&self) -> Model {
        let groups: Vec<(u64, f64, f64)> = self.group.into_iter().collect();
        Model::from_parts_loaded(&self.ps, &self.loads, &groups, 0.0)
    }
}

fn figure(pmf: &[f64], k: u64, side: Side) -> f64 {
    let k = k as usize;
    match side {
        Side::Upper => pmf[k.min(pmf.len())..].iter().rev().sum(),
        Side::Lower => pmf[..=k.min(pmf.len() - 1)].iter().sum(),
        Side::Point => pmf.get(k).copied().unwrap_or(0.0),
    }
}

/// The Gauss-Legendre reference itself against the mpmath fixture's books (its accuracy is what the coverage
/// test can trust).
#[test]
fn the_legendre_reference_matches_the_fixture_books() {
    let doc = fixture();
    for book in doc["books"].as_array().unwrap().iter().take(12) {
        let f = |v: &Json| -> Vec<f64> { v.as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect() };
        let groups: Vec<(u64, f64, f64)> = book["groups"]
            .as_array()
            .unwrap()
            .iter()
            .map(|g| (g["size"].as_u64().unwrap(), g["probability"].as_f64().unwrap(), g["loading"].as_f64().unwrap()))
            .collect();
        if groups.len() > 1 {
            continue;
        }
        let pool = Pool { ps: f(&book["probabilities"]), loads: f(&book["loadings"]), group: groups.first().copied() };
        let ks: Vec<u64> = book["thresholds"].as_array().unwrap().iter().map(|x| x.as_u64().unwrap()).collect();
        let pmf = pool.reference(&ks);
        for (&k, &want) in ks.iter().zip(&f(&book["upper"])) {
            let got = figure(&pmf, k, Side::Upper);
            assert!((got - want).abs() <= 1e-12 * want + 1e-30, "P(S >= {k}): {got} vs {want}");
        }
    }
}

use rand::{Rng, SeedableRng};

fn random_case(seed: u64) -> (Pool, Vec<(u64, Side)>, Dependence) {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let n = rng.gen_range(1..=40usize);
    let lp = |rng: &mut rand_chacha::ChaCha8Rng| 10f64.powf(rng.gen_range(-4.0..(0.5f64).log10()));
    let ps: Vec<f64> = (0..n).map(|_| lp(&mut rng)).collect();
    let common = rng.gen_range(0.001..0.5);
    let loads: Vec<f64> =
        if rng.gen_bool(0.5) { vec![common; n] } else { (0..n).map(|_| rng.gen_range(0.001..0.5)).collect() };
    let group = rng.gen_bool(0.4).then(|| (rng.gen_range(2..=50u64), lp(&mut rng), rng.gen_range(0.001..0.5)));
    let pool = Pool { ps, loads, group };
    let total = pool.size() as u64;
    let queries: Vec<(u64, Side)> = (0..rng.gen_range(1..=3))
        .map(|_| {
            let side = [Side::Upper, Side::Lower, Side::Point][rng.gen_range(0..3)];
            // Thresholds favour the bulk and the near tail (where the reference is meaningful).
            let k = if rng.gen_bool(0.7) {
                let mean = pool.cond_mean(0.0);
                ((mean * rng.gen_range(0.0..4.0)).round() as u64 + rng.gen_range(0..3)).min(total)
            } else {
                rng.gen_range(0..=total)
            };
            (k, side)
        })
        .collect();
    let dep = if rng.gen_bool(0.25) {
        Dependence::one_factor_with(common, 1e-10, 1e-16)
    } else {
        Dependence::one_factor(common)
    };
    (pool, queries, dep)
}

proptest::proptest! {
    #![proptest_config(proptest::prelude::ProptestConfig { cases: 2000, failure_persistence: None, ..Default::default() })]

    /// The reported bound covers |answer - reference| on random small pools (1..40 listed exposures with equal
    /// or their own loadings in [0.001, 0.5], an optional group), 1 to 3 thresholds on any side, the default
    /// tolerance in 3 cases of 4 and relative 1e-10 in the others. The reference's own error (about 1e-14
    /// relative, and the mass beyond +-12, 3.6e-33) is allowed for.
    #[test]
    fn bounds_cover_the_error_on_random_small_pools(seed in proptest::prelude::any::<u64>()) {
        let (pool, queries, dep) = random_case(seed);
        let law = Law::new(pool.model(), dep);
        let got = law.exact(&queries);
        let ks: Vec<u64> = queries.iter().map(|q| q.0).collect();
        let pmf = pool.reference(&ks);
        for (v, &(k, side)) in got.iter().zip(&queries) {
            let want = figure(&pmf, k, side);
            let err = (v.value - want).abs();
            proptest::prop_assert!(
                err <= v.abs_err + 1e-13 * want + 1e-32,
                "{pool:?} {dep:?} k = {k} {side:?}: {} vs {want}, bound {:.3e}", v.value, v.abs_err
            );
        }
    }
}

/// Equal per-exposure loadings are the one-rho model: the same figures to rounding.
#[test]
fn equal_loadings_give_the_one_rho_answer() {
    let ps: Vec<f64> = (0..60).map(|i| 0.002 + 0.004 * (i % 7) as f64).collect();
    let rho = 0.15;
    let plain = Model::from_parts(&ps, &[(40, 0.01)], 0.3);
    let loaded = Model::from_parts_loaded(&ps, &vec![rho; ps.len()], &[(40, 0.01, rho)], 0.3);
    let qs = [(2u64, Side::Upper), (6, Side::Upper), (12, Side::Lower), (4, Side::Point)];
    let a = Law::new(plain, Dependence::one_factor(rho)).exact(&qs);
    let b = Law::new(loaded, Dependence::one_factor(0.4)).exact(&qs);
    for (x, y) in a.iter().zip(&b) {
        assert!((x.value - y.value).abs() <= 1e-14 * x.value, "{} vs {}", x.value, y.value);
    }
}

/// Vasicek's limit (Vasicek 2002, "The distribution of loan portfolio value", Risk): for a homogeneous pool the
/// fraction of events tends in law to Phi((sqrt(1 - rho) Phi^-1(x) - Phi^-1(p)) / sqrt(rho)). The distance of
/// P(S <= x n) to the limit falls like 1 / n (measured at p = 0.01, rho = 0.12: 9.4e-3 at n = 10^4, 9.6e-4,
/// 9.6e-5, 9.6e-6 at 10^7; the conditional spread, O(1 / sqrt(n p)) in x, enters the cdf at second order),
/// while the quadrature's bound stays far below it.
#[test]
fn homogeneous_pools_tend_to_the_vasicek_limit() {
    let (p, rho) = (0.01, 0.12);
    let xs = [0.002, 0.005, 0.01, 0.02, 0.04];
    let mut last = f64::INFINITY;
    for n in [10_000u64, 100_000, 1_000_000, 10_000_000] {
        let law = Law::new(Model::from_parts(&[], &[(n, p)], 0.0), Dependence::one_factor(rho));
        let qs: Vec<(u64, Side)> = xs.iter().map(|&x| ((x * n as f64) as u64, Side::Lower)).collect();
        let mut worst: f64 = 0.0;
        for (v, &x) in law.exact(&qs).iter().zip(&xs) {
            let d = (v.value - tailtally::analytics::dependence::large_portfolio_cdf(x, p, rho)).abs();
            assert!(v.abs_err < 1e-8, "n = {n}, x = {x}: bound {}", v.abs_err);
            worst = worst.max(d);
        }
        println!("n = {n}: largest distance to the limit {worst:.3e}");
        assert!(worst < 1.2 / (n as f64 * p), "n = {n}: {worst}");
        assert!(worst < last, "n = {n}: {worst} not below {last}");
        last = worst;
    }
}

/// dP(S >= k)/dp_i under the factor against central differences of the reference tail (the fixed
/// Gauss-Legendre rule, smooth in p_i, so no quadrature noise): step h = 1e-3 p_i, whose truncation error
/// h^2 |P'''| / 6 is about 1e-7 of the derivative; allowed 1e-5 relative plus the reported bound. The
/// leave-one-out tail against the reference without exposure i.
#[test]
fn contributions_under_the_factor_match_finite_differences() {
    let pool = Pool {
        ps: vec![0.02, 0.05, 0.01, 0.2, 0.003, 0.08, 0.04, 0.015, 0.1, 0.03],
        loads: vec![0.1, 0.3, 0.05, 0.2, 0.45, 0.15, 0.25, 0.01, 0.35, 0.2],
        group: Some((20, 0.02, 0.2)),
    };
    for k in [1u64, 3, 6, 10] {
        let law = Law::new(pool.model(), Dependence::one_factor(0.2));
        let got = law.factor().unwrap().contributions(k, &[]);
        let want_tail = figure(&pool.reference(&[k]), k, Side::Upper);
        assert!((got.tail.value - want_tail).abs() <= got.tail.abs_err + 1e-14 * want_tail);
        for (i, (s, t)) in got.each.iter().enumerate() {
            let h = 1e-3 * pool.ps[i];
            let at = |d: f64| {
                let mut q = pool.clone();
                q.ps[i] += d;
                figure(&q.reference(&[k]), k, Side::Upper)
            };
            let fd = (at(h) - at(-h)) / (2.0 * h);
            assert!(
                (fd - s.value).abs() <= 1e-5 * fd.abs() + s.abs_err,
                "k = {k}, i = {i}: fd {fd} vs {} (bound {:.2e})",
                s.value,
                s.abs_err
            );
            let mut rest = pool.clone();
            rest.ps.remove(i);
            rest.loads.remove(i);
            let want = figure(&rest.reference(&[k]), k, Side::Upper);
            assert!((t.value - want).abs() <= t.abs_err + 1e-13 * want, "k = {k}, i = {i}: {} vs {want}", t.value);
        }
    }
}
