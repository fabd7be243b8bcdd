//! Rows with missing values in the kernel: the GEMM of the standardized
//! row (0 where missing) and of its 0/1 mask against the same weights gives,
//! per relabelling, the group-B sum and the observed group-B count; with
//! the squares (Welch) the group-B sum of squares. The finisher turns them
//! into the statistic on the complete-data scale (`stats::masked`), in f32,
//! with ill-conditioned entries NaN so that they are recomputed in f64.

use super::{orient_all, Kernel, F32_UNIT};
use crate::stats::TestKind;

impl Kernel {
    /// Turns masked sums (`sums`: group-B sums, `masks`: observed group-B
    /// counts, `squares`: group-B sums of squares, Welch only) of a row with
    /// `observed` values into oriented kernel statistics, in place.
    pub(super) fn masked_tile(
        &self,
        sums: &mut [f32],
        squares: &[f32],
        masks: &[f32],
        observed: usize,
    ) {
        let n = observed as f32;
        let big_n = self.spec.sizes.n() as f32;
        let (big_na, big_nb) = (self.spec.sizes.n_a as f32, self.spec.sizes.n_b as f32);
        let spread = (big_na * big_nb / big_n).sqrt();
        // Branch-free (selects only) so that the loops vectorize.
        match self.spec.test {
            TestKind::Anova | TestKind::Kruskal => self.masked_between_tile(sums, masks, n),
            TestKind::Welch => {
                for ((v, &q1), &nb) in sums.iter_mut().zip(squares).zip(masks) {
                    let na = n - nb;
                    let degenerate = (na < 1.5) | (nb < 1.5);
                    let s1 = *v;
                    let s1sq = s1 * s1;
                    let q0 = (n - 1.0) - q1;
                    let ss_b = q1 - s1sq / nb;
                    let ss_a = q0 - s1sq / na;
                    let conditioned = (ss_b > 1e-2 * q1) & (ss_a > 1e-2 * q0);
                    let t = (s1 / nb + s1 / na)
                        / (ss_a / ((na - 1.0) * na) + ss_b / ((nb - 1.0) * nb)).sqrt();
                    *v = if degenerate {
                        0.0
                    } else if conditioned {
                        t
                    } else {
                        f32::NAN
                    };
                }
            }
            // `stats::masked_trait`: r from the observed samples' sums of
            // z w, w and w^2 (`squares`); NaN (f64) unless the observed
            // trait spread keeps over half its sum of squares.
            TestKind::Pearson => {
                for ((v, &c), &b) in sums.iter_mut().zip(squares).zip(masks) {
                    let spread = c - b * b / n;
                    let r = *v / ((n - 1.0) * spread).sqrt();
                    let r2 = (r * r).min(1.0);
                    let scale = (n - 2.0) / ((big_n - 2.0) * (1.0 - r2) + (n - 2.0) * r2);
                    *v = if spread > 0.5 * c {
                        (big_n - 1.0) * r * scale.sqrt()
                    } else {
                        f32::NAN
                    };
                }
            }
            // Sign flips keep the observed pairs: no counts needed (see
            // `stats::masked_paired`; the denominator is at least
            // n (n - 1)^2, so no entry is ill-conditioned).
            TestKind::PairedT => {
                let m = big_na;
                let numerator = m * (m - 1.0) * (n - 1.0);
                let base = (m - 1.0) * n * (n - 1.0);
                for v in sums.iter_mut() {
                    let s = *v;
                    let denominator = (base + (n - m) * s * s).max(f32::MIN_POSITIVE);
                    *v = s * (numerator / denominator).sqrt();
                }
            }
            TestKind::RankSum => {
                for (v, &nb) in sums.iter_mut().zip(masks) {
                    let na = n - nb;
                    let degenerate = (na < 0.5) | (nb < 0.5);
                    let scaled = *v * (spread / (na * nb / n).sqrt());
                    *v = if degenerate { 0.0 } else { scaled };
                }
            }
            _ => {
                for (v, &nb) in sums.iter_mut().zip(masks) {
                    let na = n - nb;
                    let degenerate = (na < 0.5) | (nb < 0.5);
                    let s1 = *v;
                    let between = s1 * s1 * n / (na * nb);
                    let within = (n - 1.0) - between;
                    let denominator = (big_n - 2.0) * within + (n - 2.0) * between;
                    let equivalent =
                        ((big_n - 1.0) * (n - 2.0) * between / denominator).sqrt() * spread;
                    *v = if degenerate {
                        0.0
                    } else if within > 1e-2 * (n - 1.0) {
                        equivalent.copysign(s1)
                    } else {
                        f32::NAN
                    };
                }
            }
        }
        orient_all(self.spec.side, sums);
    }

