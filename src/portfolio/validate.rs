//! Validation of a portfolio against the model's rules and the service's size limits.
//!
//! Every violation names the offending field by a JSON pointer (RFC 6901) relative to the request document, so
//! the service can answer with a problem-details document (RFC 9457) that a client can act on.

use super::families::{expand, expected_len};
use super::model::Model;
use super::spec::{FamilySpec, PortfolioSpec, SeveritySpec, SEVERITY_SUM_TOLERANCE};

/// Size limits for one portfolio. All are configurable at start-up.
#[derive(Debug, Clone, Copy)]
pub struct Limits {
    /// Probabilities held in memory: listed ones plus expanded families.
    pub max_listed_exposures: u64,
    /// All exposures, including the sizes of groups (which cost no memory per exposure).
    pub max_total_exposures: u64,
    /// Sum of Poisson rates.
    pub max_poisson_rate: f64,
}

impl Default for Limits {
    fn default() -> Self {
        Limits { max_listed_exposures: 10_000_000, max_total_exposures: 1_000_000_000, max_poisson_rate: 1e9 }
    }
}

/// One rule broken by one field.
#[derive(Debug, Clone, PartialEq)]
pub struct Violation {
    /// JSON pointer (RFC 6901) to the field.
    pub pointer: String,
    /// What is wrong, in words a client developer can act on.
    pub detail: String,
}

impl Violation {
    pub fn new(pointer: impl Into<String>, detail: impl Into<String>) -> Self {
        Violation { pointer: pointer.into(), detail: detail.into() }
    }
}

/// Most violations reported at once; beyond this the list is cut (the first ones are what a client fixes first).
const MAX_REPORTED: usize = 20;

fn probability_ok(p: f64) -> bool {
    p.is_finite() && (0.0..=1.0).contains(&p)
}

/// A factor loading: the share rho of an exposure's latent variable that is the common factor, in [0, 1).
pub fn loading_ok(r: f64) -> bool {
    r.is_finite() && (0.0..1.0).contains(&r)
}

/// Largest loss units of one exposure: the tilt t u of the exact engine is then formed without rounding (t is
/// kept to 21 significant bits), and a unit this size on 10^7 exposures stays within 2^53.
pub const MAX_UNITS: u64 = 1_000_000_000;

/// Largest total loss of a portfolio, in units (all exposures' events at once): integers stay exact in f64.
pub const MAX_TOTAL_UNITS: u64 = 1 << 53;

fn units_violation(at: String, u: u64) -> Option<Violation> {
    (!(1..=MAX_UNITS).contains(&u))
        .then(|| Violation::new(at, format!("must be a whole number of loss units in 1..={MAX_UNITS}, got {u}")))
}

fn loading_violation(at: String, r: f64) -> Violation {
    Violation::new(at, format!("must be a factor loading in [0, 1), got {r}"))
}

/// Check `spec` (found at `base`, e.g. "/portfolio") and build the model, ignoring factor loadings (they are
/// checked all the same).
pub fn build_model(spec: &PortfolioSpec, base: &str, limits: &Limits) -> Result<Model, Vec<Violation>> {
    build_model_with(spec, base, limits, None)
}

