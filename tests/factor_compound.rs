//! The one-factor Gaussian model beside compound Poisson sources (POST /v1/tail's pipeline with `dependence`
//! and `compound_sources`), against an independent reference: a homogeneous group of m exposures of u units
//! beside one compound source (independent of the factor) has, given Z = z, the law of u Binomial(m, p(z))
//! convolved with the compound Poisson law, whose pmf is Panjer's recursion (Panjer 1981, "Recursive evaluation
//! of a family of compound distributions", ASTIN Bulletin 12: g_0 = e^-lambda, g_n = lambda/n sum_j j f_j
//! g_(n-j)), both in f64 here; P(S >= k) is its tail integrated against phi(z) by the trapezoid rule on
//! [-10, 10] with step 0.005 (spectrally accurate for this Gaussian-weighted analytic integrand). statrs' normal
//! cdf, about 3e-11 relative on p(z), is raised to about the j-th power in a binomial tail of j ~ 20 events, so
//! the reference is good to about 1e-9 relative: that is its allowance beside the bound (measured: 1.1e-10 at
//! the worst threshold). Every exact value must lie within its reported bound (kind `estimated`, as every figure
//! under the factor) plus that allowance and within the default tolerance, and normal's rigorous bound must
//! cover its own error.

use serde_json::{json, Value};
use tailtally::analytics::cancel::Cancel;
use tailtally::analytics::tail::{Tail, TailRequest, TailResponse};
use tailtally::config::{Options, ServiceLimits};
use tailtally::engine::BoundKind;

fn tail(req: Value) -> TailResponse {
    let req: TailRequest = serde_json::from_value(req).unwrap();
    let limits = ServiceLimits::from_options(&Options::default());
    tailtally::analytics::run::<Tail>(&req, &limits, &Cancel::never()).expect("an answer")
}

/// Phi^-1(p): statrs' inverse, refined by Newton steps on statrs' cdf.
fn phi_inv(p: f64) -> f64 {
    use statrs::distribution::{Continuous, ContinuousCDF, Normal};
    let n = Normal::standard();
    let mut x = n.inverse_cdf(p);
    for _ in 0..3 {
        x -= (n.cdf(x) - p) / n.pdf(x);
    }
    x
}

fn phi(x: f64) -> f64 {
    use statrs::distribution::{ContinuousCDF, Normal};
    Normal::standard().cdf(x)
}

/// The compound Poisson pmf g_0..=g_top (rate `lambda`, sizes with probabilities) by Panjer's recursion.
fn panjer(lambda: f64, sizes: &[u64], probs: &[f64], top: usize) -> Vec<f64> {
    let mut f = vec![0.0; top + 1];
    for (&s, &q) in sizes.iter().zip(probs) {
        if (s as usize) <= top {
            f[s as usize] += q;
        }
    }
    let mut g = vec![0.0; top + 1];
    g[0] = (-lambda).exp();
    for n in 1..=top {
        let acc: f64 = (1..=n).map(|j| j as f64 * f[j] * g[n - j]).sum();
        g[n] = lambda / n as f64 * acc;
    }
    g
}

/// The Binomial(m, q) pmf from ln C(m, j) + j ln q + (m - j) ln(1 - q) (m small here).
fn binomial(m: u64, q: f64) -> Vec<f64> {
    (0..=m)
        .map(|j| {
            let ln_c: f64 = (1..=j).map(|i| ((m - j + i) as f64 / i as f64).ln()).sum();
            // 0 ln 0 = 0 at the ends (q may round to 0 or 1 far out in z).
            let a = if j == 0 { 0.0 } else { j as f64 * q.ln() };
            let b = if j == m { 0.0 } else { (m - j) as f64 * (-q).ln_1p() };
            (ln_c + a + b).exp()
        })
        .collect()
}

struct Case {
    m: u64,
    p: f64,
    u: u64,
    rate: f64,
    sizes: Vec<u64>,
    probs: Vec<f64>,
    rho: f64,
    ks: Vec<u64>,
}

