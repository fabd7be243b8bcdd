//! Features with missing values (NaN): each is tested on its observed
//! samples only.
//!
//! The standardized row keeps NaN where a value is missing (z is
//! standardized over the observed values), so that every later stage (the
//! kernel, the step-down sort, the f64 rechecks) can tell which units a
//! feature has. Under a relabelling the observed units of each group change
//! in number, so the statistic is computed from the masked sums (S1, Q1)
//! and the observed group sizes of that relabelling.
//!
//! Kernel statistics must compare across features (maxT maxima, pooled
//! null), so a masked feature's statistic is put on the scale of a complete
//! feature of the same design:
//! - Student and mean difference: the group-B sum S1 that a complete feature
//!   would need for the same pooled-variance t;
//! - Welch: the Welch t itself (already the kernel statistic of complete
//!   features);
//! - rank-sum: the group-B sum of standardized mid-ranks that a complete
//!   feature would need for the same standardized rank sum
//!   S1 / sqrt(n_a n_b / n), its permutation z-score;
//! - one-way F: the between-group sum of squares a complete feature would
//!   need for the same F (F's df follow the observed count);
//! - Kruskal–Wallis: H itself, which for standardized mid-ranks is the
//!   between-group sum of squares at any number of observed values.
//!
//! For complete rows each map is the identity. A relabelling that leaves
//! a group without enough observed values for the statistic (none for
//! Student, rank-sum and k-group tests, fewer than two for Welch) gets
//! statistic 0: no evidence either way.

use super::prepare::{Assignment, PrepScratch, Prepared, Status, TestSpec, MAX_GROUPS};
use super::{welch_t, DesignKind, GroupSums, Sizes, TestKind};

impl TestSpec {
    /// A row with NaN: the test on the observed values, with `z` the
    /// standardized observed values and NaN where missing.
    pub(super) fn prepare_masked(
        &self,
        raw: &[f64],
        labels: &[u8],
        z: &mut [f64],
        scratch: &mut PrepScratch,
    ) -> Prepared {
        if let Some(model) = &self.model {
            return self.prepare_masked_model(model, raw, z, scratch);
        }
        if self.test == TestKind::Spearman {
            return self.prepare_masked_spearman(raw, z, scratch);
        }
        if self.test.is_k_group() {
            return self.prepare_masked_k_groups(raw, labels, z, scratch);
        }
        if self.test.design() == DesignKind::Paired {
            return self.prepare_masked_paired(raw, z, scratch);
        }
        if self.test.design() == DesignKind::Trait {
            return self.prepare_masked_trait(raw, z, scratch);
        }
        let mut values = std::mem::take(&mut scratch.observed_raw);
        let mut classes = std::mem::take(&mut scratch.observed_labels);
        let mut observed_z = std::mem::take(&mut scratch.observed_z);
        values.clear();
        classes.clear();
        let mut observed = Sizes { n_a: 0, n_b: 0 };
        let (mut sum_a, mut sum_b) = (0.0, 0.0);
        for (&v, &l) in raw.iter().zip(labels) {
            if v.is_nan() {
                continue;
            }
            values.push(v);
            classes.push(l);
            if l == 1 {
                observed.n_b += 1;
                sum_b += v;
            } else {
                observed.n_a += 1;
                sum_a += v;
            }
        }
        let min = self.min_observed.max(2);
        let prepared = if observed.n_a < min || observed.n_b < min {
            let effect = sum_b / observed.n_b as f64 - sum_a / observed.n_a as f64;
            let mut p = Prepared::untested(
                Status::TooFewObserved,
                if effect.is_finite() { effect } else { f64::NAN },
            );
            p.observed = Some(observed);
            p
        } else {
            observed_z.resize(values.len(), 0.0);
            match self.two_group_core(&values, &classes, observed, &mut observed_z, scratch) {
                Err(mut p) => {
                    p.observed = Some(observed);
                    p
                }
                Ok(core) => {
                    scatter_observed(raw, &observed_z, z);
                    Prepared {
                        status: Status::Tested,
                        effect: core.effect,
                        statistic: core.statistic,
                        p_param: core.p_param,
                        kernel_obs: self.masked_kernel_stat(z, labels),
                        abs_sum: core.abs_sum,
                        observed: Some(observed),
                    }
                }
            }
        };
        scratch.observed_raw = values;
        scratch.observed_labels = classes;
        scratch.observed_z = observed_z;
        prepared
    }