/// [`build_model`] under a dependence model whose rho is `default_loading`: when the client gave any factor
/// loading, every random exposure of the model carries its own (the default where none was given).
pub fn build_model_with(
    spec: &PortfolioSpec,
    base: &str,
    limits: &Limits,
    default_loading: Option<f64>,
) -> Result<Model, Vec<Violation>> {
    let mut errs = Vec::new();
    let push = |errs: &mut Vec<Violation>, v: Violation| {
        if errs.len() < MAX_REPORTED {
            errs.push(v)
        }
    };
    if !spec.loadings.is_empty() && spec.loadings.len() != spec.probabilities.len() {
        push(
            &mut errs,
            Violation::new(
                format!("{base}/loadings"),
                format!(
                    "must hold one loading per entry of probabilities ({}), got {}",
                    spec.probabilities.len(),
                    spec.loadings.len()
                ),
            ),
        );
    }
    if !spec.units.is_empty() && spec.units.len() != spec.probabilities.len() {
        push(
            &mut errs,
            Violation::new(
                format!("{base}/units"),
                format!(
                    "must hold one whole number of loss units per entry of probabilities ({}), got {}",
                    spec.probabilities.len(),
                    spec.units.len()
                ),
            ),
        );
    }
    for (i, &u) in spec.units.iter().enumerate() {
        if let Some(v) = units_violation(format!("{base}/units/{i}"), u) {
            push(&mut errs, v);
        }
    }
    // The largest total (every event at once), in units, saturating: it must stay exact in f64.
    let mut top: u64 = if spec.units.is_empty() {
        spec.probabilities.len() as u64
    } else {
        spec.units.iter().fold(0u64, |a, &u| a.saturating_add(u))
    };
    for (i, &r) in spec.loadings.iter().enumerate() {
        if !loading_ok(r) {
            push(&mut errs, loading_violation(format!("{base}/loadings/{i}"), r));
        }
    }
    // A book whose listed probabilities all lie strictly inside (0, 1), the usual case, is told so by one
    // branch-free pass (it vectorises) and copied whole below; only one with 0s, 1s or bad values is walked
    // element by element, here and when the model is built.
    let inside = all_inside(&spec.probabilities);
    let walked: &[f64] = if inside { &[] } else { &spec.probabilities };
    for (i, &p) in walked.iter().enumerate() {
        if !probability_ok(p) {
            push(
                &mut errs,
                Violation::new(
                    format!("{base}/probabilities/{i}"),
                    format!("must be a probability in [0, 1], got {p}"),
                ),
            );
        }
    }
    let mut total: u64 = spec.probabilities.len() as u64;
    let mut listed: u64 = total;
    for (i, g) in spec.groups.iter().enumerate() {
        if !probability_ok(g.probability) {
            push(
                &mut errs,
                Violation::new(
                    format!("{base}/groups/{i}/probability"),
                    format!("must be a probability in [0, 1], got {}", g.probability),
                ),
            );
        }
        if let Some(r) = g.loading.filter(|&r| !loading_ok(r)) {
            push(&mut errs, loading_violation(format!("{base}/groups/{i}/loading"), r));
        }
        if let Some(v) = g.units.and_then(|u| units_violation(format!("{base}/groups/{i}/units"), u)) {
            push(&mut errs, v);
        }
        top = top.saturating_add(g.size.saturating_mul(g.units.unwrap_or(1)));
        total = total.saturating_add(g.size);
    }
    let mut rate = 0.0;
    for (i, &r) in spec.poisson_rates.iter().enumerate() {
        if !(r.is_finite() && r >= 0.0) {
            push(
                &mut errs,
                Violation::new(format!("{base}/poisson_rates/{i}"), format!("must be a finite rate >= 0, got {r}")),
            );
        } else {
            rate += r;
        }
    }
    for (i, c) in spec.compound_sources.iter().enumerate() {
        let at = format!("{base}/compound_sources/{i}");
        if !(c.rate.is_finite() && c.rate >= 0.0) {
            push(
                &mut errs,
                Violation::new(format!("{at}/rate"), format!("must be a finite rate >= 0, got {}", c.rate)),
            );
        } else {
            rate += c.rate;
        }
        // Each size is a scaled Poisson part held in memory: the sizes count as listed exposures, checked
        // (below) before any is generated.
        listed = listed.saturating_add(c.severity.len());
        for v in check_severity(&c.severity, &format!("{at}/severity")) {
            push(&mut errs, v);
        }
    }
    if rate > limits.max_poisson_rate {
        push(
            &mut errs,
            Violation::new(
                format!("{base}/poisson_rates"),
                format!(
                    "total rate {rate} (Poisson and compound sources) exceeds the limit {}",
                    limits.max_poisson_rate
                ),
            ),
        );
    }
    for (i, f) in spec.families.iter().enumerate() {
        let at = format!("{base}/families/{i}");
        for v in check_family(f, &at) {
            push(&mut errs, v);
        }
        if let Some(r) = f.loading().filter(|&r| !loading_ok(r)) {
            push(&mut errs, loading_violation(format!("{at}/loading"), r));
        }
        if let Some(v) = f.units().and_then(|u| units_violation(format!("{at}/units"), u)) {
            push(&mut errs, v);
        }
        let len = expected_len(f);
        top = top.saturating_add(len.saturating_mul(f.units().unwrap_or(1)));
        listed = listed.saturating_add(len);
        total = total.saturating_add(len);
    }
    if listed > limits.max_listed_exposures {
        push(
            &mut errs,
            Violation::new(
                base.to_string(),
                format!("{listed} listed or generated exposures exceed the limit of {}", limits.max_listed_exposures),
            ),
        );
    }
    if total > limits.max_total_exposures {
        push(
            &mut errs,
            Violation::new(
                base.to_string(),
                format!("{total} exposures in total exceed the limit of {}", limits.max_total_exposures),
            ),
        );
    }
    if top > MAX_TOTAL_UNITS {
        push(
            &mut errs,
            Violation::new(
                base.to_string(),
                format!(
                    "the largest possible total, {top} units, exceeds 2^53 = {MAX_TOTAL_UNITS}: express the losses in coarser units"
                ),
            ),
        );
    }
    if !errs.is_empty() {
        return Err(errs);
    }
    let direct: f64 = spec.poisson_rates.iter().sum();
    let mut model = Model { poisson: direct, ..Model::default() };
    let explicit = !spec.loadings.is_empty()
        || spec.groups.iter().any(|g| g.loading.is_some())
        || spec.families.iter().any(|f| f.loading().is_some());
    if has_units(spec) || !spec.compound_sources.is_empty() {
        // Loss units: every exposure pushed in units (with its loading, as below), then the lattice (span,
        // offset, steps) set once.
        let rho = default_loading.filter(|_| explicit);
        model.bernoulli.reserve(listed as usize);
        let one = |m: &mut Model, p: f64, u: u64, r: f64| {
            let n = m.bernoulli.len();
            m.push_weighted(p, u);
            if rho.is_some() && m.bernoulli.len() > n {
                m.loadings.push(r);
            }
        };
        let rho0 = rho.unwrap_or(0.0);
        for (i, &p) in spec.probabilities.iter().enumerate() {
            one(&mut model, p, spec.units.get(i).copied().unwrap_or(1), spec.loadings.get(i).copied().unwrap_or(rho0));
        }
        for f in &spec.families {
            let (u, r) = (f.units().unwrap_or(1), f.loading().unwrap_or(rho0));
            expand(f, |p| one(&mut model, p, u, r));
        }
        for g in &spec.groups {
            let (n, k) = (model.bernoulli.len(), model.binomials.len());
            model.push_group_weighted(g.size, g.probability, g.units.unwrap_or(1));
            if rho.is_some() {
                let r = g.loading.unwrap_or(rho0);
                if model.bernoulli.len() > n {
                    model.loadings.push(r);
                }
                if model.binomials.len() > k {
                    model.group_loadings.push(r);
                }
            }
        }
        for c in &spec.compound_sources {
            c.severity.expand(|size, q| model.push_scaled_poisson(size, c.rate * q));
        }
        model.set_lattice();
        return Ok(model);
    }
    model.bernoulli.reserve(listed as usize);
    match default_loading {
        Some(rho) if explicit => {
            model.loadings.reserve(listed as usize);
            for (i, &p) in spec.probabilities.iter().enumerate() {
                model.push_loaded(p, spec.loadings.get(i).copied().unwrap_or(rho));
            }
            for f in &spec.families {
                let r = f.loading().unwrap_or(rho);
                expand(f, |p| model.push_loaded(p, r));
            }
            for g in &spec.groups {
                model.push_group_loaded(g.size, g.probability, g.loading.unwrap_or(rho));
            }
        }
        _ if inside => {
            model.bernoulli.extend_from_slice(&spec.probabilities);
            model.exposures += spec.probabilities.len() as u64;
            for f in &spec.families {
                expand(f, |p| model.push_bernoulli(p));
            }
            for g in &spec.groups {
                model.push_group(g.size, g.probability);
            }
        }
        _ => {
            for &p in &spec.probabilities {
                model.push_bernoulli(p);
            }
            for f in &spec.families {
                expand(f, |p| model.push_bernoulli(p));
            }
            for g in &spec.groups {
                model.push_group(g.size, g.probability);
            }
        }
    }
    Ok(model)
}

