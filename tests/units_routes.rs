//! The questions in loss units (quantiles, distribution, layers and tail expectations, chart) through the
//! service's own pipeline (request -> check -> lattice model -> answer), against exact references in rational
//! arithmetic: De Pril's recursion (N. De Pril, "On the exact computation of the aggregate claims distribution
//! in the individual life model", ASTIN Bulletin 16, 1986, Theorem 1; `common/de_pril.rs`) on random small books
//! with groups, certain exposures (an offset) and a common factor of the units (span > 1). From the rational
//! pmf: the cdf at every level near its jumps, the whole pmf, the stop-loss premium E[(S - a)+] and the layer
//! E[min((S - a)+, l)] at every attachment a, each value within its reported rigorous bound.

#[path = "common/de_pril.rs"]
mod de_pril;
use de_pril::{de_pril, rat, Class};
use num_rational::BigRational;
use num_traits::{One, Signed, ToPrimitive, Zero};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde_json::{json, Value as Json};
use tailtally::analytics::cancel::Cancel;
use tailtally::analytics::chart::{Chart, ChartRequest};
use tailtally::analytics::distribution::Distribution;
use tailtally::analytics::error::Error;
use tailtally::analytics::layers::Layers;
use tailtally::analytics::pipeline::{run, Analytic};
use tailtally::analytics::quantiles::{Quantiles, QuantilesRequest};
use tailtally::config::{Options, ServiceLimits};

fn ask<A: Analytic>(req: Json) -> Result<A::Answer, Error>
where
    A::Request: serde::de::DeserializeOwned,
{
    let req: A::Request = serde_json::from_value(req).expect("a well-formed request");
    run::<A>(&req, &ServiceLimits::from_options(&Options::default()), &Cancel::never())
}

/// A random small book in units (every unit a multiple of `factor`), its JSON portfolio and its rational pmf
/// over the totals 0..=top (De Pril).
fn book(rng: &mut ChaCha8Rng, case: usize) -> (Json, Vec<BigRational>, u64) {
    let factor = [2u64, 3, 10, 1, 5][case % 5];
    let n = rng.gen_range(1..=7);
    let (mut ps, mut us, mut groups, mut classes, mut shift) = (vec![], vec![], vec![], vec![], 0);
    for i in 0..n {
        let u = factor * rng.gen_range(1..=6);
        let p: f64 = match rng.gen_range(0..5) {
            0 => 10f64.powf(-rng.gen_range(1.0..6.0)),
            // A certain exposure moves the lattice (its units modulo the span are the offset).
            1 if i == 0 && case % 2 == 0 => 1.0,
            _ => rng.gen_range(0.02..0.95),
        };
        // With a certain exposure off the span's multiples, the offset is not 0.
        let u = if p >= 1.0 { u + 1 } else { u };
        ps.push(p);
        us.push(u);
        if p >= 1.0 {
            shift += u;
        } else {
            classes.push(Class { units: u, p, count: 1 });
        }
    }
    for _ in 0..rng.gen_range(0..=2) {
        let (size, p, u) = (rng.gen_range(2..5), rng.gen_range(0.05..0.6), factor * rng.gen_range(1..=4));
        groups.push(json!({"size": size, "probability": p, "units": u}));
        classes.push(Class { units: u, p, count: size });
    }
    let pmf = de_pril(&classes, shift);
    let top = pmf.len() as u64 - 1;
    (json!({"probabilities": ps, "units": us, "groups": groups}), pmf, top)
}

fn f(x: &Json) -> f64 {
    x.as_f64().unwrap_or_else(|| panic!("a number, got {x}"))
}

/// |value - truth| within the reported bound, and to 1e-12 relative where the truth is a normal f64.
fn within(what: &str, value: f64, bound: f64, truth: &BigRational) {
    let diff = (rat(value) - truth).abs();
    assert!(diff <= rat(bound), "{what}: {value} vs truth {} beyond its bound {bound:e}", truth.to_f64().unwrap());
    if *truth > rat(1e-290) {
        let rel = (diff / truth).to_f64().unwrap();
        assert!(rel <= 1e-12, "{what}: relative error {rel:e}");
    }
}

