//! Spearman and covariate designs with missing values: each feature is
//! tested on its observed samples, and its relabelled statistics are
//! computed one by one in f64 (`ExactRow`), because no fixed GEMM weights
//! give them.
//!
//! Spearman (the same null as masked Pearson, `stats::masked_trait`): the
//! trait moves over all samples with the shared relabelling and the
//! feature's mask stays with its samples. Per relabelling, the trait values
//! that land on the observed samples are ranked among themselves (mid-ranks
//! for ties) and rho is the correlation of those ranks with the feature's
//! own mid-ranks among its observed values. A relabelling that puts equal
//! trait values on all observed samples scores 0. Kernel statistic:
//! (N - 1) rho_eq, the complete-data scale of masked Pearson (the rho of N
//! samples with the same t as rho on n).
//!
//! Covariates (Freedman–Lane on the observed units O): the model is refitted
//! on O (`LinearModel::restricted`), the feature's residuals e under the
//! covariates on O are permuted, and the statistic is the t (F for k
//! groups) of the effect in the regression of the permuted residuals on the
//! refitted model. The permutation of O is the relabelling restricted to O
//! by first return: unit i of O takes the residual of the first unit of O on
//! the path src(i), src(src(i)), ... Deleting one element from its cycle
//! maps the n! permutations of n units onto the (n - 1)! of the rest, n to
//! one, so the restriction of a uniform permutation is uniform on O, every
//! restricted permutation comes up equally often under exhaustive listing
//! (p stays exact), and cycles never leave a stratum (strata are kept).
//! Kernel statistic: the t (or F) itself, as for Welch and k-group F: a t on
//! fewer observed values counts as much as the same t on all.

use super::prepare::{model_f, model_t, standardize, PrepScratch, Prepared, Status, TestSpec};
use super::{f_pvalue, mid_ranks, t_pvalue, DesignKind, Sizes, TestKind};
use crate::design::model::{LinearModel, Unfit};

const MISSING: usize = usize::MAX;

/// A standardized row with missing values, ready for its relabelled
/// statistics (built once per row and tile; deterministic, so the value of
/// a relabelling does not depend on which copy computed it).
pub struct ExactRow {
    /// Observed units, ascending.
    observed: Vec<usize>,
    /// Index of each unit among `observed` (`MISSING` where missing).
    position: Vec<usize>,
    kind: Kind,
    buffer: Vec<f64>,
    sums: Vec<f64>,
}

enum Kind {
    Spearman {
        /// The feature's standardized mid-ranks, observed units only.
        z: Vec<f64>,
        /// Per unit, its run of equal trait values (runs in ascending
        /// order of the value).
        run_of: Vec<u32>,
        /// Per run: landed units, then (after the prefix pass) the mid-rank
        /// of the run among them.
        counts: Vec<f64>,
    },
    Model {
        /// Residuals under the covariates on the observed units, sum of
        /// squares m - 1.
        e: Vec<f64>,
        model: LinearModel,
    },
    /// Not refittable (never for a row `prepare` tested).
    Degenerate,
}

impl TestSpec {
    /// Designs whose rows with missing values take the per-row f64 path.
    pub fn exact_masked(&self) -> bool {
        self.model.is_some() || self.test == TestKind::Spearman
    }

    /// Prepares `z` (standardized, NaN where missing) for relabelled
    /// statistics.
    pub fn exact_row(&self, z: &[f64]) -> ExactRow {
        let n = z.len();
        let observed: Vec<usize> = (0..n).filter(|&i| !z[i].is_nan()).collect();
        let mut position = vec![MISSING; n];
        for (k, &i) in observed.iter().enumerate() {
            position[i] = k;
        }
        let values: Vec<f64> = observed.iter().map(|&i| z[i]).collect();
        let m = observed.len();
        let kind = match &self.model {
            Some(model) => match model.restricted(&observed) {
                Err(_) => Kind::Degenerate,
                Ok(model) => {
                    let mut e = vec![0.0; m];
                    model.residualize(&values, &mut e);
                    let ss: f64 = e.iter().map(|v| v * v).sum();
                    if m < 2 || ss <= 1e-24 * (m as f64 - 1.0) {
                        Kind::Degenerate
                    } else {
                        let scale = (ss / (m as f64 - 1.0)).sqrt();
                        e.iter_mut().for_each(|v| *v /= scale);
                        Kind::Model { e, model }
                    }
                }
            },
            None => {
                let w = &self.trait_weights;
                let mut order: Vec<usize> = (0..w.len()).collect();
                order.sort_by(|&a, &b| w[a].total_cmp(&w[b]).then(a.cmp(&b)));
                let mut run_of = vec![0u32; w.len()];
                let mut run = 0u32;
                for k in 0..order.len() {
                    if k > 0 && w[order[k]] != w[order[k - 1]] {
                        run += 1;
                    }
                    run_of[order[k]] = run;
                }
                Kind::Spearman {
                    z: values,
                    run_of,
                    counts: vec![0.0; run as usize + 1],
                }
            }
        };
        ExactRow {
            observed,
            position,
            kind,
            buffer: vec![0.0; m],
            sums: Vec::new(),
        }
    }
}

