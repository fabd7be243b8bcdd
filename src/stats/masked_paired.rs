//! Paired designs with missing values: a pair is missing when either of its
//! samples is, and the test runs on the observed pairs.
//!
//! Sign flips never change which pairs are observed, so no mask GEMM is
//! needed: the flipped sum S of the observed differences (scaled to sum of
//! squares n - 1 over the n observed pairs; missing pairs enter as 0) and
//! the row's own n give the statistic of every relabelling.
//!
//! On the complete-data scale (`stats::masked`), with m pairs in the design:
//! - paired t: the S a complete feature would need for the same t. With
//!   t^2 = S^2 (n - 1) / (n (n - 1) - S^2) for n pairs, that is
//!   S_eq = S sqrt(m (m - 1) (n - 1) / ((m - 1) n (n - 1) + (n - m) S^2)),
//!   whose denominator stays at least n (n - 1)^2 (S^2 <= n (n - 1)), so
//!   it is finite and well conditioned even when t is infinite;
//! - signed-rank: S over its permutation SD, sqrt(sum of squares), is the
//!   permutation z-score at any n, so the observed signed ranks are simply
//!   scaled to sum of squares m - 1 as a complete feature's are. Their row
//!   then holds 0 (not NaN) for missing pairs and the kernel treats it as
//!   a complete row: the statistic stays linear in the row.

use super::prepare::{Assignment, PrepScratch, Prepared, Status, TestSpec};
use super::{Sizes, TestKind};

impl TestSpec {
    /// A paired row (A samples, then B samples) with NaN: the test on the
    /// pairs with both samples observed.
    pub(super) fn prepare_masked_paired(
        &self,
        raw: &[f64],
        z: &mut [f64],
        scratch: &mut PrepScratch,
    ) -> Prepared {
        let m = self.sizes.n_a;
        let (a, b) = raw.split_at(m);
        let kept = |i: usize| !a[i].is_nan() && !b[i].is_nan();
        let mut values = std::mem::take(&mut scratch.observed_raw);
        let mut observed_z = std::mem::take(&mut scratch.observed_z);
        values.clear();
        values.extend((0..m).filter(|&i| kept(i)).map(|i| a[i]));
        let n = values.len();
        values.extend((0..m).filter(|&i| kept(i)).map(|i| b[i]));
        let observed = Some(Sizes { n_a: n, n_b: n });
        let prepared = if n < self.min_observed.max(2) {
            let mean = (0..n).map(|i| values[n + i] - values[i]).sum::<f64>() / n as f64;
            Prepared::untested(
                Status::TooFewObserved,
                if mean.is_finite() { mean } else { f64::NAN },
            )
        } else {
            let mut spec = self.clone();
            spec.sizes = Sizes { n_a: n, n_b: n };
            observed_z.resize(n, 0.0);
            let p = spec.prepare_paired(&values, &mut observed_z, scratch);
            if p.status == Status::Tested {
                let signed_rank = self.test == TestKind::SignedRank;
                let (scale, absent) = if signed_rank {
                    (((m as f64 - 1.0) / (n as f64 - 1.0)).sqrt(), 0.0)
                } else {
                    (1.0, f64::NAN)
                };
                let mut k = 0;
                for (i, zi) in z.iter_mut().enumerate() {
                    if kept(i) {
                        *zi = observed_z[k] * scale;
                        k += 1;
                    } else {
                        *zi = absent;
                    }
                }
                let kernel_obs = if signed_rank {
                    self.kernel_stat_with(z, Assignment::Observed(&[]))
                } else {
                    self.masked_paired_stat(z, None)
                };
                Prepared {
                    kernel_obs,
                    abs_sum: p.abs_sum * scale,
                    ..p
                }
            } else {
                p
            }
        };
        scratch.observed_raw = values;
        scratch.observed_z = observed_z;
        Prepared {
            observed,
            ..prepared
        }
    }

    /// Oriented kernel statistic of a paired row with NaN for missing pairs,
    /// under sign flips (`None`: none flipped), in f64.
    pub(super) fn masked_paired_stat(&self, z: &[f64], flips: Option<&[u8]>) -> f64 {
        let (mut s, mut n) = (0.0, 0usize);
        for (i, &v) in z.iter().enumerate() {
            if v.is_nan() {
                continue;
            }
            n += 1;
            s += if flips.is_some_and(|f| f[i] == 1) {
                -v
            } else {
                v
            };
        }
        if self.test == TestKind::SignedRank {
            return self.side.orient(s);
        }
        self.side.orient(self.paired_equivalent(s, n))
    }

    /// The flipped sum S of a complete feature with the same paired t as a
    /// masked one of `n` observed pairs (module docs).
    pub fn paired_equivalent(&self, s: f64, n: usize) -> f64 {
        let (m, n) = (self.sizes.n_a as f64, n as f64);
        let denominator = ((m - 1.0) * n * (n - 1.0) + (n - m) * s * s).max(f64::MIN_POSITIVE);
        s * (m * (m - 1.0) * (n - 1.0) / denominator).sqrt()
    }
}
