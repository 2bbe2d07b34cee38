//! The normalised portfolio the engine works on: exposures with p = 0 are dropped, exposures with p = 1 become
//! a shift of the support, groups become binomial parts and Poisson sources are summed.
//!
//! Losses in units. When exposures carry loss units (the individual risk model: exposure i adds u_i when its
//! event happens), the total S lives on the lattice `offset + span * j`, where `span` is the gcd of the units
//! of the random exposures and `offset` the certain exposures' units modulo the span. The model then holds
//! everything in lattice steps (units divided by the span), so the engine computes on the integer j = (S -
//! offset) / span, whose support starts at `shift`; `engine::exact::lattice::query` turns a question in units
//! into one in steps. With every unit 1 (the default), span 1 and offset 0: the lattice is the count itself.

/// `size` identical exposures with probability strictly inside (0, 1).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Binomial {
    pub size: u64,
    pub p: f64,
}

/// S = shift + sum of Bernoulli(p_i) + sum of Binomial(m_g, p_g) + Poisson(rate) + sum of s Poisson(rate_s)
/// (the compound Poisson sources, one scaled part per size), all independent.
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
    /// Lattice steps per event, parallel to `bernoulli` and to `binomials` (each member of a group), when any
    /// exposure's units differ from the span; both empty when every random exposure adds one step.
    pub units: Vec<u64>,
    pub group_units: Vec<u64>,
    /// Units per lattice step (the gcd of the random exposures' units); 0 stands for 1 (the default).
    pub span: u64,
    /// Units of the total below the first lattice point: S = offset + span * j.
    pub offset: u64,
    /// Compound Poisson sources (the collective risk model) as scaled Poisson parts: a source of rate lambda
    /// whose events have size s_j with probability q_j is the sum of independent Poisson(lambda q_j) counts of
    /// s_j units each (a thinning of one Poisson process by the event's size). Held as (steps, rate), merged by
    /// size, sorted by steps, every steps > 1 (a part of one step is added to `poisson`); empty without sources.
    pub scaled_poisson: Vec<(u64, f64)>,
}

/// Greatest common divisor (Euclid).
pub fn gcd(mut a: u64, mut b: u64) -> u64 {
    while b != 0 {
        (a, b) = (b, a % b);
    }
    a
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

    /// Largest value of S with positive probability (in lattice steps), or None when a Poisson part makes it
    /// unbounded.
    pub fn support_max(&self) -> Option<u64> {
        if self.poisson > 0.0 || !self.scaled_poisson.is_empty() {
            None
        } else if self.weighted() {
            Some(self.shift + self.lattice_width())
        } else {
            Some(self.shift + self.random_exposures_bounded())
        }
    }

    /// Whether any exposure adds more than one step, or the lattice is not the count itself.
    pub fn weighted(&self) -> bool {
        !self.units.is_empty()
            || !self.group_units.is_empty()
            || self.span > 1
            || self.offset > 0
            || !self.scaled_poisson.is_empty()
    }

    /// Units per lattice step (1 unless units were given).
    pub fn span(&self) -> u64 {
        self.span.max(1)
    }

    /// Lattice steps spanned by the random exposures of bounded support: sum of u_i plus m_g u_g.
    pub fn lattice_width(&self) -> u64 {
        let b: u64 = if self.units.is_empty() { self.bernoulli.len() as u64 } else { self.units.iter().sum() };
        let g: u64 = if self.group_units.is_empty() {
            self.binomials.iter().map(|b| b.size).sum()
        } else {
            self.binomials.iter().zip(&self.group_units).map(|(b, &u)| b.size * u).sum()
        };
        b + g
    }

    /// Largest number of steps one exposure adds (1 for a count).
    pub fn max_step(&self) -> u64 {
        let scaled = self.scaled_poisson.iter().map(|&(s, _)| s);
        self.units.iter().chain(&self.group_units).copied().chain(scaled).max().unwrap_or(1)
    }

    /// Add a compound source's events of `size` units (steps, once the lattice is set) at `rate`.
    pub fn push_scaled_poisson(&mut self, size: u64, rate: f64) {
        if rate > 0.0 {
            self.scaled_poisson.push((size, rate));
        }
    }

    /// The total rate of the compound sources' events (all sizes).
    pub fn scaled_rate(&self) -> f64 {
        self.scaled_poisson.iter().map(|&(_, r)| r).sum()
    }

    /// Merge the scaled parts by size (rates added), sorted by size; parts of one step join `poisson`.
    pub fn merge_scaled(&mut self) {
        let mut parts = std::mem::take(&mut self.scaled_poisson);
        parts.sort_by_key(|&(s, _)| s);
        for (s, r) in parts {
            match self.scaled_poisson.last_mut() {
                _ if s == 1 => self.poisson += r,
                Some(last) if last.0 == s => last.1 += r,
                _ => self.scaled_poisson.push((s, r)),
            }
        }
    }

    /// [`Model::push_bernoulli`] for an exposure of `u` units (steps, once the lattice is set).
    pub fn push_weighted(&mut self, p: f64, u: u64) {
        self.exposures += 1;
        if p >= 1.0 {
            self.shift += u;
        } else if p > 0.0 {
            self.bernoulli.push(p);
            self.units.push(u);
        }
    }

    /// [`Model::push_group`] for members of `u` units each.
    pub fn push_group_weighted(&mut self, size: u64, p: f64, u: u64) {
        self.exposures += size;
        if size == 0 || p <= 0.0 {
            return;
        }
        if p >= 1.0 {
            self.shift += size * u;
        } else if size == 1 {
            self.bernoulli.push(p);
            self.units.push(u);
        } else {
            self.binomials.push(Binomial { size, p });
            self.group_units.push(u);
        }
    }

    /// After pushing every exposure by [`Model::push_weighted`] and [`Model::push_group_weighted`] in units:
    /// divide by the span, split the certain units into lattice steps and offset, and drop the unit lists
    /// when every random exposure adds one step.
    pub fn set_lattice(&mut self) {
        let h = self.units.iter().chain(&self.group_units).fold(0, |g, &u| gcd(g, u));
        let h = self.scaled_poisson.iter().fold(h, |g, &(s, _)| gcd(g, s));
        // A Poisson part adds single units; with no random exposure at all any span will do.
        let h = if self.poisson > 0.0 { 1 } else { h.max(1) };
        self.units.iter_mut().chain(self.group_units.iter_mut()).for_each(|u| *u /= h);
        self.scaled_poisson.iter_mut().for_each(|(s, _)| *s /= h);
        self.merge_scaled();
        self.span = if h > 1 { h } else { 0 };
        self.offset = self.shift % h;
        self.shift /= h;
        if self.units.iter().all(|&u| u == 1) {
            self.units.clear();
        }
        if self.group_units.iter().all(|&u| u == 1) {
            self.group_units.clear();
        }
    }

    /// The value in units of a lattice index.
    pub fn units_of(&self, j: u64) -> u64 {
        self.offset + self.span() * j
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
        self.bernoulli.is_empty() && self.binomials.is_empty() && self.poisson <= 0.0 && self.scaled_poisson.is_empty()
    }
}