/// The pmf's cumulative sums.
fn cdf_of(pmf: &[BigRational]) -> Vec<BigRational> {
    let mut acc = BigRational::zero();
    pmf.iter()
        .map(|p| {
            acc += p;
            acc.clone()
        })
        .collect()
}

/// E[min((S - a)+, l)] from the rational pmf (l None: no cap).
fn layer_truth(pmf: &[BigRational], a: u64, l: Option<u64>) -> BigRational {
    let mut acc = BigRational::zero();
    for (s, p) in pmf.iter().enumerate().skip(a as usize + 1) {
        let x = s as u64 - a;
        let x = l.map_or(x, |l| x.min(l));
        acc += p * BigRational::from_integer((x as i64).into());
    }
    acc
}

#[test]
fn quantiles_in_units_match_de_pril_near_every_jump() {
    let mut rng = ChaCha8Rng::seed_from_u64(20261203);
    let mut checked = 0;
    for case in 0..20 {
        let (portfolio, pmf, _) = book(&mut rng, case);
        let cdf = cdf_of(&pmf);
        // Just below and just above every jump of the cdf (levels strictly inside (0, 1)).
        let mut levels = Vec::new();
        for (s, c) in cdf.iter().enumerate() {
            if pmf[s].is_zero() {
                continue;
            }
            let c = c.to_f64().unwrap();
            for l in [c * (1.0 - 1e-7), c * (1.0 + 1e-7)] {
                if l > 0.0 && l < 1.0 {
                    levels.push(l);
                }
            }
        }
        levels.sort_by(f64::total_cmp);
        levels.dedup();
        let methods = if case % 4 == 0 { json!(["exact", "normal"]) } else { json!(["exact"]) };
        let out = ask::<Quantiles>(json!({"portfolio": portfolio, "levels": levels, "methods": methods}))
            .unwrap_or_else(|e| panic!("case {case}: {e:?}"));
        let out = serde_json::to_value(out).unwrap();
        for q in out["quantiles"].as_array().unwrap() {
            let level = f(&q["level"]);
            let lr = rat(level);
            // The truth: the smallest total s with P(S <= s) >= level (a point with mass, in units).
            let want = cdf.iter().position(|c| *c >= lr).expect("levels below 1") as u64;
            let count = q["count"].as_u64().unwrap();
            if q["method"] == "normal" {
                // An approximation's quantile: the truth lies in the range its rigorous bound leaves possible.
                let lo = q["count_range"][0].as_u64().unwrap();
                let hi = q["count_range"][1].as_u64().unwrap_or(u64::MAX);
                assert!(lo <= want && want <= hi, "case {case} level {level}: truth {want} outside {q}");
                continue;
            }
            assert_eq!(count, want, "case {case} level {level}: {q}");
            within(
                &format!("case {case} F({count})"),
                f(&q["cdf_at_count"]),
                f(&q["cdf_error_bounds"][0]),
                &cdf[want as usize],
            );
            let below = if want == 0 { BigRational::zero() } else { cdf[want as usize - 1].clone() };
            within(&format!("case {case} F({count} - 1)"), f(&q["cdf_below"]), f(&q["cdf_error_bounds"][1]), &below);
            assert_eq!(q["bound_kind"], "rigorous");
            checked += 1;
        }
    }
    assert!(checked > 300, "checked {checked}");
}