fn reference(c: &Case) -> Vec<f64> {
    let top = *c.ks.iter().max().unwrap() as usize + 1;
    let g = panjer(c.rate, &c.sizes, &c.probs, top);
    // Upper tails of the compound law: G(x) = P(C >= x) = 1 - sum_(i < x) g_i (its own mass beyond `top`
    // included).
    let mut below = vec![0.0; top + 2];
    for i in 0..=top {
        below[i + 1] = below[i] + g[i];
    }
    let upper_c = |x: i64| if x <= 0 { 1.0 } else { 1.0 - below[(x as usize).min(top + 1)] };
    let (h, lim) = (0.005, 10.0);
    let steps = (2.0 * lim / h) as usize;
    let ci = phi_inv(c.p);
    let mut want = vec![0.0; c.ks.len()];
    for s in 0..=steps {
        let z = -lim + s as f64 * h;
        let w = h * (-0.5 * z * z).exp() / (2.0 * std::f64::consts::PI).sqrt();
        let w = if s == 0 || s == steps { 0.5 * w } else { w };
        let q = phi((ci - c.rho.sqrt() * z) / (1.0 - c.rho).sqrt());
        let b = binomial(c.m, q);
        for (t, &k) in c.ks.iter().enumerate() {
            // P(u B + C >= k | z) = sum_j b_j P(C >= k - u j).
            let v: f64 = b.iter().enumerate().map(|(j, &bj)| bj * upper_c(k as i64 - (c.u * j as u64) as i64)).sum();
            want[t] += w * v;
        }
    }
    want
}

#[test]
fn a_group_beside_a_compound_source_matches_a_quadrature_of_panjers_recursion() {
    let cases = [
        // Units 3 beside sizes 2 and 5: span 1, the source's steps larger than the group's.
        Case {
            m: 40,
            p: 0.05,
            u: 3,
            rate: 1.5,
            sizes: vec![2, 5],
            probs: vec![0.6, 0.4],
            rho: 0.2,
            ks: vec![1, 5, 10, 20, 35, 60, 90],
        },
        // A heavy source (rate 20, sizes 1..8) beside a strongly correlated group of 4-unit members; span 1.
        Case {
            m: 60,
            p: 0.02,
            u: 4,
            rate: 20.0,
            sizes: (1..=8).collect(),
            probs: vec![0.3, 0.2, 0.15, 0.1, 0.1, 0.07, 0.05, 0.03],
            rho: 0.5,
            ks: vec![40, 70, 90, 120, 160, 220],
        },
        // A rare large source (rate 0.1, size 50) beside a group of 10-unit members: span 10.
        Case {
            m: 30,
            p: 0.1,
            u: 10,
            rate: 0.1,
            sizes: vec![50],
            probs: vec![1.0],
            rho: 0.3,
            ks: vec![10, 40, 61, 100, 150, 250],
        },
    ];
    let mut checked = 0;
    for c in &cases {
        let want = reference(c);
        let r = tail(json!({
            "portfolio": {"groups": [{"size": c.m, "probability": c.p, "units": c.u}],
                          "compound_sources": [{"rate": c.rate, "severity": {"kind": "listed",
                              "sizes": c.sizes, "probabilities": c.probs}}]},
            "thresholds": c.ks,
            "methods": ["exact", "normal"],
            "dependence": {"model": "one_factor_gaussian", "rho": c.rho},
        }));
        for (res, &truth) in r.results.iter().zip(&want) {
            let e = &res.estimates[0];
            let what = format!("m={} rate={} rho={} k={}", c.m, c.rate, c.rho, res.threshold);
            assert_eq!(e.bound_kind, BoundKind::Estimated, "{what}");
            let miss = (e.probability - truth).abs();
            assert!(
                miss <= e.error_bound + 1e-9 * truth,
                "{what}: {} vs {truth} (bound {})",
                e.probability,
                e.error_bound
            );
            // The default tolerance: relative 1e-7 with a small absolute floor.
            assert!(miss <= 1e-6 * truth + 1e-12, "{what}: {} vs {truth}", e.probability);
            let n = &res.estimates[1];
            assert!(
                (n.probability - truth).abs() <= n.error_bound,
                "{what}: normal {} vs {truth}: {n:?}",
                n.probability
            );
            checked += 1;
        }
        // The summary's mean: m p u + rate E[size] (the factor leaves the mean unchanged).
        let es: f64 = c.sizes.iter().zip(&c.probs).map(|(&s, &q)| s as f64 * q).sum();
        let mean = c.m as f64 * c.p * c.u as f64 + c.rate * es;
        assert!((r.summary.mean - mean).abs() <= 1e-9 * mean, "{:?}", r.summary);
    }
    assert_eq!(checked, 19);
}
