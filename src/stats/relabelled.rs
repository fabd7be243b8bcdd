//! The permutation null of one feature, recomputed from its raw row for
//! display: the kernel never keeps per-feature relabelled statistics (it
//! only counts exceedances), so the report rebuilds them from the same
//! relabelings, drawn again from the recorded seed.

use super::prepare::{standardize, PrepScratch, Status, TestSpec};
use super::{mid_ranks, welch_t, DesignKind, GroupSums, Sizes, TestKind};
use crate::design::Relabelings;

/// The reported statistic of `raw` under every relabelling, in relabelling
/// order (NaN where a relabelling leaves the feature untestable, e.g. no
/// variance within either group).
pub fn relabelled_statistics(spec: &TestSpec, raw: &[f64], relabelings: &Relabelings) -> Vec<f64> {
    let n = spec.units();
    let mut z = vec![0.0; n];
    let mut scratch = PrepScratch::default();
    if spec.model.is_some() && raw.iter().any(|v| v.is_nan()) {
        // Freedman–Lane on the observed units (`stats::masked_exact`).
        if spec.prepare(raw, &[], &mut z, &mut scratch).status != Status::Tested {
            return vec![f64::NAN; relabelings.count];
        }
        let mut row = spec.exact_row(&z);
        return (0..relabelings.count)
            .map(|b| {
                row.statistic(spec, Some(relabelings.source_row(b)))
                    .unwrap_or(f64::NAN)
            })
            .collect();
    }
    let mut values = raw.to_vec();
    let mut permuted = spec.clone();
    // Freedman–Lane: the nuisance fit stays, the residuals move.
    let (residuals, fitted) = match &spec.model {
        Some(model) => {
            let mut e = vec![0.0; raw.len()];
            model.residualize(raw, &mut e);
            let fit: Vec<f64> = raw.iter().zip(&e).map(|(y, r)| y - r).collect();
            (e, fit)
        }
        None => (Vec::new(), Vec::new()),
    };
    (0..relabelings.count)
        .map(|b| {
            let p = if relabelings.sign_flips {
                // A flipped pair swaps its two samples (raw: all A, then all B).
                values.copy_from_slice(raw);
                for (i, &flip) in relabelings.row(b).iter().enumerate() {
                    if flip == 1 {
                        values.swap(i, n + i);
                    }
                }
                spec.prepare(&values, &[], &mut z, &mut scratch)
            } else if spec.model.is_some() {
                for (i, &src) in relabelings.source_row(b).iter().enumerate() {
                    values[i] = residuals[src as usize] + fitted[i];
                }
                spec.prepare(&values, &[], &mut z, &mut scratch)
            } else if spec.test.design() == DesignKind::Trait {
                for (i, &src) in relabelings.source_row(b).iter().enumerate() {
                    permuted.trait_weights[i] = spec.trait_weights[src as usize];
                }
                permuted.prepare(raw, &[], &mut z, &mut scratch)
            } else {
                spec.prepare(raw, relabelings.row(b), &mut z, &mut scratch)
            };
            if p.status == Status::Tested {
                p.statistic
            } else {
                f64::NAN
            }
        })
        .collect()
}

/// The model distribution the reported statistic is compared with.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum ModelReference {
    /// Student t with `df` degrees of freedom (centred, unit scale).
    StudentT { df: f64 },
    /// Normal approximation (of the Mann–Whitney U).
    Normal { mean: f64, sd: f64 },
    /// F distribution (one-way F).
    FisherF { df1: f64, df2: f64 },
    /// Chi-squared distribution (Kruskal–Wallis H).
    ChiSquared { df: f64 },
    /// Null density of a correlation coefficient of `n` normal pairs,
    /// (1 - r^2)^((n - 4)/2) / B(1/2, (n - 2)/2).
    Correlation { n: f64 },
}

