//! The normalised portfolio the engine works on: exposures with p = 0 are dropped, exposures with p = 1 become
//! a shift of the support, groups become binomial parts and Poisson sources are summed.

/// `size` identical exposures with probability strictly inside (0, 1).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Binomial {
    pub size: u64,
    pub p: f64,
}

/// S = shift + sum of Bernoulli(p_i) + sum of Binomial(m_g, p_g) + Poisson(rate), all independent.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Model {
    /// Number of exposures that are certain events (p = 1): the support starts here.
    pub shift: u64,
    /// Bernoulli probabilities, each strictly inside (0, 1).
    pub bernoulli: Vec<f64>,
    /// Binomial parts, each with size >= 1 and p strictly inside (0, 1).
    pub binomials: Vec<Binomial>,
    /// Total Poisson rate (0 when there is no Poisson part).
    pub poisson: f64,
    /// Exposures as the client counted them, including p = 0 and p = 1 ones.
    pub exposures: u64,
    /// Factor loadings (the one-factor model's rho_i) parallel to `bernoulli` and to `binomials`, when the
    /// client gave any under a dependence model; both empty when every exposure takes the model's one rho.
    pub loadings: Vec<f64>,
    pub group_loadings: Vec<f64>,
}

impl Model {
    /// Build from plain parts, normalising p = 0 and p = 1. Inputs are assumed validated.
    /// [`Model::from_parts`] with a factor loading for every listed exposure and every group (size, p, loading).
    pub fn from_parts_loaded(
        probabilities: &[f64],
        loadings: &[f64],
        groups: &[(u64, f64, f64)],
        poisson: f64,
    ) -> Model {
        assert_eq!(probabilities.len(), loadings.len(), "one loading per probability");
        let mut m = Model { poisson, ..Model::default() };
        for (&p, &r) in probabilities.iter().zip(loadings) {
            m.push_loaded(p, r);
        }
        for &(size, p, r) in groups {
            m.push_group_loaded(size, p, r);
        }
        m
    }

    pub fn from_parts(probabilities: &[f64], groups: &[(u64, f64)], poisson: f64) -> Model {
        let mut m = Model { poisson, ..Model::default() };
        for &p in probabilities {
            m.push_bernoulli(p);
        }
        for &(size, p) in groups {
            m.push_group(size, p);
        }
        m
    }

    pub fn push_bernoulli(&mut self, p: f64) {
        self.exposures += 1;
        if p >= 1.0 {
            self.shift += 1;
        } else if p > 0.0 {
            self.bernoulli.push(p);
        }
    }

    /// [`Model::push_bernoulli`] with the exposure's factor loading (kept only if the exposure is random).
    pub fn push_loaded(&mut self, p: f64, loading: f64) {
        let n = self.bernoulli.len();
        self.push_bernoulli(p);
        if self.bernoulli.len() > n {
            self.loadings.push(loading);
        }
    }

    /// [`Model::push_group`] with the group's factor loading.
    pub fn push_group_loaded(&mut self, size: u64, p: f64, loading: f64) {
        let (n, g) = (self.bernoulli.len(), self.binomials.len());
        self.push_group(size, p);
        if self.bernoulli.len() > n {
            self.loadings.push(loading);
        }
        if self.binomials.len() > g {
            self.group_loadings.push(loading);
        }
    }

    /// Whether the model carries its own factor loadings (then parallel to `bernoulli` and `binomials`).
    pub fn loaded(&self) -> bool {
        !self.loadings.is_empty() || !self.group_loadings.is_empty()
    }

    pub fn push_group(&mut self, size: u64, p: f64) {
        self.exposures += size;
        if size == 0 || p <= 0.0 {
            return;
        }
        if p >= 1.0 {
            self.shift += size;
        } else if size == 1 {
            self.bernoulli.push(p);
        } else {
            self.binomials.push(Binomial { size, p });
        }
    }

    /// Largest value of S with positive probability, or None when a Poisson part makes it unbounded.
    pub fn support_max(&self) -> Option<u64> {
        if self.poisson > 0.0 {
            None
        } else {
            Some(self.shift + self.random_exposures_bounded())
        }
    }

    pub fn support_min(&self) -> u64 {
        self.shift
    }

    /// Number of non-degenerate finite exposures (Bernoulli plus binomial sizes).
    pub fn random_exposures_bounded(&self) -> u64 {
        self.bernoulli.len() as u64 + self.binomials.iter().map(|b| b.size).sum::<u64>()
    }

    /// True when S is a constant (all exposures certain or impossible).
    pub fn is_degenerate(&self) -> bool {
        self.bernoulli.is_empty() && self.binomials.is_empty() && self.poisson <= 0.0
    }
}
