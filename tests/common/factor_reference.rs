//! Reference laws under the one-factor Gaussian model, independent of the service's quadrature: the
//! conditional pmf given Z = z by a naive recursion in f64 (each exposure's two-point law convolved in; a
//! binomial group as its pmf spread over its unit; a compound Poisson source by Panjer's recursion, Panjer
//! 1981, "Recursive evaluation of a family of compound distributions", ASTIN Bulletin 12), mixed by the
//! trapezoid rule on [-10, 10] with step 0.005 (spectrally accurate for a Gaussian-weighted analytic integrand;
//! the factor's mass beyond 10 is 1.5e-23). statrs' normal cdf limits the reference to about 3e-11 relative on
//! each p(z). Included by path where needed.

#![allow(dead_code)]

/// Phi^-1(p): statrs' inverse, refined by Newton steps on statrs' cdf.
pub fn phi_inv(p: f64) -> f64 {
    use statrs::distribution::{Continuous, ContinuousCDF, Normal};
    let n = Normal::standard();
    let mut x = n.inverse_cdf(p);
    for _ in 0..3 {
        x -= (n.cdf(x) - p) / n.pdf(x);
    }
    x
}

pub fn phi(x: f64) -> f64 {
    use statrs::distribution::{ContinuousCDF, Normal};
    Normal::standard().cdf(x)
}

/// p(z) = Phi((Phi^-1(p) - sqrt(rho) z) / sqrt(1 - rho)).
pub fn conditional_p(c: f64, rho: f64, z: f64) -> f64 {
    phi((c - rho.sqrt() * z) / (1.0 - rho).sqrt())
}

/// f convolved with a two-point law: u units with probability q.
pub fn add_exposure(f: &[f64], q: f64, u: usize) -> Vec<f64> {
    let mut g = vec![0.0; f.len() + u];
    for (x, &v) in f.iter().enumerate() {
        g[x] += v * (1.0 - q);
        g[x + u] += v * q;
    }
    g
}

/// f convolved with a law h on 0, u, 2u, ... (h_j at j u), cut at `top` when given.
pub fn add_spread(f: &[f64], h: &[f64], u: usize, top: Option<usize>) -> Vec<f64> {
    let mut len = f.len() + u * (h.len() - 1);
    if let Some(t) = top {
        len = len.min(t + 1);
    }
    let mut g = vec![0.0; len];
    for (j, &hj) in h.iter().enumerate() {
        for (x, &v) in f.iter().enumerate() {
            let at = x + j * u;
            if at < len {
                g[at] += hj * v;
            }
        }
    }
    g
}

/// The Binomial(m, q) pmf from ln C(m, j) + j ln q + (m - j) ln(1 - q) (m small here).
pub fn binomial(m: u64, q: f64) -> Vec<f64> {
    (0..=m)
        .map(|j| {
            let ln_c: f64 = (1..=j).map(|i| ((m - j + i) as f64 / i as f64).ln()).sum();
            let a = if j == 0 { 0.0 } else { j as f64 * q.ln() };
            let b = if j == m { 0.0 } else { (m - j) as f64 * (-q).ln_1p() };
            (ln_c + a + b).exp()
        })
        .collect()
}

/// The compound Poisson pmf g_0..=g_top (rate `lambda`, sizes with probabilities) by Panjer's recursion.
pub fn panjer(lambda: f64, sizes: &[u64], probs: &[f64], top: usize) -> Vec<f64> {
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

/// E over Z of the conditional pmf `cond(z)` (entries 0..len), by the trapezoid rule on [-10, 10], step 0.005.
pub fn mix(len: usize, cond: impl Fn(f64) -> Vec<f64>) -> Vec<f64> {
    let (h, lim) = (0.005, 10.0);
    let steps = (2.0 * lim / h) as usize;
    let mut out = vec![0.0; len];
    for s in 0..=steps {
        let z = -lim + s as f64 * h;
        let w = h * (-0.5 * z * z).exp() / (2.0 * std::f64::consts::PI).sqrt();
        let w = if s == 0 || s == steps { 0.5 * w } else { w };
        for (o, v) in out.iter_mut().zip(cond(z)) {
            *o += w * v;
        }
    }
    out
}

/// The small mixed books the route tests send under the factor (rho 0.25): one in units with a group, one
/// with a geometric compound source. Returns (dependence, the book in units, the book with the source).
pub fn mixed_books() -> (serde_json::Value, serde_json::Value, serde_json::Value) {
    use serde_json::json;
    let factor = json!({"model": "one_factor_gaussian", "rho": 0.25});
    let source =
        json!({"rate": 2.0, "severity": {"kind": "geometric", "first": 2, "step": 2, "largest": 20, "ratio": 0.7}});
    let units = json!({"probabilities": [0.05, 0.1, 0.2, 0.02], "units": [10, 25, 5, 100],
        "groups": [{"size": 20, "probability": 0.03, "units": 15}]});
    let compound = json!({"probabilities": [0.05, 0.1], "units": [3, 4], "compound_sources": [source]});
    (factor, units, compound)
}