#[test]
fn the_distribution_in_units_lists_every_lattice_point_as_de_pril() {
    let mut rng = ChaCha8Rng::seed_from_u64(31);
    for case in 0..20 {
        let (portfolio, pmf, top) = book(&mut rng, case);
        let out = ask::<Distribution>(json!({"portfolio": portfolio, "from": 0, "to": top + 7}))
            .unwrap_or_else(|e| panic!("case {case}: {e:?}"));
        let out = serde_json::to_value(out).unwrap();
        let (from, to, step) =
            (out["from"].as_u64().unwrap(), out["to"].as_u64().unwrap(), out["step"].as_u64().unwrap());
        let rows = out["pmf"].as_array().unwrap();
        assert_eq!(from + step * (rows.len() as u64 - 1), to, "case {case}");
        // Every total with mass is a listed row; the rows hold all the mass (nothing off the lattice).
        let listed: Vec<u64> = (0..rows.len() as u64).map(|i| from + i * step).collect();
        let mut held = BigRational::zero();
        for (s, p) in pmf.iter().enumerate() {
            if !p.is_zero() {
                assert!(listed.contains(&(s as u64)), "case {case}: total {s} has mass but no row");
            }
        }
        let cdf = cdf_of(&pmf);
        let (cdf_bound, total) = (f(&out["cdf_sf_max_error_bound"]), BigRational::one());
        for (i, &s) in listed.iter().enumerate() {
            let p = pmf.get(s as usize).cloned().unwrap_or_else(BigRational::zero);
            held += &p;
            within(&format!("case {case} pmf({s})"), f(&rows[i]), f(&out["pmf_error_bound"][i]), &p);
            let c = cdf.get(s as usize).cloned().unwrap_or_else(BigRational::one);
            within(&format!("case {case} cdf({s})"), f(&out["cdf"][i]), cdf_bound, &c);
            within(&format!("case {case} sf({s})"), f(&out["sf"][i]), cdf_bound, &(&total - &c));
        }
        assert!(held == total, "case {case}: the rows hold all the mass");
    }
}

#[test]
fn layers_and_stop_loss_premiums_in_units_match_de_pril_at_every_attachment() {
    let mut rng = ChaCha8Rng::seed_from_u64(5);
    let mut checked = 0;
    for case in 0..8 {
        let (portfolio, pmf, top) = book(&mut rng, case);
        let cdf = cdf_of(&pmf);
        let limits = [None, Some(1), Some(4), Some(top / 3 + 1)];
        let mut layers = Vec::new();
        for a in 0..=top + 1 {
            for l in limits {
                layers.push(json!({"attachment": a, "limit": l}));
            }
        }
        let out = ask::<Layers>(json!({"portfolio": portfolio, "layers": layers, "tail_levels": [0.5, 0.9, 0.999]}))
            .unwrap_or_else(|e| panic!("case {case}: {e:?}"));
        let out = serde_json::to_value(out).unwrap();
        let tail = |k: u64| -> BigRational {
            // P(S >= k)
            if k == 0 {
                BigRational::one()
            } else {
                BigRational::one() - cdf.get(k as usize - 1).cloned().unwrap_or_else(BigRational::one)
            }
        };
        for r in out["layers"].as_array().unwrap() {
            let a = r["attachment"].as_u64().unwrap();
            let l = r["limit"].as_u64();
            let d = &r["detail"];
            let what = format!("case {case} a={a} l={l:?}");
            let e = &d["expected_count"];
            within(&what, f(&e["value"]), f(&e["error_bound"]), &layer_truth(&pmf, a, l));
            let t = &d["probability_touched"];
            within(&format!("{what} touched"), f(&t["value"]), f(&t["error_bound"]), &tail(a + 1));
            if let Some(l) = l {
                let x = &d["probability_exhausted"];
                within(&format!("{what} exhausted"), f(&x["value"]), f(&x["error_bound"]), &tail(a + l));
            }
            checked += 1;
        }
        for t in out["tail_expectations"].as_array().unwrap() {
            let level = rat(f(&t["level"]));
            let q = cdf.iter().position(|c| *c >= level).unwrap() as u64;
            assert_eq!(t["quantile"].as_u64().unwrap(), q, "case {case}: {t}");
            let beyond = tail(q + 1);
            let e = &t["expected_count"];
            if beyond.is_zero() {
                assert_eq!(f(&e["value"]), q as f64);
                continue;
            }
            // E[S | S > q] = q + E[(S - q)+] / P(S > q).
            let truth = BigRational::from_integer((q as i64).into()) + layer_truth(&pmf, q, None) / &beyond;
            within(&format!("case {case} E[S | S > {q}]"), f(&e["value"]), f(&e["error_bound"]), &truth);
        }
    }
    assert!(checked > 500, "checked {checked}");
}