impl ExactRow {
    /// Observed units.
    pub fn observed(&self) -> usize {
        self.observed.len()
    }

    /// The reported statistic (rho, the model's t or F) when unit i takes
    /// the trait value (residual) of unit `sources[i]` (`None`: the observed
    /// order); `None` when the relabelling leaves nothing to test.
    pub fn statistic(&mut self, spec: &TestSpec, sources: Option<&[u32]>) -> Option<f64> {
        let m = self.observed.len();
        let source = |i: usize| sources.map_or(i, |s| s[i] as usize);
        match &mut self.kind {
            Kind::Degenerate => None,
            Kind::Spearman { z, run_of, counts } => {
                // Mid-ranks among the trait values landing on observed
                // samples: count them per run of equal values, then each
                // run's mid-rank is the count below it plus (count + 1) / 2.
                counts.fill(0.0);
                for &i in &self.observed {
                    counts[run_of[source(i)] as usize] += 1.0;
                }
                let mut placed = 0.0;
                for c in counts.iter_mut() {
                    let count = *c;
                    *c = placed + (count + 1.0) / 2.0;
                    placed += count;
                }
                let mean = (m as f64 + 1.0) / 2.0;
                let (mut cross, mut ss) = (0.0, 0.0);
                for (k, &i) in self.observed.iter().enumerate() {
                    let r = counts[run_of[source(i)] as usize] - mean;
                    cross += z[k] * r;
                    ss += r * r;
                }
                // Mid-ranks are exact halves: equal trait values give 0.
                if ss <= 0.0 {
                    return None;
                }
                Some((cross / ((m as f64 - 1.0) * ss).sqrt()).clamp(-1.0, 1.0))
            }
            Kind::Model { e, model } => {
                for (k, &i) in self.observed.iter().enumerate() {
                    // First return to an observed unit along the cycle of i
                    // (bounded: a permutation's cycle comes back to i).
                    let mut j = source(i);
                    let mut steps = 0;
                    while self.position[j] == MISSING && steps < self.position.len() {
                        j = source(j);
                        steps += 1;
                    }
                    let p = self.position[j];
                    self.buffer[k] = if p == MISSING { e[k] } else { e[p] };
                }
                self.sums.clear();
                for column in model.columns() {
                    let dot: f64 = column.iter().zip(&self.buffer).map(|(a, b)| a * b).sum();
                    self.sums.push(dot);
                }
                Some(if spec.model_f() {
                    model_f(&self.sums, model.effect_columns(), m, model.df)
                } else {
                    model_t(&self.sums, m, model.df)
                })
            }
        }
    }

    /// The kernel statistic on the complete-data scale (module docs).
    pub fn kernel_stat(&mut self, spec: &TestSpec, sources: Option<&[u32]>) -> f64 {
        let m = self.observed.len();
        match self.statistic(spec, sources) {
            None => 0.0,
            Some(s) if spec.model_f() => s,
            Some(s) if spec.model.is_some() => spec.side.orient(s),
            Some(rho) => spec.side.orient(spec.trait_equivalent(rho, m)),
        }
    }

    /// Residual df of the refitted model (covariate designs).
    fn model(&self) -> Option<&LinearModel> {
        match &self.kind {
            Kind::Model { model, .. } => Some(model),
            _ => None,
        }
    }
}