    /// k groups: the test of the observed values, each class as observed.
    fn prepare_masked_k_groups(
        &self,
        raw: &[f64],
        labels: &[u8],
        z: &mut [f64],
        scratch: &mut PrepScratch,
    ) -> Prepared {
        let mut values = std::mem::take(&mut scratch.observed_raw);
        let mut classes = std::mem::take(&mut scratch.observed_labels);
        let mut observed_z = std::mem::take(&mut scratch.observed_z);
        values.clear();
        classes.clear();
        let mut counts = vec![0usize; self.group_sizes.len()];
        for (&v, &l) in raw.iter().zip(labels) {
            if !v.is_nan() {
                values.push(v);
                classes.push(l);
                counts[l as usize] += 1;
            }
        }
        let observed = Some(Sizes {
            n_a: values.len(),
            n_b: 0,
        });
        let prepared = if counts.iter().any(|&c| c < self.min_observed.max(2)) {
            Prepared::untested(Status::TooFewObserved, f64::NAN)
        } else {
            observed_z.resize(values.len(), 0.0);
            let mut spec = self.clone();
            spec.group_sizes = counts;
            let p = spec.prepare_k_groups(&values, &classes, &mut observed_z, scratch);
            if p.status == Status::Tested {
                scatter_observed(raw, &observed_z, z);
                Prepared {
                    kernel_obs: self.masked_kernel_stat(z, labels),
                    ..p
                }
            } else {
                p
            }
        };
        scratch.observed_raw = values;
        scratch.observed_labels = classes;
        scratch.observed_z = observed_z;
        Prepared {
            observed,
            ..prepared
        }
    }

    /// Kernel statistic of a standardized row with NaN where missing, under
    /// a relabelling, in f64.
    pub fn masked_kernel_stat_with(&self, z: &[f64], assignment: Assignment<'_>) -> f64 {
        if self.exact_masked() {
            let sources = match assignment {
                Assignment::Sources(s) => Some(s),
                _ => None,
            };
            return self.exact_row(z).kernel_stat(self, sources);
        }
        match assignment {
            Assignment::Flips(flips) => self.masked_paired_stat(z, Some(flips)),
            Assignment::Observed(_) if self.test.design() == DesignKind::Paired => {
                self.masked_paired_stat(z, None)
            }
            Assignment::Sources(sources) => self.masked_trait_stat(z, Some(sources)),
            Assignment::Observed(_) if self.test.design() == DesignKind::Trait => {
                self.masked_trait_stat(z, None)
            }
            Assignment::Classes(classes) | Assignment::Observed(classes) => {
                self.masked_kernel_stat(z, classes)
            }
        }
    }

    /// Kernel statistic of a standardized row with NaN where missing, for
    /// the class of each unit (1 = group B), in f64.
    pub fn masked_kernel_stat(&self, z: &[f64], classes: &[u8]) -> f64 {
        if self.test.is_k_group() {
            let mut sums = [0.0f64; MAX_GROUPS];
            let mut counts = [0.0f64; MAX_GROUPS];
            for (&v, &c) in z.iter().zip(classes) {
                if !v.is_nan() {
                    sums[c as usize] += v;
                    counts[c as usize] += 1.0;
                }
            }
            let k = self.group_sizes.len();
            return self.masked_between(&sums[1..k], &counts[1..k], counts[..k].iter().sum());
        }
        let (mut n_a, mut n_b) = (0usize, 0usize);
        let (mut s1, mut q1) = (0.0, 0.0);
        for (&v, &c) in z.iter().zip(classes) {
            if v.is_nan() {
                continue;
            }
            if c == 1 {
                n_b += 1;
                s1 += v;
                q1 += v * v;
            } else {
                n_a += 1;
            }
        }
        self.side
            .orient(self.masked_signed(s1, q1, Sizes { n_a, n_b }))
    }