/// A textbook-style stop-loss example: four term-life policies paying 2, 4, 4 and 6 (thousands) with death
/// probabilities 0.1, 0.05, 0.05 and 0.02, and a certain payment of 1, so S lies on 1 + 2 j. Expected values:
/// the output of fixtures/reference/stop_loss_units.py (Python, exact fractions), pasted.
#[test]
fn a_stop_loss_example_matches_the_exact_fractions_script() {
    let portfolio = json!({"probabilities": [0.1, 0.05, 0.05, 0.02, 1.0], "units": [2, 4, 4, 6, 1]});
    let layers = json!([{"attachment": 4}, {"attachment": 5, "limit": 4}, {"attachment": 2, "limit": 6}]);
    let out = serde_json::to_value(ask::<Layers>(json!({"portfolio": portfolio, "layers": layers})).unwrap()).unwrap();
    // fixtures/reference/stop_loss_units.py:
    //   a=4 l=None: E[min((S-a)+, l)] = 0.19646000000000002  P(S > a) = 0.11555
    //   a=5 l=4: E[min((S-a)+, l)] = 0.07593000000000001  P(S > a) = 0.031760000000000004
    //   a=2 l=6: E[min((S-a)+, l)] = 0.50482  P(S > a) = 0.203995
    let want = [(0.19646000000000002, 0.11555), (0.07593000000000001, 0.031760000000000004), (0.50482, 0.203995)];
    for (r, (premium, touched)) in out["layers"].as_array().unwrap().iter().zip(want) {
        let got = f(&r["expected_count"]);
        assert!((got - premium).abs() <= 1e-14 * premium, "{r}: want {premium}");
        assert!(f(&r["detail"]["expected_count"]["error_bound"]) <= 1e-13 * premium, "{r}");
        let t = f(&r["probability_touched"]);
        assert!((t - touched).abs() <= 1e-14 * touched, "{r}: want {touched}");
    }
    assert_eq!(out["summary"]["support_min"], 1);
}

#[test]
fn under_a_stress_the_answers_stay_in_units() {
    let mut rng = ChaCha8Rng::seed_from_u64(77);
    for case in 0..6 {
        let (portfolio, _, top) = book(&mut rng, case);
        // The stressed book: every probability times 1.5, capped at 1 (the service's rule), computed in the
        // same floating point, then De Pril on it.
        let stressed = |p: f64| (1.5 * p).min(1.0);
        let ps: Vec<f64> = portfolio["probabilities"].as_array().unwrap().iter().map(|p| stressed(f(p))).collect();
        let us: Vec<u64> = portfolio["units"].as_array().unwrap().iter().map(|u| u.as_u64().unwrap()).collect();
        let mut classes = Vec::new();
        let mut shift = 0;
        for (&p, &u) in ps.iter().zip(&us) {
            if p >= 1.0 {
                shift += u;
            } else {
                classes.push(Class { units: u, p, count: 1 });
            }
        }
        for g in portfolio["groups"].as_array().unwrap() {
            let p = stressed(f(&g["probability"]));
            let (size, u) = (g["size"].as_u64().unwrap(), g["units"].as_u64().unwrap());
            if p >= 1.0 {
                shift += size * u;
            } else {
                classes.push(Class { units: u, p, count: size });
            }
        }
        let pmf = de_pril(&classes, shift);
        let a = top / 2;
        let out = ask::<Layers>(json!({"portfolio": portfolio, "layers": [{"attachment": a, "limit": 3}],
            "stress": {"probability_factor": 1.5}}))
        .unwrap();
        let out = serde_json::to_value(out).unwrap();
        let e = &out["layers"][0]["detail"]["expected_count"];
        within(&format!("case {case} stressed"), f(&e["value"]), f(&e["error_bound"]), &layer_truth(&pmf, a, Some(3)));
        // The base answer is there too, in units.
        assert_eq!(out["base"]["layers"][0]["attachment"], a);
        let d = ask::<Distribution>(json!({"portfolio": portfolio, "from": 0, "to": top + 10,
            "stress": {"odds_factor": 2.0}}))
        .unwrap();
        assert!(d.step.is_some() && d.base.as_ref().unwrap().step.is_some(), "case {case}");
        let sum: f64 = d.pmf.iter().sum();
        assert!((sum - 1.0).abs() < 1e-12, "case {case}: {sum}");
    }
}