    /// k groups: compacts groups of `width` class sums and observed class
    /// counts into the kernel statistic (see `TestSpec::masked_between`),
    /// in place.
    fn masked_between_tile(&self, wide: &mut [f32], masks: &[f32], n: f32) {
        let r = self.spec.width();
        let cols = wide.len() / r;
        let k = r as f32 + 1.0;
        let big_n = self.units() as f32;
        let anova = self.spec.test == TestKind::Anova;
        for j in 0..cols {
            let (mut rest, mut rest_count, mut between) = (0.0f32, n, 0.0f32);
            let mut empty = false;
            for c in 0..r {
                let (s, m) = (wide[j * r + c], masks[j * r + c]);
                empty |= m < 0.5;
                rest += s;
                rest_count -= m;
                between += s * s / m;
            }
            empty |= rest_count < 0.5;
            between += rest * rest / rest_count;
            let within = (n - 1.0) - between;
            wide[j] = if empty {
                0.0
            } else if !anova {
                between
            } else if within > 1e-2 * (n - 1.0) {
                (big_n - 1.0) * (n - k) * between / ((big_n - k) * within + (n - k) * between)
            } else {
                f32::NAN
            };
        }
    }

    /// Error bound of a masked row's f32 statistic near `kernel_obs`, and the
    /// slack its f32 values get against the running maxima' floors: the
    /// error delta of each GEMM sum (the counts are exact) times how much
    /// the map to the complete-data scale can stretch it (`stretch`), and a
    /// relative term for the f32 finisher (conditioned: at most a hundred
    /// times its rounding).
    pub(super) fn masked_band(&self, kernel_obs: f64, abs_sum: f64, observed: usize) -> (f64, f32) {
        let big_n = self.units() as f64;
        let n = observed.max(1) as f64;
        if self.spec.test == TestKind::Pearson {
            // r errs by at most 8 (N + 2) u: A = sum z w by 2 (N + 2) u
            // sqrt((n - 1) C) and C - B^2 / n by 4 (N + 2) u C, with the
            // spread above C / 2 (conditioning); r_eq's slope in r is at
            // most (N - 2) / (n - 2); doubled for safety.
            let e = 2.0 * (big_n - 1.0) * (big_n - 2.0) / (n - 2.0).max(1.0)
                * 8.0
                * (big_n + 2.0)
                * F32_UNIT
                + 1e-12;
            let band = 2e-4 * (1.0 + kernel_obs.abs()) + e;
            return (band, (e + 2e-4 * big_n) as f32);
        }
        let delta = 2.0 * (big_n + 2.0) * F32_UNIT * abs_sum + 1e-12;
        let (na, nb) = (self.spec.sizes.n_a as f64, self.spec.sizes.n_b as f64);
        let spread = (na * nb / big_n).sqrt();
        let mut stretch = match self.spec.test {
            // d S1eq / d S1 of `stats::masked` at its largest: the groups
            // as unequal as can be (n_a n_b >= n - 1) and the denominator
            // at its least, (n - 2)(n - 1); doubled for safety.
            TestKind::Student | TestKind::MeanDiff => {
                2.0 * spread * (n / (n - 1.0)).sqrt() * (big_n - 1.0).sqrt() * (big_n - 2.0)
                    / ((n - 2.0).max(1.0) * (n - 1.0).sqrt())
            }
            // S1eq = S1 spread / sqrt(n_a n_b / n), n_a n_b >= n - 1.
            TestKind::RankSum => 2.0 * spread * (n / (n - 1.0)).sqrt(),
            // t = S1 (1/n_a + 1/n_b) / se: at most sqrt(n / (n - 1)) / sd
            // per unit of S1, and conditioning keeps each group's variance
            // above a hundredth of its sum of squares (a factor 10).
            TestKind::Welch => 10.0 * (n / (n - 1.0)).sqrt(),
            // d S_eq / d S at its largest, S^2 = n (n - 1):
            // sqrt(m (m - 1)^3 / (n (n - 1)^3)); doubled for safety.
            TestKind::PairedT => {
                2.0 * (big_n * (big_n - 1.0).powi(3) / (n * (n - 1.0).max(1.0).powi(3))).sqrt()
            }
            _ => 10.0 * (big_n.sqrt() * big_n / n + 1.0),
        };
        if self.spec.test.is_k_group() {
            // Sums of squares of k class sums, each class as small as one
            // value: 2 |s| delta with |s| <= sqrt(n - 1), k times over.
            let k = self.spec.group_sizes.len() as f64;
            stretch *= 2.0 * k * k * big_n.sqrt();
        }
        // Paired t's finisher loses up to m / n ulps to cancellation in its
        // denominator (terms of size m n^2 leave at least n (n - 1)^2).
        let relative = if self.spec.test == TestKind::PairedT {
            2e-4 + 16.0 * F32_UNIT * big_n / n
        } else {
            2e-4
        };
        let band = relative * (1.0 + kernel_obs.abs()) + stretch * delta;
        // Student, rank-sum and paired statistics stay below N in size;
        // Welch's relative term is already in the maxima' floors.
        let slack = stretch * delta + relative * (1.0 + big_n);
        (band, slack as f32)
    }
}