impl TestSpec {
    /// A Spearman row with NaN: rho of the observed values with their trait
    /// values (as `scipy.stats.spearmanr` on those samples).
    pub(super) fn prepare_masked_spearman(
        &self,
        raw: &[f64],
        z: &mut [f64],
        scratch: &mut PrepScratch,
    ) -> Prepared {
        let values: Vec<f64> = raw.iter().copied().filter(|v| !v.is_nan()).collect();
        let n = values.len();
        let prepared = if let Some(status) = self.observed_trait_screen(&values) {
            Prepared::untested(status, f64::NAN)
        } else {
            let mut order = Vec::new();
            let mut ranks = vec![0.0; n];
            mid_ranks(&values, &mut order, &mut ranks);
            scratch.observed_z.resize(n, 0.0);
            let abs_sum = standardize(&ranks, &mut scratch.observed_z);
            super::masked::scatter_observed(raw, &scratch.observed_z, z);
            let mut row = self.exact_row(z);
            match row.statistic(self, None) {
                None => Prepared::untested(Status::Constant, f64::NAN),
                Some(rho) => {
                    let nf = n as f64;
                    let t = rho * ((nf - 2.0) / (1.0 - rho * rho)).sqrt();
                    Prepared {
                        status: Status::Tested,
                        effect: rho,
                        statistic: rho,
                        p_param: t_pvalue(t, nf - 2.0, self.side),
                        kernel_obs: row.kernel_stat(self, None),
                        abs_sum,
                        observed: None,
                    }
                }
            }
        };
        Prepared {
            observed: Some(Sizes { n_a: n, n_b: 0 }),
            ..prepared
        }
    }

    /// A row with NaN in a covariate design: the model refitted on the
    /// observed units (as an OLS fit of those rows), its t of the effect (F
    /// for k groups) with the refitted residual df.
    pub(super) fn prepare_masked_model(
        &self,
        model: &LinearModel,
        raw: &[f64],
        z: &mut [f64],
        scratch: &mut PrepScratch,
    ) -> Prepared {
        let observed: Vec<usize> = (0..raw.len()).filter(|&i| !raw[i].is_nan()).collect();
        let values: Vec<f64> = observed.iter().map(|&i| raw[i]).collect();
        let m = observed.len();
        // Observed units per level of a group effect (level 0: no indicator).
        let groups = self.test.design() == DesignKind::Groups;
        let mut levels = vec![0usize; model.raw_effects.len() + 1];
        if groups {
            for &i in &observed {
                let level = model.raw_effects.iter().position(|x| x[i] != 0.0);
                levels[level.map_or(0, |l| l + 1)] += 1;
            }
        }
        let sizes = if groups && levels.len() == 2 {
            Sizes {
                n_a: levels[0],
                n_b: levels[1],
            }
        } else {
            Sizes { n_a: m, n_b: 0 }
        };
        let untested = |status| Prepared {
            observed: Some(sizes),
            ..Prepared::untested(status, f64::NAN)
        };
        let min = self.min_observed.max(2);
        if (groups && levels.iter().any(|&c| c < min)) || m < self.min_observed.max(3) {
            return untested(Status::TooFewObserved);
        }
        if values.iter().all(|&v| v == values[0]) {
            return untested(Status::Constant);
        }
        let refitted = match model.restricted(&observed) {
            Err(Unfit::Confounded) => return untested(Status::Confounded),
            Err(Unfit::TooFewUnits) => return untested(Status::TooFewObserved),
            Ok(r) => r,
        };
        scratch.observed_z.resize(m, 0.0);
        let abs_sum = standardize(&values, &mut scratch.observed_z);
        super::masked::scatter_observed(raw, &scratch.observed_z, z);
        let mut row = self.exact_row(z);
        let statistic = match row.statistic(self, None) {
            Some(s) if s.is_finite() => s,
            _ => return untested(Status::NoWithinVariance),
        };
        let df = row.model().map_or(refitted.df, |r| r.df);
        let (effect, p_param) = if self.model_f() {
            let effects = refitted.effect_columns();
            // Partial eta squared, as for complete rows.
            let share = row.sums[..effects].iter().map(|s| s * s).sum::<f64>() / (m as f64 - 1.0);
            (share, f_pvalue(statistic, effects as f64, df))
        } else {
            let coefficient = refitted
                .effect_direction
                .iter()
                .zip(&values)
                .map(|(a, y)| a * y)
                .sum::<f64>()
                / refitted.effect_norm;
            (coefficient, t_pvalue(statistic, df, self.side))
        };
        Prepared {
            status: Status::Tested,
            effect,
            statistic,
            p_param,
            kernel_obs: row.kernel_stat(self, None),
            abs_sum,
            observed: Some(sizes),
        }
    }

    /// Residual df of a covariate model refitted on the observed units of
    /// `raw` (the model's own df when nothing is missing).
    pub fn observed_model_df(&self, raw: &[f64]) -> Option<f64> {
        let model = self.model.as_ref()?;
        let observed: Vec<usize> = (0..raw.len()).filter(|&i| !raw[i].is_nan()).collect();
        if observed.len() == raw.len() {
            return Some(model.df);
        }
        model.restricted(&observed).ok().map(|r| r.df)
    }
}