#[test]
fn the_chart_in_units_stands_on_the_lattice() {
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    for case in 0..8 {
        let (portfolio, pmf, top) = book(&mut rng, case);
        let k = top / 2 + 1;
        let req = json!({"portfolio": portfolio, "threshold": k, "methods": ["normal"]});
        let c = ask::<Chart>(req).unwrap_or_else(|e| panic!("case {case}: {e:?}"));
        let span = c.span.expect("a book in units");
        assert!(c.counts.windows(2).all(|w| w[1] - w[0] == c.stride) && c.stride % span == 0, "case {case}");
        for (&s, ln) in c.counts.iter().zip(&c.exact_ln) {
            let p = pmf.get(s as usize).cloned().unwrap_or_else(BigRational::zero);
            match ln {
                None => assert!(p.is_zero(), "case {case}: P(S = {s}) > 0 but drawn as 0"),
                Some(ln) => {
                    let truth = p.to_f64().unwrap();
                    assert!((ln.exp() - truth).abs() <= 1e-12 * truth, "case {case} s={s}: {} vs {truth}", ln.exp());
                }
            }
        }
        // Every total with mass in the plotted range is a bar (the bars are the lattice points).
        let (lo, hi) = (c.counts[0], *c.counts.last().unwrap());
        if c.stride == span {
            for s in lo..=hi {
                if pmf.get(s as usize).is_some_and(|p| !p.is_zero()) {
                    assert!(c.counts.contains(&s), "case {case}: {s} has mass and no bar");
                }
            }
        }
        // The title's tail P(S >= k), k in units (on the lattice or not).
        let below: BigRational = pmf.iter().take(k as usize).sum();
        let truth = (BigRational::one() - below).to_f64().unwrap();
        let got = c.tail_ln.map_or(0.0, f64::exp);
        assert!((got - truth).abs() <= 1e-12 * truth, "case {case}: tail {got} vs {truth}");
    }
    // Every approximation takes units now; Edgeworth and the saddlepoint not yet with compound sources, which
    // are refused at their place in `methods`.
    let (mut portfolio, _, _) = book(&mut rng, 0);
    let plain: ChartRequest =
        serde_json::from_value(json!({"portfolio": portfolio, "threshold": 3, "methods": ["normal", "saddlepoint"]}))
            .unwrap();
    assert!(run::<Chart>(&plain, &ServiceLimits::from_options(&Options::default()), &Cancel::never()).is_ok());
    portfolio["compound_sources"] =
        json!([{"rate": 0.5, "severity": {"kind": "listed", "sizes": [2, 4], "probabilities": [0.5, 0.5]}}]);
    let req: ChartRequest =
        serde_json::from_value(json!({"portfolio": portfolio, "threshold": 3, "methods": ["normal", "saddlepoint"]}))
            .unwrap();
    match run::<Chart>(&req, &ServiceLimits::from_options(&Options::default()), &Cancel::never()) {
        Err(Error::Invalid(v)) => assert_eq!(v[0].pointer, "/methods/1"),
        other => panic!("expected a 422 at /methods/1, got {:?}", other.map(|_| ())),
    }
    let req: QuantilesRequest =
        serde_json::from_value(json!({"portfolio": portfolio, "levels": [0.5], "methods": ["edgeworth"]})).unwrap();
    match run::<Quantiles>(&req, &ServiceLimits::from_options(&Options::default()), &Cancel::never()) {
        Err(Error::Invalid(v)) => assert_eq!(v[0].pointer, "/methods/0"),
        other => panic!("expected a 422 at /methods/0, got {:?}", other.map(|_| ())),
    }
}

