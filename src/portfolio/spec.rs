//! Wire form of a portfolio, shared by every endpoint: independent parts, any of which may be absent.

use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

/// A portfolio of exposures, independent unless a dependence model is named. The count S is the sum of all parts.
#[derive(Debug, Clone, Default, Deserialize, Serialize, ToSchema)]
#[serde(remote = "Self", deny_unknown_fields)]
pub struct PortfolioSpec {
    /// Per-exposure event probabilities in [0, 1] (one Bernoulli exposure each).
    #[serde(default)]
    #[schema(example = json!([0.01, 0.02, 0.15]))]
    pub probabilities: Vec<f64>,
    /// Factor loadings in [0, 1), one per entry of `probabilities` (used only under a `dependence` model; each
    /// exposure's rho_i in p_i(z) = Phi((Phi^-1(p_i) - sqrt(rho_i) z) / sqrt(1 - rho_i))). Absent: every listed
    /// exposure takes the dependence model's `rho`.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    #[schema(example = json!([0.12, 0.2, 0.05]))]
    pub loadings: Vec<f64>,
    /// Optional identifiers of the listed exposures, parallel to `probabilities` (one each, null for none).
    /// They change no figure: /v1/contributions returns them beside `index`, and problems name them.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    #[schema(example = json!(["L-1", "L-2", 17]))]
    pub ids: Vec<Option<ExposureId>>,
    /// Loss units per listed exposure, parallel to `probabilities`: exposure i adds `units[i]` (a whole number
    /// in 1..=1e9) to the total S when its event happens (the individual risk model). Absent: 1 each, and S is
    /// the count of events.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    #[schema(example = json!([250, 40, 1000]))]
    pub units: Vec<u64>,
    /// Blocks of identical exposures (a binomial part each).
    #[serde(default)]
    pub groups: Vec<GroupSpec>,
    /// Poisson sources (rates >= 0); they are summed into one Poisson part.
    #[serde(default)]
    pub poisson_rates: Vec<f64>,
    /// Generated probability sequences, appended to `probabilities` in order.
    #[serde(default)]
    pub families: Vec<FamilySpec>,
    /// Compound Poisson sources (the collective risk model): each a rate of events per period and the law of
    /// an event's size in whole loss units. A source adds the sum of its events' sizes to S. Their sizes enter
    /// the lattice like exposures' units.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub compound_sources: Vec<CompoundSourceSpec>,
}
crate::portfolio::objects::objects_only!(PortfolioSpec);

/// A compound Poisson source: a Poisson(`rate`) number of events over the period, each of an independent size
/// drawn from `severity`.
#[derive(Debug, Clone, Deserialize, Serialize, ToSchema)]
#[serde(remote = "Self", deny_unknown_fields)]
pub struct CompoundSourceSpec {
    /// Expected number of events per period (the same period as the probabilities), finite and >= 0.
    #[schema(example = 2.5, minimum = 0.0)]
    pub rate: f64,
    pub severity: SeveritySpec,
}
crate::portfolio::objects::objects_only!(CompoundSourceSpec);

/// Tolerance on the sum of a listed severity's probabilities: it must be within this of 1, and is then divided
/// by its sum so that the law is a proper one.
pub const SEVERITY_SUM_TOLERANCE: f64 = 1e-9;

/// The law of one event's size, in whole loss units (each size in 1..=1e9).
#[derive(Debug, Clone, Deserialize, Serialize, ToSchema)]
#[serde(tag = "kind", rename_all = "snake_case", deny_unknown_fields)]
pub enum SeveritySpec {
    /// Sizes with their probabilities (parallel lists; the probabilities sum to 1 within 1e-9, and are
    /// divided by their sum).
    Listed {
        #[schema(example = json!([1, 5, 20]))]
        sizes: Vec<u64>,
        #[schema(example = json!([0.6, 0.3, 0.1]))]
        probabilities: Vec<f64>,
    },
    /// Sizes first, first + step, ... up to `largest`, with probabilities in the ratio `ratio` from one size
    /// to the next (a geometric law truncated at `largest`; the truncated mass is spread back by
    /// renormalising over the sizes kept).
    Geometric {
        #[schema(example = 1, minimum = 1, maximum = 1000000000)]
        first: u64,
        #[schema(example = 1, minimum = 1, maximum = 1000000000)]
        step: u64,
        #[schema(example = 50, minimum = 1, maximum = 1000000000)]
        largest: u64,
        #[schema(example = 0.8, minimum = 0.0, maximum = 1.0)]
        ratio: f64,
    },
}

