//! Adjusted values per distinct p-value.
//!
//! Both the in-memory path and the external-sort path feed the same blocks
//! `(p, count)` of tied p-values through these kernels, in the same order and
//! with the same constants, so the two paths give bit-identical results.
//! Working per tie block (rather than per sorted position) is exact: inside a
//! block of tied p-values at ranks `first..=last`, a step-up minimum over
//! `j >= i` always reaches `j = last`, and a step-down maximum over `j <= i`
//! always reaches `j = first`, so every tied p-value gets the same value.

use super::Method;

/// Quantities shared by all p-values of one adjustment.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Constants {
    /// Number of non-missing p-values.
    pub m: u64,
    /// Benjamini–Yekutieli c(m) = sum_{i=1..m} 1/i.
    pub by_harmonic: f64,
    /// Storey's estimate of the proportion of true nulls.
    pub pi0: f64,
}

impl Constants {
    pub fn new(m: u64, pi0: f64) -> Self {
        Constants {
            m,
            by_harmonic: harmonic_number(m),
            pi0,
        }
    }
}

/// Sum of 1/i for i = 1..=m, added smallest terms first so that rounding
/// stays near one ulp however large m is.
pub(crate) fn harmonic_number(m: u64) -> f64 {
    let mut sum = 0.0f64;
    let mut i = m;
    while i >= 1 {
        sum += 1.0 / i as f64;
        i -= 1;
    }
    sum
}

/// Methods whose adjusted value is a minimum over larger p-values, so they
/// are computed walking the distinct p-values from the largest down.
pub(crate) fn is_step_up(method: Method) -> bool {
    matches!(
        method,
        Method::Bh | Method::By | Method::Storey | Method::Hochberg
    )
}

/// Step-up methods (BH, BY, Storey, Hochberg): fed the tie blocks in
/// descending order of p.
pub(crate) struct StepUp {
    constants: Constants,
    methods: Vec<Method>,
    /// Number of p-values strictly larger than the next block.
    above: u64,
    running_min: Vec<f64>,
}

impl StepUp {
    /// `methods` must all be step-up methods; output follows their order.
    pub fn new(constants: Constants, methods: &[Method]) -> Self {
        debug_assert!(methods.iter().all(|&m| is_step_up(m)));
        StepUp {
            constants,
            methods: methods.to_vec(),
            above: 0,
            running_min: vec![f64::INFINITY; methods.len()],
        }
    }

    /// Adjusted values of the block of `count` p-values equal to `p`,
    /// written to `out` (one per method).
    pub fn push(&mut self, p: f64, count: u64, out: &mut [f64]) {
        let m = self.constants.m;
        let m_f = m as f64;
        // Rank (1-based) of the last p-value of the block in ascending order.
        let last_rank = m - self.above;
        let last_rank_f = last_rank as f64;
        for (k, &method) in self.methods.iter().enumerate() {
            let raw = match method {
                Method::Bh => p * m_f / last_rank_f,
                Method::By => p * m_f * self.constants.by_harmonic / last_rank_f,
                Method::Storey => self.constants.pi0 * p * m_f / last_rank_f,
                Method::Hochberg => (m - last_rank + 1) as f64 * p,
                Method::Holm | Method::Bonferroni => unreachable!("not a step-up method"),
            };
            let capped = raw.min(1.0);
            if capped < self.running_min[k] {
                self.running_min[k] = capped;
            }
            out[k] = if method == Method::Storey && self.constants.pi0 == 0.0 {
                // No p-value above lambda: the estimate carries no
                // information, and q = 0 everywhere would be misleading.
                f64::NAN
            } else {
                self.running_min[k]
            };
        }
        self.above += count;
    }
}

/// Holm's step-down method: fed the tie blocks in ascending order of p.
pub(crate) struct Holm {
    m: u64,
    /// Number of p-values strictly smaller than the next block.
    below: u64,
    running_max: f64,
}

impl Holm {
    pub fn new(constants: Constants) -> Self {
        Holm {
            m: constants.m,
            below: 0,
            running_max: 0.0,
        }
    }

    pub fn push(&mut self, p: f64, count: u64) -> f64 {
        // (m - first_rank + 1) with first_rank = below + 1.
        let raw = ((self.m - self.below) as f64 * p).min(1.0);
        if raw > self.running_max {
            self.running_max = raw;
        }
        self.below += count;
        self.running_max
    }
}

pub(crate) fn bonferroni(constants: Constants, p: f64) -> f64 {
    (constants.m as f64 * p).min(1.0)
}

/// Computes the full row of adjusted values for one tie block, given the
/// step-up values of that block (in `step_up_methods` order).
pub(crate) struct RowAssembler {
    constants: Constants,
    methods: Vec<Method>,
    holm: Holm,
    /// For each requested method, its position among the step-up methods.
    step_up_slot: Vec<Option<usize>>,
}

impl RowAssembler {
    pub fn new(constants: Constants, methods: &[Method]) -> Self {
        let mut next = 0;
        let step_up_slot = methods
            .iter()
            .map(|&m| {
                is_step_up(m).then(|| {
                    next += 1;
                    next - 1
                })
            })
            .collect();
        RowAssembler {
            constants,
            methods: methods.to_vec(),
            holm: Holm::new(constants),
            step_up_slot,
        }
    }

    /// Must be called for every tie block in ascending order of p.
    pub fn push(&mut self, p: f64, count: u64, step_up_values: &[f64], row: &mut [f64]) {
        let holm = self.holm.push(p, count);
        for (k, &method) in self.methods.iter().enumerate() {
            row[k] = match (method, self.step_up_slot[k]) {
                (_, Some(slot)) => step_up_values[slot],
                (Method::Holm, None) => holm,
                (Method::Bonferroni, None) => bonferroni(self.constants, p),
                (_, None) => unreachable!("step-up method without a slot"),
            };
        }
    }
}

/// The requested methods that are step-up methods, in request order.
pub(crate) fn step_up_methods(methods: &[Method]) -> Vec<Method> {
    methods.iter().copied().filter(|&m| is_step_up(m)).collect()
}