/// Wider books (lattices of thousands of points, so the exact engine truncates and may use the FFT, whose
/// absolute errors enter the layer through the weight bound) against the naive recursion over the whole
/// lattice in f64, f_j <- f_j (1 - p) + f_(j - u) p: all its terms are non-negative, so each entry, and each
/// non-negatively weighted sum of entries, is accurate to about 2 n ulps relative (Higham 2002, section 3.1).
/// Every layer's rigorous bound must cover the difference, from the bulk to the far tail.
#[test]
fn layers_on_wide_lattices_keep_their_rigorous_bounds() {
    let mut rng = ChaCha8Rng::seed_from_u64(4242);
    let mut checked = 0;
    for case in 0..6 {
        let n = rng.gen_range(100..=300);
        let factor = [1u64, 3][case % 2];
        let (mut ps, mut us) = (vec![], vec![]);
        for _ in 0..n {
            ps.push(rng.gen_range(0.001..0.3f64));
            us.push(factor * rng.gen_range(1..=60));
        }
        let width: u64 = us.iter().sum();
        let mut pmf = vec![0.0f64; width as usize + 1];
        pmf[0] = 1.0;
        let mut filled = 0usize;
        for (&p, &u) in ps.iter().zip(&us) {
            let u = u as usize;
            filled += u;
            for j in (u..=filled).rev() {
                pmf[j] = pmf[j] * (1.0 - p) + pmf[j - u] * p;
            }
            for x in &mut pmf[..u] {
                *x *= 1.0 - p;
            }
        }
        let ulps = 4.0 * n as f64 * f64::EPSILON;
        let mean: f64 = ps.iter().zip(&us).map(|(&p, &u)| p * u as f64).sum();
        let sd: f64 = ps.iter().zip(&us).map(|(&p, &u)| p * (1.0 - p) * (u * u) as f64).sum::<f64>().sqrt();
        let mut layers = Vec::new();
        for z in [-2.0, 0.0, 1.5, 4.0, 9.0] {
            let a = (mean + z * sd).max(0.0).round() as u64;
            for l in [None, Some(factor), Some((sd as u64).max(1))] {
                layers.push(json!({"attachment": a, "limit": l}));
            }
        }
        let out = ask::<Layers>(json!({"portfolio": {"probabilities": ps, "units": us}, "layers": layers}))
            .unwrap_or_else(|e| panic!("case {case}: {e:?}"));
        let out = serde_json::to_value(out).unwrap();
        for r in out["layers"].as_array().unwrap() {
            let (a, l) = (r["attachment"].as_u64().unwrap() as usize, r["limit"].as_u64());
            let truth: f64 = pmf
                .iter()
                .enumerate()
                .skip(a + 1)
                .map(|(s, &p)| p * l.map_or((s - a) as f64, |l| ((s - a) as u64).min(l) as f64))
                .sum();
            if truth < 1e-280 {
                continue;
            }
            let e = &r["detail"]["expected_count"];
            let (got, bound) = (f(&e["value"]), f(&e["error_bound"]));
            assert!(
                (got - truth).abs() <= bound + 2.0 * ulps * truth,
                "case {case} a={a} l={l:?}: |{got} - {truth}| over the bound {bound:e}"
            );
            assert!(bound <= 1e-9 * truth, "case {case} a={a} l={l:?}: bound {bound:e} for {truth:e}");
            checked += 1;
        }
    }
    assert!(checked >= 80, "checked {checked}");
}