impl SeveritySpec {
    /// Number of sizes the law lists or generates (computed without generating them).
    pub fn len(&self) -> u64 {
        match *self {
            SeveritySpec::Listed { ref sizes, .. } => sizes.len() as u64,
            SeveritySpec::Geometric { first, step, largest, .. } => {
                if step == 0 || largest < first {
                    0
                } else {
                    (largest - first) / step + 1
                }
            }
        }
    }

    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Call `sink(size, probability)` for each size of a validated law, the probabilities summing to 1 (up to
    /// rounding).
    pub fn expand(&self, mut sink: impl FnMut(u64, f64)) {
        match *self {
            SeveritySpec::Listed { ref sizes, ref probabilities } => {
                let total: f64 = probabilities.iter().sum();
                for (&s, &q) in sizes.iter().zip(probabilities) {
                    sink(s, q / total);
                }
            }
            SeveritySpec::Geometric { first, step, ratio, .. } => {
                let n = self.len();
                // sum_(k < n) ratio^k = (1 - ratio^n) / (1 - ratio), in forms that keep ratio near 0 and 1 accurate.
                let ln_r = ratio.ln();
                let total = if ratio == 1.0 {
                    n as f64
                } else if ratio == 0.0 {
                    1.0
                } else {
                    -(n as f64 * ln_r).exp_m1() / -ln_r.exp_m1()
                };
                for k in 0..n {
                    let w = if k == 0 {
                        1.0
                    } else if ratio == 0.0 {
                        0.0
                    } else {
                        (k as f64 * ln_r).exp()
                    };
                    sink(first + k * step, w / total);
                }
            }
        }
    }
}

/// `size` identical exposures, each with event probability `probability`.
#[derive(Debug, Clone, Deserialize, Serialize, ToSchema)]
#[serde(remote = "Self", deny_unknown_fields)]
pub struct GroupSpec {
    #[schema(example = 250000, maximum = 1_000_000_000)]
    pub size: u64,
    #[schema(example = 0.004, minimum = 0.0, maximum = 1.0)]
    pub probability: f64,
    /// The group's factor loading in [0, 1) under a dependence model (default: the model's `rho`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    #[schema(minimum = 0.0, exclusive_maximum = 1.0)]
    pub loading: Option<f64>,
    /// Loss units each member adds when its event happens, a whole number in 1..=1e9 (default 1).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    #[schema(example = 20, minimum = 1, maximum = 1000000000)]
    pub units: Option<u64>,
}
crate::portfolio::objects::objects_only!(GroupSpec);

/// A generated sequence of probabilities p_1..p_n. Every kind takes an optional `loading` in [0, 1): the
/// factor loading of all its members under a dependence model (default: the model's `rho`), and optional
/// `units` in 1..=1e9: the loss units each member adds when its event happens (default 1).
#[derive(Debug, Clone, Deserialize, Serialize, ToSchema)]
#[serde(tag = "kind", rename_all = "snake_case", deny_unknown_fields)]
pub enum FamilySpec {
    /// n exposures with the same probability.
    Constant {
        #[schema(maximum = 10_000_000)]
        n: u64,
        #[schema(minimum = 0.0, maximum = 1.0)]
        probability: f64,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        #[schema(minimum = 0.0, exclusive_maximum = 1.0)]
        loading: Option<f64>,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        #[schema(minimum = 1, maximum = 1000000000)]
        units: Option<u64>,
    },
    /// p_k = 1/k for k = 1..n (the number of cycles of a uniform random permutation of n items).
    Harmonic {
        #[schema(maximum = 10_000_000)]
        n: u64,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        #[schema(minimum = 0.0, exclusive_maximum = 1.0)]
        loading: Option<f64>,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        #[schema(minimum = 1, maximum = 1000000000)]
        units: Option<u64>,
    },
    /// p_k = theta / (theta + k - 1) for k = 1..n, theta > 0.
    Ewens {
        #[schema(maximum = 10_000_000)]
        n: u64,
        #[schema(exclusive_minimum = 0.0)]
        theta: f64,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        #[schema(minimum = 0.0, exclusive_maximum = 1.0)]
        loading: Option<f64>,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        #[schema(minimum = 1, maximum = 1000000000)]
        units: Option<u64>,
    },
    /// p_k = first * ratio^(k-1) for k = 1..n.
    Geometric {
        #[schema(maximum = 10_000_000)]
        n: u64,
        #[schema(minimum = 0.0, maximum = 1.0)]
        first: f64,
        #[schema(minimum = 0.0, maximum = 1.0)]
        ratio: f64,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        #[schema(minimum = 0.0, exclusive_maximum = 1.0)]
        loading: Option<f64>,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        #[schema(minimum = 1, maximum = 1000000000)]
        units: Option<u64>,
    },
    /// n probabilities evenly spaced from `first` to `last` (inclusive).
    Linear {
        #[schema(maximum = 10_000_000)]
        n: u64,
        #[schema(minimum = 0.0, maximum = 1.0)]
        first: f64,
        #[schema(minimum = 0.0, maximum = 1.0)]
        last: f64,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        #[schema(minimum = 0.0, exclusive_maximum = 1.0)]
        loading: Option<f64>,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        #[schema(minimum = 1, maximum = 1000000000)]
        units: Option<u64>,
    },
    /// p = 1 / (1 + exp(-(intercept + slope * score))) for each score.
    Logistic {
        scores: Vec<f64>,
        intercept: f64,
        slope: f64,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        #[schema(minimum = 0.0, exclusive_maximum = 1.0)]
        loading: Option<f64>,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        #[schema(minimum = 1, maximum = 1000000000)]
        units: Option<u64>,
    },
}

impl FamilySpec {
    /// The members' factor loading, if the family names one.
    pub fn loading(&self) -> Option<f64> {
        match *self {
            FamilySpec::Constant { loading, .. }
            | FamilySpec::Harmonic { loading, .. }
            | FamilySpec::Ewens { loading, .. }
            | FamilySpec::Geometric { loading, .. }
            | FamilySpec::Linear { loading, .. }
            | FamilySpec::Logistic { loading, .. } => loading,
        }
    }