/// Whether every value is strictly inside (0, 1) (so a probability, and neither dropped nor certain in the
/// model): no NaN, infinity, 0 or 1. Folded without early exit, in blocks, so that the compiler vectorises it.
pub fn all_inside(ps: &[f64]) -> bool {
    ps.chunks(4096).all(|c| c.iter().fold(true, |ok, &p| ok & (p > 0.0) & (p < 1.0)))
}

/// Whether the client gave loss units anywhere (even all 1: the answer is the same, by a different path).
pub fn has_units(spec: &PortfolioSpec) -> bool {
    !spec.units.is_empty()
        || spec.groups.iter().any(|g| g.units.is_some())
        || spec.families.iter().any(|f| f.units().is_some())
}

/// Largest number of sizes one severity law may list or generate (each is a part of the exact product).
pub const MAX_SEVERITY_SIZES: u64 = 100_000;

fn check_severity(sev: &SeveritySpec, at: &str) -> Vec<Violation> {
    let mut v = Vec::new();
    let n = sev.len();
    if n > MAX_SEVERITY_SIZES {
        v.push(Violation::new(
            at,
            format!("{n} sizes exceed the limit of {MAX_SEVERITY_SIZES} per severity law: use coarser units"),
        ));
    }
    match *sev {
        SeveritySpec::Listed { ref sizes, ref probabilities } => {
            if sizes.is_empty() {
                v.push(Violation::new(format!("{at}/sizes"), "at least one size is required"));
            }
            if sizes.len() != probabilities.len() {
                v.push(Violation::new(
                    format!("{at}/probabilities"),
                    format!("must hold one probability per size ({}), got {}", sizes.len(), probabilities.len()),
                ));
            }
            for (i, &s) in sizes.iter().enumerate().take(MAX_SEVERITY_SIZES as usize) {
                if let Some(x) = units_violation(format!("{at}/sizes/{i}"), s) {
                    v.push(x);
                    break;
                }
            }
            let mut total = 0.0;
            let mut ok = true;
            for (i, &q) in probabilities.iter().enumerate().take(MAX_SEVERITY_SIZES as usize) {
                if !probability_ok(q) {
                    v.push(Violation::new(
                        format!("{at}/probabilities/{i}"),
                        format!("must be a probability in [0, 1], got {q}"),
                    ));
                    ok = false;
                    break;
                }
                total += q;
            }
            if ok && !probabilities.is_empty() && (total - 1.0).abs() > SEVERITY_SUM_TOLERANCE {
                v.push(Violation::new(
                    format!("{at}/probabilities"),
                    format!("must sum to 1 within {SEVERITY_SUM_TOLERANCE}, got {total}"),
                ));
            }
        }
        SeveritySpec::Geometric { first, step, largest, ratio } => {
            for (name, x) in [("first", first), ("step", step), ("largest", largest)] {
                if let Some(e) = units_violation(format!("{at}/{name}"), x) {
                    v.push(e);
                }
            }
            if largest < first {
                v.push(Violation::new(
                    format!("{at}/largest"),
                    format!("must be at least first ({first}), got {largest}"),
                ));
            }
            if !(ratio.is_finite() && (0.0..=1.0).contains(&ratio)) {
                v.push(Violation::new(
                    format!("{at}/ratio"),
                    format!("must be in [0, 1] (the ratio of the probabilities of consecutive sizes), got {ratio}"),
                ));
            }
        }
    }
    v
}

