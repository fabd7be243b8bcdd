//! Pearson correlation with missing values: each feature correlates its
//! observed samples with the trait values of those samples.
//!
//! Under a relabelling the trait is permuted over all samples and the
//! feature's mask stays with its samples, so with w the permuted
//! (standardized) trait and z the feature standardized over its n observed
//! values, r = A / sqrt((n - 1) (C - B^2 / n)) from the sums over the
//! observed samples A = sum z w, B = sum w and C = sum w^2: GEMMs of z and
//! of the 0/1 mask against the permuted trait, and of the mask against its
//! square. A relabelling that puts equal trait values on all observed
//! samples (C - B^2 / n = 0) scores 0.
//!
//! Complete-data scale (`stats::masked`): a complete feature's kernel
//! statistic is (N - 1) r; a masked one gets (N - 1) r_eq, the r of N
//! samples with the same t as r on n, r_eq^2 = t^2 / (N - 2 + t^2), i.e.
//! r_eq = r sqrt((n - 2) / ((N - 2) (1 - r^2) + (n - 2) r^2)).
//!
//! Spearman's trait ranks among a feature's observed samples change with
//! every relabelling, which no fixed weights express: `stats::masked_exact`.

use super::prepare::{PrepScratch, Prepared, Status, TestSpec};
use super::t_pvalue;

impl TestSpec {
    /// Why a trait-design row's observed values cannot be tested (Pearson
    /// and Spearman alike): fewer than `--min-observed` (at least 3), or
    /// all equal.
    pub(super) fn observed_trait_screen(&self, values: &[f64]) -> Option<Status> {
        if values.len() < self.min_observed.max(3) {
            Some(Status::TooFewObserved)
        } else if values.iter().all(|&v| v == values[0]) {
            Some(Status::Constant)
        } else {
            None
        }
    }

    /// A Pearson row with NaN: the correlation of the observed values.
    pub(super) fn prepare_masked_trait(
        &self,
        raw: &[f64],
        z: &mut [f64],
        scratch: &mut PrepScratch,
    ) -> Prepared {
        let mut values = std::mem::take(&mut scratch.observed_raw);
        let mut observed_z = std::mem::take(&mut scratch.observed_z);
        values.clear();
        values.extend(raw.iter().copied().filter(|v| !v.is_nan()));
        let n = values.len();
        let prepared = if let Some(status) = self.observed_trait_screen(&values) {
            Prepared::untested(status, f64::NAN)
        } else {
            observed_z.resize(n, 0.0);
            let abs_sum = super::prepare::standardize(&values, &mut observed_z);
            super::masked::scatter_observed(raw, &observed_z, z);
            match self.masked_trait_r(z, None) {
                None => Prepared::untested(Status::Constant, f64::NAN),
                Some(r) => {
                    let nf = n as f64;
                    let r = r.clamp(-1.0, 1.0);
                    let t = r * ((nf - 2.0) / (1.0 - r * r)).sqrt();
                    Prepared {
                        status: Status::Tested,
                        effect: r,
                        statistic: r,
                        p_param: t_pvalue(t, nf - 2.0, self.side),
                        kernel_obs: self.masked_trait_stat(z, None),
                        abs_sum,
                        observed: None,
                    }
                }
            }
        };
        scratch.observed_raw = values;
        scratch.observed_z = observed_z;
        Prepared {
            observed: Some(super::Sizes { n_a: n, n_b: 0 }),
            ..prepared
        }
    }

    /// r of the observed values of a row (NaN where missing) with the trait
    /// as unit i takes it from unit `sources[i]` (`None`: the observed
    /// order); `None` when the observed samples' trait values are equal.
    pub(super) fn masked_trait_r(&self, z: &[f64], sources: Option<&[u32]>) -> Option<f64> {
        let (mut a, mut b, mut c, mut n) = (0.0, 0.0, 0.0, 0usize);
        for (i, &v) in z.iter().enumerate() {
            if v.is_nan() {
                continue;
            }
            let w = self.trait_weights[sources.map_or(i, |s| s[i] as usize)];
            n += 1;
            a += v * w;
            b += w;
            c += w * w;
        }
        let spread = c - b * b / n as f64;
        // Equal trait values leave only rounding in the spread.
        if spread <= 1e-12 * c {
            return None;
        }
        Some(a / ((n as f64 - 1.0) * spread).sqrt())
    }

    /// Oriented kernel statistic of a trait row with NaN where missing.
    pub(super) fn masked_trait_stat(&self, z: &[f64], sources: Option<&[u32]>) -> f64 {
        let n = z.iter().filter(|v| !v.is_nan()).count();
        match self.masked_trait_r(z, sources) {
            Some(r) => self.side.orient(self.trait_equivalent(r, n)),
            None => 0.0,
        }
    }

    /// (N - 1) r_eq: a complete feature's kernel statistic with the same t
    /// as `r` on `n` observed samples (module docs).
    pub fn trait_equivalent(&self, r: f64, n: usize) -> f64 {
        let big_n = self.trait_weights.len() as f64;
        let (n, r2) = (n as f64, (r * r).min(1.0));
        let denominator = (big_n - 2.0) * (1.0 - r2) + (n - 2.0) * r2;
        (big_n - 1.0) * r * ((n - 2.0) / denominator).sqrt()
    }
}