/// The model reference of one feature under the observed labels: Student t
/// with n - 2 df (Student, and mean difference on the t scale), Welch t with
/// the feature's Welch–Satterthwaite df, or for rank-sum the normal
/// approximation N(nA nB / 2, tie-corrected sd) of U.
pub fn model_reference(spec: &TestSpec, raw: &[f64], labels: &[u8]) -> ModelReference {
    let sizes = spec.sizes;
    let (na, nb) = (sizes.n_a as f64, sizes.n_b as f64);
    let n = na + nb;
    let k = spec.group_sizes.len() as f64;
    if let Some(model) = &spec.model {
        // With missing values: the df of the model refitted on them.
        let df = spec.observed_model_df(raw).unwrap_or(model.df);
        if spec.model_f() {
            return ModelReference::FisherF {
                df1: model.effect_columns() as f64,
                df2: df,
            };
        }
        return ModelReference::StudentT { df };
    }
    if spec.test.design() == DesignKind::Paired && raw.iter().any(|v| v.is_nan()) {
        // The test was on the observed pairs.
        let m = spec.sizes.n_a;
        let kept: Vec<usize> = (0..m)
            .filter(|&i| !raw[i].is_nan() && !raw[m + i].is_nan())
            .collect();
        let values: Vec<f64> = kept
            .iter()
            .chain(&kept)
            .enumerate()
            .map(|(j, &i)| if j < kept.len() { raw[i] } else { raw[m + i] })
            .collect();
        let mut observed = spec.clone();
        observed.sizes = Sizes {
            n_a: kept.len(),
            n_b: kept.len(),
        };
        return model_reference(&observed, &values, labels);
    }
    if spec.test.design() == DesignKind::Trait && raw.iter().any(|v| v.is_nan()) {
        return ModelReference::Correlation {
            n: raw.iter().filter(|v| !v.is_nan()).count() as f64,
        };
    }
    if raw.iter().any(|v| v.is_nan()) {
        // The test was on the observed values: their sizes, ties and df.
        let (values, classes): (Vec<f64>, Vec<u8>) = raw
            .iter()
            .zip(labels)
            .filter(|(v, _)| !v.is_nan())
            .map(|(&v, &l)| (v, l))
            .unzip();
        let n_b = classes.iter().filter(|&&l| l == 1).count();
        let mut observed = spec.clone();
        observed.sizes = Sizes {
            n_a: values.len() - n_b,
            n_b,
        };
        observed.group_sizes = vec![observed.sizes.n_a, n_b];
        return model_reference(&observed, &values, &classes);
    }
    match spec.test {
        TestKind::PairedT => ModelReference::StudentT { df: na - 1.0 },
        TestKind::SignedRank => {
            let m = sizes.n_a;
            let magnitudes: Vec<f64> = (0..m)
                .map(|i| (raw[m + i] - raw[i]).abs())
                .filter(|d| *d != 0.0)
                .collect();
            let mut order = Vec::new();
            let mut ranks = vec![0.0; magnitudes.len()];
            let tie_sum = mid_ranks(&magnitudes, &mut order, &mut ranks);
            let nz = magnitudes.len() as f64;
            ModelReference::Normal {
                mean: nz * (nz + 1.0) / 4.0,
                sd: (nz * (nz + 1.0) * (2.0 * nz + 1.0) / 24.0 - tie_sum / 48.0).sqrt(),
            }
        }
        TestKind::Pearson | TestKind::Spearman => ModelReference::Correlation {
            n: raw.len() as f64,
        },
        TestKind::Anova => ModelReference::FisherF {
            df1: k - 1.0,
            df2: raw.len() as f64 - k,
        },
        TestKind::Kruskal => ModelReference::ChiSquared { df: k - 1.0 },
        TestKind::Student | TestKind::MeanDiff => ModelReference::StudentT { df: n - 2.0 },
        TestKind::Welch => {
            let mut z = vec![0.0; raw.len()];
            standardize(raw, &mut z);
            let (_, df) = welch_t(GroupSums::of(&z, labels), sizes);
            ModelReference::StudentT { df }
        }
        _ => {
            let mut order = Vec::new();
            let mut ranks = vec![0.0; raw.len()];
            let tie_sum = mid_ranks(raw, &mut order, &mut ranks);
            ModelReference::Normal {
                mean: na * nb / 2.0,
                sd: (na * nb / 12.0 * ((n + 1.0) - tie_sum / (n * (n - 1.0)))).sqrt(),
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::stats::{Side, Sizes};

    /// Student (1908) sleep data, drug A then drug B (values as listed in
    /// /work/shared/DESIGN.md §8, checked there with scipy).
    const SLEEP_A: [f64; 10] = [0.7, -1.6, -0.2, -1.2, -0.1, 3.4, 3.7, 0.8, 0.0, 2.0];
    const SLEEP_B: [f64; 10] = [1.9, 0.8, 1.1, 0.1, -0.1, 4.4, 5.5, 1.6, 4.6, 3.4];

    fn sleep() -> (Vec<f64>, Vec<u8>) {
        let raw: Vec<f64> = SLEEP_A.iter().chain(&SLEEP_B).copied().collect();
        let labels: Vec<u8> = (0..20).map(|i| u8::from(i >= 10)).collect();
        (raw, labels)
    }

    fn spec(test: TestKind) -> TestSpec {
        TestSpec::two_group(test, Side::Both, Sizes { n_a: 10, n_b: 10 })
    }

    /// Relabelings given explicitly: the observed labels, then the groups
    /// swapped (which negates t and turns U into nA nB - U).
    fn explicit(rows: &[Vec<u8>]) -> Relabelings {
        Relabelings {
            n: rows[0].len(),
            count: rows.len(),
            exact: false,
            sign_flips: false,
            labels: rows.concat(),
            sources: Vec::new(),
        }
    }

    #[test]
    fn statistics_under_given_labels_match_published_values() {
        let (raw, labels) = sleep();
        let swapped: Vec<u8> = labels.iter().map(|l| 1 - l).collect();
        let r = explicit(&[labels.clone(), swapped]);
        // Student (1908) sleep data: Welch t = 1.8608 for B minus A, pooled
        // t likewise (DESIGN.md §8, values verified with scipy.stats.ttest_ind).
        let welch = relabelled_statistics(&spec(TestKind::Welch), &raw, &r);
        assert!((welch[0] - 1.8608).abs() < 1e-4, "{welch:?}");
        assert!((welch[1] + 1.8608).abs() < 1e-4, "{welch:?}");
        let student = relabelled_statistics(&spec(TestKind::Student), &raw, &r);
        assert!((student[0] - 1.8608).abs() < 1e-4, "{student:?}");
        // Mann–Whitney U: 25.5 for the smaller group statistic (DESIGN.md
        // §8, scipy.stats.mannwhitneyu); U_B + U_A = nA nB = 100.
        let u = relabelled_statistics(&spec(TestKind::RankSum), &raw, &r);
        assert!(
            (u[0] - 74.5).abs() < 1e-12 && (u[1] - 25.5).abs() < 1e-12,
            "{u:?}"
        );
        // Difference in means of B and A: 1.58 hours (from the data above).
        let d = relabelled_statistics(&spec(TestKind::MeanDiff), &raw, &r);
        assert!((d[0] - 1.58).abs() < 1e-12 && (d[1] + 1.58).abs() < 1e-12);
    }

    #[test]
    fn references_follow_the_model_of_each_test() {
        let (raw, labels) = sleep();
        // Welch–Satterthwaite df 17.776 for the sleep data (DESIGN.md §8).
        match model_reference(&spec(TestKind::Welch), &raw, &labels) {
            ModelReference::StudentT { df } => assert!((df - 17.776).abs() < 1e-3, "{df}"),
            other => panic!("{other:?}"),
        }
        assert_eq!(
            model_reference(&spec(TestKind::Student), &raw, &labels),
            ModelReference::StudentT { df: 18.0 }
        );
        // Without ties the U variance is nA nB (n + 1) / 12 (Mann & Whitney
        // 1947; common practice): 10 * 10 * 21 / 12 = 175.
        let distinct: Vec<f64> = (0..20).map(|i| i as f64 * 1.5).collect();
        match model_reference(&spec(TestKind::RankSum), &distinct, &labels) {
            ModelReference::Normal { mean, sd } => {
                assert_eq!(mean, 50.0);
                assert!((sd * sd - 175.0).abs() < 1e-9);
            }
            other => panic!("{other:?}"),
        }
    }

    #[test]
    fn drawn_relabelings_keep_group_sizes_so_every_statistic_is_finite() {
        let (raw, labels) = sleep();
        let r = Relabelings::draw(&labels, 500, 11);
        let t = relabelled_statistics(&spec(TestKind::Welch), &raw, &r);
        assert_eq!(t.len(), 500);
        assert!(t.iter().all(|v| v.is_finite()));
        assert_eq!(t, relabelled_statistics(&spec(TestKind::Welch), &raw, &r));
    }
}