    /// The members' loss units, if the family names them.
    pub fn units(&self) -> Option<u64> {
        match *self {
            FamilySpec::Constant { units, .. }
            | FamilySpec::Harmonic { units, .. }
            | FamilySpec::Ewens { units, .. }
            | FamilySpec::Geometric { units, .. }
            | FamilySpec::Linear { units, .. }
            | FamilySpec::Logistic { units, .. } => units,
        }
    }
}

/// An exposure's identifier as the client gave it: an integer or a string (a CSV table's ids are strings).
#[derive(Debug, Clone, PartialEq, Eq, Serialize, ToSchema)]
#[serde(untagged)]
pub enum ExposureId {
    Integer(i64),
    Text(String),
}

impl std::fmt::Display for ExposureId {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            ExposureId::Integer(i) => write!(f, "{i}"),
            ExposureId::Text(s) => write!(f, "{s:?}"),
        }
    }
}

/// By hand rather than `untagged`, which buffers every value and answers with a vague message.
impl<'de> Deserialize<'de> for ExposureId {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V;
        impl serde::de::Visitor<'_> for V {
            type Value = ExposureId;
            fn expecting(&self, f: &mut std::fmt::Formatter) -> std::fmt::Result {
                f.write_str("an id: a string, or an integer within 64 bits")
            }
            fn visit_i64<E: serde::de::Error>(self, v: i64) -> Result<ExposureId, E> {
                Ok(ExposureId::Integer(v))
            }
            fn visit_u64<E: serde::de::Error>(self, v: u64) -> Result<ExposureId, E> {
                i64::try_from(v).map(ExposureId::Integer).map_err(|_| E::custom("an integer id must fit in 64 bits"))
            }
            fn visit_str<E: serde::de::Error>(self, v: &str) -> Result<ExposureId, E> {
                Ok(ExposureId::Text(v.to_string()))
            }
            fn visit_string<E: serde::de::Error>(self, v: String) -> Result<ExposureId, E> {
                Ok(ExposureId::Text(v))
            }
        }
        d.deserialize_any(V)
    }
}