    /// The signed kernel statistic (complete-data scale, see module docs)
    /// from the group-B sums of values standardized over the observed ones.
    pub fn masked_signed(&self, s1: f64, q1: f64, observed: Sizes) -> f64 {
        let (na, nb) = (observed.n_a as f64, observed.n_b as f64);
        let n = na + nb;
        match self.test {
            TestKind::Welch => {
                if observed.n_a < 2 || observed.n_b < 2 {
                    return 0.0;
                }
                let t = welch_t(GroupSums { s1, q1 }, observed).0;
                if t.is_nan() {
                    0.0
                } else {
                    t
                }
            }
            TestKind::RankSum => {
                if observed.n_a == 0 || observed.n_b == 0 {
                    return 0.0;
                }
                s1 * (self.complete_spread() / (na * nb / n).sqrt())
            }
            _ => {
                if observed.n_a == 0 || observed.n_b == 0 || n < 3.0 {
                    return 0.0;
                }
                let between = s1 * s1 * n / (na * nb);
                let within = ((n - 1.0) - between).max(0.0);
                self.student_equivalent(s1, between, within, n)
            }
        }
    }

    /// k groups: the kernel statistic from the class sums and observed
    /// counts of classes 1..k (class 0 holds the rest; the sums of a
    /// standardized row total 0) of a row with `n` observed values.
    pub fn masked_between(&self, sums: &[f64], counts: &[f64], n: f64) -> f64 {
        let (mut rest, mut rest_count, mut between) = (0.0, n, 0.0);
        for (&s, &m) in sums.iter().zip(counts) {
            if m == 0.0 {
                return 0.0;
            }
            rest += s;
            rest_count -= m;
            between += s * s / m;
        }
        if rest_count == 0.0 {
            return 0.0;
        }
        between += rest * rest / rest_count;
        if self.test == TestKind::Kruskal {
            return between;
        }
        let k = self.group_sizes.len() as f64;
        let big_n: f64 = self.group_sizes.iter().sum::<usize>() as f64;
        let within = ((n - 1.0) - between).max(0.0);
        let denominator = (big_n - k) * within + (n - k) * between;
        if denominator <= 0.0 {
            return 0.0;
        }
        (big_n - 1.0) * (n - k) * between / denominator
    }

    /// sqrt(n_a n_b / n) of the complete design: the permutation SD of S1.
    fn complete_spread(&self) -> f64 {
        let (na, nb) = (self.sizes.n_a as f64, self.sizes.n_b as f64);
        (na * nb / (na + nb)).sqrt()
    }

    /// The S1 of a complete feature with the same pooled-variance t as a
    /// masked one of `n` observed values with these between- and
    /// within-group sums of squares. With t^2 = between (n - 2) / within
    /// and a complete feature's between = S1^2 N / (N_a N_b) =
    /// (N - 1) t^2 / (N - 2 + t^2), written without t so that it stays
    /// finite when within is 0.
    fn student_equivalent(&self, s1: f64, between: f64, within: f64, n: f64) -> f64 {
        let big_n = self.sizes.n() as f64;
        let denominator = (big_n - 2.0) * within + (n - 2.0) * between;
        if denominator <= 0.0 {
            return 0.0;
        }
        let u = (big_n - 1.0) * (n - 2.0) * between / denominator;
        let spread = self.complete_spread();
        (u.max(0.0)).sqrt() * spread * s1.signum()
    }
}

/// Spreads the standardized observed values back over the row: `z[i]` is
/// the next of `observed` where `raw[i]` is observed, NaN where missing
/// (so later stages still know the mask).
pub(super) fn scatter_observed(raw: &[f64], observed: &[f64], z: &mut [f64]) {
    let mut next = observed.iter();
    for (zi, &v) in z.iter_mut().zip(raw) {
        *zi = if v.is_nan() {
            f64::NAN
        } else {
            next.next().copied().unwrap_or(f64::NAN)
        };
    }
}