fn check_family(f: &FamilySpec, at: &str) -> Vec<Violation> {
    let mut v = Vec::new();
    let mut prob = |name: &str, x: f64| {
        if !probability_ok(x) {
            v.push(Violation::new(format!("{at}/{name}"), format!("must be a probability in [0, 1], got {x}")));
        }
    };
    match *f {
        FamilySpec::Constant { probability, .. } => prob("probability", probability),
        FamilySpec::Harmonic { .. } => {}
        FamilySpec::Ewens { theta, .. } => {
            if !(theta.is_finite() && theta > 0.0) {
                v.push(Violation::new(format!("{at}/theta"), format!("must be finite and > 0, got {theta}")));
            }
        }
        FamilySpec::Geometric { first, ratio, .. } => {
            prob("first", first);
            if !(ratio.is_finite() && (0.0..=1.0).contains(&ratio)) {
                v.push(Violation::new(
                    format!("{at}/ratio"),
                    format!("must be in [0, 1] so that every p_k stays a probability, got {ratio}"),
                ));
            }
        }
        FamilySpec::Linear { first, last, .. } => {
            prob("first", first);
            prob("last", last);
        }
        FamilySpec::Logistic { ref scores, intercept, slope, .. } => {
            if !intercept.is_finite() {
                v.push(Violation::new(format!("{at}/intercept"), "must be finite"));
            }
            if !slope.is_finite() {
                v.push(Violation::new(format!("{at}/slope"), "must be finite"));
            }
            for (i, s) in scores.iter().enumerate() {
                if !(s.is_finite() && (intercept + slope * s).is_finite()) {
                    v.push(Violation::new(
                        format!("{at}/scores/{i}"),
                        format!("score {s} gives a non-finite linear predictor"),
                    ));
                    break;
                }
            }
        }
    }
    v
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The branch-free test agrees with the element-by-element one (`0 < p < 1`, so not NaN) for every value
    /// that breaks it, at the start, at a block's edge and at the end of a book longer than one block.
    #[test]
    fn all_inside_agrees_with_a_plain_walk() {
        let odd = [0.0, -0.0, 1.0, f64::NAN, f64::INFINITY, f64::NEG_INFINITY, -1e-300, 1.0 + f64::EPSILON, 1.5];
        let good = [f64::MIN_POSITIVE, 5e-324, 0.5, 1.0 - f64::EPSILON / 2.0];
        for n in [1usize, 4095, 4096, 4097, 10_000] {
            let base: Vec<f64> = (0..n).map(|i| good[i % good.len()]).collect();
            assert!(all_inside(&base), "n={n}");
            for at in [0, n / 2, 4095.min(n - 1), n - 1] {
                for &x in &odd {
                    let mut v = base.clone();
                    v[at] = x;
                    let walk = v.iter().all(|&p| p > 0.0 && p < 1.0);
                    assert_eq!(all_inside(&v), walk, "n={n}, at={at}, x={x}");
                    assert!(!walk);
                }
            }
        }
        assert!(all_inside(&[]));
    }

    /// A book of interior probabilities builds the model it built element by element, and one with a 0, a 1
    /// or a bad value takes the walk (dropped, shifted, or refused at its index).
    #[test]
    fn the_whole_copy_builds_the_model_the_walk_builds() {
        let spec = |ps: Vec<f64>| PortfolioSpec { probabilities: ps, ..PortfolioSpec::default() };
        let ps: Vec<f64> = (0..9000).map(|i| (i % 97 + 1) as f64 / 100.0).collect();
        let m = build_model(&spec(ps.clone()), "/portfolio", &Limits::default()).unwrap();
        assert_eq!(m, Model::from_parts(&ps, &[], 0.0));
        let mut mixed = ps.clone();
        mixed[5000] = 1.0;
        mixed[7] = 0.0;
        let m = build_model(&spec(mixed.clone()), "/portfolio", &Limits::default()).unwrap();
        assert_eq!((m.shift, m.bernoulli.len(), m.exposures), (1, 8998, 9000));
        assert_eq!(m, Model::from_parts(&mixed, &[], 0.0));
        mixed[8000] = f64::NAN;
        let errs = build_model(&spec(mixed), "/portfolio", &Limits::default()).unwrap_err();
        assert_eq!(errs.len(), 1);
        assert_eq!(errs[0].pointer, "/portfolio/probabilities/8000");
    }
}
