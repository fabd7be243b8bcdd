//! k groups, correlation with a trait, pairs and strata: model-based
//! p-values against published values and exact permutation p-values against
//! brute-force enumeration written here from textbook definitions.

mod common;

use common::{least_squares, options, scan_with_sheet, Table, TestRng};
use riffle::design::DesignColumns;
use riffle::stats::{DesignKind, Side, TestKind};

fn mean(v: &[f64]) -> f64 {
    v.iter().sum::<f64>() / v.len() as f64
}

/// One-way F from its textbook definition.
fn f_statistic(x: &[f64], classes: &[usize], k: usize) -> f64 {
    let grand = mean(x);
    let mut ssb = 0.0;
    let mut ssw = 0.0;
    for g in 0..k {
        let v: Vec<f64> = x
            .iter()
            .zip(classes)
            .filter(|(_, &c)| c == g)
            .map(|(a, _)| *a)
            .collect();
        let m = mean(&v);
        ssb += v.len() as f64 * (m - grand) * (m - grand);
        ssw += v.iter().map(|a| (a - m) * (a - m)).sum::<f64>();
    }
    (ssb / (k as f64 - 1.0)) / (ssw / (x.len() - k) as f64)
}

fn pearson(x: &[f64], y: &[f64]) -> f64 {
    let (mx, my) = (mean(x), mean(y));
    let sxy: f64 = x.iter().zip(y).map(|(a, b)| (a - mx) * (b - my)).sum();
    let sxx: f64 = x.iter().map(|a| (a - mx) * (a - mx)).sum();
    let syy: f64 = y.iter().map(|b| (b - my) * (b - my)).sum();
    sxy / (sxx * syy).sqrt()
}

fn paired_t(d: &[f64]) -> f64 {
    let m = mean(d);
    let var = d.iter().map(|v| (v - m) * (v - m)).sum::<f64>() / (d.len() as f64 - 1.0);
    m / (var / d.len() as f64).sqrt()
}

/// Every distinct arrangement of a multiset (common practice, no single
/// source): recursive placement.
fn arrangements(items: &[usize]) -> Vec<Vec<usize>> {
    let mut sorted = items.to_vec();
    sorted.sort();
    let mut out = Vec::new();
    fn place(rest: &mut Vec<usize>, current: &mut Vec<usize>, out: &mut Vec<Vec<usize>>) {
        if rest.is_empty() {
            out.push(current.clone());
            return;
        }
        let mut seen = Vec::new();
        for i in 0..rest.len() {
            if seen.contains(&rest[i]) {
                continue;
            }
            seen.push(rest[i]);
            let v = rest.remove(i);
            current.push(v);
            place(rest, current, out);
            current.pop();
            rest.insert(i, v);
        }
    }
    place(&mut sorted, &mut Vec::new(), &mut out);
    out
}

fn exact_p(observed: f64, all: &[f64]) -> f64 {
    let reached = all
        .iter()
        .filter(|&&t| t >= observed - 1e-9 * (1.0 + observed.abs()))
        .count();
    reached as f64 / all.len() as f64
}

fn group_sheet(classes: &[usize], extra: Option<&[usize]>) -> String {
    let mut text = String::from("sample\tgroup\tbatch\n");
    for (i, c) in classes.iter().enumerate() {
        let b = extra.map(|e| e[i]).unwrap_or(0);
        text.push_str(&format!("s{i}\tg{c}\tb{b}\n"));
    }
    text
}

#[test]
fn k_groups_exact_enumeration_equals_brute_force() {
    let classes = [0usize, 1, 2, 0, 1, 2, 0];
    let mut rng = TestRng::new(3);
    let rows: Vec<Vec<f64>> = (0..5)
        .map(|f| {
            classes
                .iter()
                .map(|&c| rng.normal() + 0.7 * f as f64 * c as f64)
                .collect()
        })
        .chain(std::iter::once(vec![1.0, 2.0, 2.0, 1.0, 3.0, 3.0, 2.0]))
        .collect();
    let dir = tempfile::tempdir().unwrap();
    let columns = DesignColumns {
        group: Some("group".into()),
        ..Default::default()
    };
    for test in [TestKind::Anova, TestKind::Kruskal] {
        let mut o = options(dir.path());
        o.test = test;
        o.perms = 5000;
        let summary = scan_with_sheet(
            &rows,
            &group_sheet(&classes, None),
            DesignKind::Groups,
            &columns,
            &o,
        );
        assert!(summary.exact);
        // 7! / (3! 2! 2!) = 210 arrangements.
        assert_eq!(summary.relabelings, 209);
        let p = Table::read(&summary.results_path).f64s("p_perm");
        for (f, row) in rows.iter().enumerate() {
            let values: Vec<f64> = if test == TestKind::Kruskal {
                // Mid-ranks: count below plus half the ties.
                row.iter()
                    .map(|v| {
                        row.iter().filter(|y| *y < v).count() as f64
                            + (row.iter().filter(|y| *y == v).count() as f64 + 1.0) / 2.0
                    })
                    .collect()
            } else {
                row.clone()
            };
            let all: Vec<f64> = arrangements(&classes)
                .iter()
                .map(|a| f_statistic(&values, a, 3))
                .collect();
            let expected = exact_p(f_statistic(&values, &classes, 3), &all);
            assert!(
                (p[f] - expected).abs() < 1e-12,
                "{test:?} feature {f}: {} vs {expected}",
                p[f]
            );
        }
    }
}

#[test]
fn trait_correlation_exact_enumeration_equals_brute_force() {
    let trait_values = [3.1, 0.5, 2.2, 4.8, 1.0, 2.2];
    let mut text = String::from("sample\tage\n");
    for (i, t) in trait_values.iter().enumerate() {
        text.push_str(&format!("s{i}\t{t}\n"));
    }
    let mut rng = TestRng::new(4);
    let rows: Vec<Vec<f64>> = (0..6)
        .map(|f| {
            trait_values
                .iter()
                .map(|&t| rng.normal() + 0.5 * f as f64 * t)
                .collect()
        })
        .collect();
    let dir = tempfile::tempdir().unwrap();
    let columns = DesignColumns {
        trait_column: Some("age".into()),
        ..Default::default()
    };
    for (test, side) in [
        (TestKind::Pearson, Side::Both),
        (TestKind::Spearman, Side::Greater),
    ] {
        let mut o = options(dir.path());
        o.test = test;
        o.side = side;
        o.perms = 5000;
        let summary = scan_with_sheet(&rows, &text, DesignKind::Trait, &columns, &o);
        assert!(summary.exact);
        // 6! / 2! distinct arrangements of the trait (one tie).
        assert_eq!(summary.relabelings, 359);
        let p = Table::read(&summary.results_path).f64s("p_perm");
        let rank = |v: &[f64]| -> Vec<f64> {
            v.iter()
                .map(|a| {
                    v.iter().filter(|y| *y < a).count() as f64
                        + (v.iter().filter(|y| *y == a).count() as f64 + 1.0) / 2.0
                })
                .collect()
        };
        for (f, row) in rows.iter().enumerate() {
            let (x, t) = if test == TestKind::Spearman {
                (rank(row), rank(&trait_values))
            } else {
                (row.clone(), trait_values.to_vec())
            };
            let orient = |r: f64| if side == Side::Both { r.abs() } else { r };
            let positions: Vec<usize> = (0..6).collect();
            let all: Vec<f64> = arrangements(&positions)
                .iter()
                .map(|perm| {
                    let permuted: Vec<f64> = perm.iter().map(|&i| t[i]).collect();
                    orient(pearson(&x, &permuted))
                })
                .collect();
            // Permutations of tied trait values repeat; the exact p-value
            // over distinct arrangements equals the one over all 720.
            let expected = exact_p(orient(pearson(&x, &t)), &all);
            assert!(
                (p[f] - expected).abs() < 1e-12,
                "{test:?} feature {f}: {} vs {expected}",
                p[f]
            );
        }
    }
}

/// Student (1908), Biometrika 6: the sleep data paired by patient; paired
/// t = -4.0621, df = 9, p = 0.002833 (values checked with scipy.stats.ttest_rel,
/// as listed in the project's design notes).
const SLEEP_A: [f64; 10] = [0.7, -1.6, -0.2, -1.2, -0.1, 3.4, 3.7, 0.8, 0.0, 2.0];
const SLEEP_B: [f64; 10] = [1.9, 0.8, 1.1, 0.1, -0.1, 4.4, 5.5, 1.6, 4.6, 3.4];

fn sleep_sheet() -> String {
    let mut text = String::from("sample\tdrug\tpatient\n");
    for i in 0..10 {
        text.push_str(&format!("a{i}\tB\tp{i}\n"));
    }
    for i in 0..10 {
        text.push_str(&format!("b{i}\tA\tp{i}\n"));
    }
    text
}

#[test]
fn paired_sleep_data_matches_published_t_and_exact_flips() {
    // Drug A in condition "B" so that the published sign (A minus B) comes out.
    let row: Vec<f64> = SLEEP_A.iter().chain(SLEEP_B.iter()).copied().collect();
    let dir = tempfile::tempdir().unwrap();
    let mut o = options(dir.path());
    o.test = TestKind::PairedT;
    o.perms = 2000;
    let columns = DesignColumns {
        group: Some("drug".into()),
        levels: Some(vec!["A".into(), "B".into()]),
        pair: Some("patient".into()),
        ..Default::default()
    };
    let summary = scan_with_sheet(&[row], &sleep_sheet(), DesignKind::Paired, &columns, &o);
    assert!(summary.exact);
    assert_eq!(summary.relabelings, 1023);
    let table = Table::read(&summary.results_path);
    assert!((table.f64s("statistic")[0] - -4.0621).abs() < 1e-4);
    assert!((table.f64s("p_param")[0] - 0.002833).abs() < 1e-6);
    // All 2^10 sign flips of the differences, by brute force.
    let d: Vec<f64> = SLEEP_A.iter().zip(&SLEEP_B).map(|(a, b)| a - b).collect();
    let all: Vec<f64> = (0..1u32 << 10)
        .map(|mask| {
            let flipped: Vec<f64> = d
                .iter()
                .enumerate()
                .map(|(i, v)| if mask >> i & 1 == 1 { -v } else { *v })
                .collect();
            paired_t(&flipped).abs()
        })
        .collect();
    let expected = exact_p(paired_t(&d).abs(), &all);
    assert!((table.f64s("p_perm")[0] - expected).abs() < 1e-12);
}

#[test]
fn stratified_exact_enumeration_equals_brute_force() {
    // Two strata; relabelings only exchange samples within a stratum.
    let classes = [0usize, 1, 0, 1, 1, 0, 1, 0, 1];
    let batch = [0usize, 0, 0, 0, 1, 1, 1, 1, 1];
    let mut rng = TestRng::new(12);
    let rows: Vec<Vec<f64>> = (0..4)
        .map(|f| {
            classes
                .iter()
                .zip(&batch)
                .map(|(&c, &b)| rng.normal() + 3.0 * b as f64 + 0.8 * f as f64 * c as f64)
                .collect()
        })
        .collect();
    let dir = tempfile::tempdir().unwrap();
    let mut o = options(dir.path());
    o.test = TestKind::Welch;
    o.perms = 5000;
    o.strata = Some("batch".into());
    let columns = DesignColumns {
        group: Some("group".into()),
        strata: Some("batch".into()),
        ..Default::default()
    };
    let summary = scan_with_sheet(
        &rows,
        &group_sheet(&classes, Some(&batch)),
        DesignKind::Groups,
        &columns,
        &o,
    );
    assert!(summary.exact);
    // C(4,2) * C(5,3) = 60 arrangements within strata.
    assert_eq!(summary.relabelings, 59);
    let p = Table::read(&summary.results_path).f64s("p_perm");
    let welch = |x: &[f64], g: &[usize]| {
        let pick = |c: usize| -> Vec<f64> {
            x.iter()
                .zip(g)
                .filter(|(_, &k)| k == c)
                .map(|(v, _)| *v)
                .collect()
        };
        let (a, b) = (pick(0), pick(1));
        let var = |v: &[f64]| {
            let m = mean(v);
            v.iter().map(|y| (y - m) * (y - m)).sum::<f64>() / (v.len() as f64 - 1.0)
        };
        ((mean(&b) - mean(&a)) / (var(&a) / a.len() as f64 + var(&b) / b.len() as f64).sqrt()).abs()
    };
    let first = arrangements(&classes[..4]);
    let second = arrangements(&classes[4..]);
    for (f, row) in rows.iter().enumerate() {
        let mut all = Vec::new();
        for x in &first {
            for y in &second {
                let g: Vec<usize> = x.iter().chain(y.iter()).copied().collect();
                all.push(welch(row, &g));
            }
        }
        let expected = exact_p(welch(row, &classes), &all);
        assert!(
            (p[f] - expected).abs() < 1e-12,
            "feature {f}: {} vs {expected}",
            p[f]
        );
    }
}

/// A batch effect confounded with the group: under the null (no group
/// effect within batch), unstratified relabelings mistake the batch for an
/// effect; stratified ones stay calibrated (common practice, no single
/// source: exchangeability holds only within batches); the stratified count
/// at p <= 0.05 must fall in its binomial 99.9% interval.
#[test]
fn strata_keep_a_confounded_batch_calibrated() {
    use statrs::distribution::{Binomial, DiscreteCDF};
    // Batch 1 holds mostly group B; batch shifts values by 2.
    let classes: Vec<usize> = (0..24)
        .map(|i| usize::from(i % 4 != 0 && i >= 12 || i % 4 == 0 && i < 12))
        .collect();
    let batch: Vec<usize> = (0..24).map(|i| usize::from(i >= 12)).collect();
    let mut rng = TestRng::new(77);
    let rows: Vec<Vec<f64>> = (0..1000)
        .map(|_| {
            batch
                .iter()
                .map(|&b| rng.normal() + 2.0 * b as f64)
                .collect()
        })
        .collect();
    let sheet = group_sheet(&classes, Some(&batch));
    let dir = tempfile::tempdir().unwrap();
    let mut hits = Vec::new();
    for strata in [None, Some("batch")] {
        let mut o = options(dir.path());
        o.test = TestKind::Student;
        o.perms = 999;
        o.strata = strata.map(String::from);
        let columns = DesignColumns {
            group: Some("group".into()),
            strata: strata.map(String::from),
            ..Default::default()
        };
        let summary = scan_with_sheet(&rows, &sheet, DesignKind::Groups, &columns, &o);
        let p = Table::read(&summary.results_path).f64s("p_perm");
        hits.push(p.iter().filter(|&&v| v <= 0.05).count() as u64);
    }
    let binomial = Binomial::new(0.05, 1000).unwrap();
    let (low, high) = (binomial.inverse_cdf(0.0005), binomial.inverse_cdf(0.9995));
    assert!(
        (low..=high).contains(&hits[1]),
        "stratified: {} hits, expected [{low}, {high}]",
        hits[1]
    );
    assert!(
        hits[0] > high,
        "unstratified should be miscalibrated here: {} hits",
        hits[0]
    );
}

/// Ordinary least squares by the normal equations, solved by Gauss–Jordan
/// elimination (textbook, independent of riffle's Gram–Schmidt): returns the
/// coefficients and the t statistic of column `j`.
fn ols_t(columns: &[Vec<f64>], y: &[f64], j: usize) -> (f64, f64) {
    let (beta, inverse, _) = least_squares(columns, y);
    let (n, p) = (y.len(), columns.len());
    let rss: f64 = (0..n)
        .map(|i| {
            let fit: f64 = (0..p).map(|r| beta[r] * columns[r][i]).sum();
            (y[i] - fit) * (y[i] - fit)
        })
        .sum();
    let sigma2 = rss / (n - p) as f64;
    (beta[j], beta[j] / (sigma2 * inverse[j][j]).sqrt())
}

/// Fitted values of the least-squares fit of y on `columns`.
fn fitted(columns: &[Vec<f64>], y: &[f64]) -> Vec<f64> {
    let (beta, _, _) = least_squares(columns, y);
    (0..y.len())
        .map(|i| (0..columns.len()).map(|r| beta[r] * columns[r][i]).sum())
        .collect()
}

/// Freedman–Lane by brute force: `statistic` of y* = P e + H_Z y for every
/// permutation P of the residuals e of the nuisance fit (Winkler et al.
/// 2014, NeuroImage 92).
fn freedman_lane_null(
    nuisance: &[Vec<f64>],
    y: &[f64],
    statistic: impl Fn(&[f64]) -> f64,
) -> Vec<f64> {
    let fit = fitted(nuisance, y);
    let resid: Vec<f64> = y.iter().zip(&fit).map(|(a, b)| a - b).collect();
    let positions: Vec<usize> = (0..y.len()).collect();
    arrangements(&positions)
        .iter()
        .map(|perm| {
            let y_star: Vec<f64> = (0..y.len()).map(|i| resid[perm[i]] + fit[i]).collect();
            statistic(&y_star)
        })
        .collect()
}

fn covariate_sheet(classes: &[usize], age: &[f64], site: &[&str]) -> String {
    let mut text = String::from("sample\tgroup\tage\tsite\n");
    for i in 0..classes.len() {
        text.push_str(&format!("s{i}\tg{}\t{}\t{}\n", classes[i], age[i], site[i]));
    }
    text
}

/// Freedman–Lane (Winkler et al. 2014, NeuroImage 92): with every one of
/// the 7! permutations of the residuals listed, p_perm equals the share of
/// permuted data sets y* = P e + H_Z y whose full-model t reaches the
/// observed one; p_param and the effect equal the OLS fit.
#[test]
fn freedman_lane_exact_enumeration_and_ols_agree() {
    let classes = [0usize, 1, 0, 1, 1, 0, 1];
    let age = [31.0, 45.0, 52.0, 38.0, 61.0, 29.0, 50.0];
    let site = ["x", "y", "y", "x", "y", "x", "x"];
    let mut rng = TestRng::new(21);
    let rows: Vec<Vec<f64>> = (0..4)
        .map(|f| {
            (0..7)
                .map(|i| {
                    2.0 + 0.05 * age[i] + rng.normal() * 0.5 + 0.6 * f as f64 * classes[i] as f64
                })
                .collect()
        })
        .collect();
    let dir = tempfile::tempdir().unwrap();
    let mut o = options(dir.path());
    o.test = TestKind::Student;
    o.perms = 6000;
    o.covariates = vec!["age".into(), "site".into()];
    let columns = DesignColumns {
        group: Some("group".into()),
        covariates: o.covariates.clone(),
        ..Default::default()
    };
    let summary = scan_with_sheet(
        &rows,
        &covariate_sheet(&classes, &age, &site),
        DesignKind::Groups,
        &columns,
        &o,
    );
    assert!(summary.exact);
    assert_eq!(summary.relabelings, 5039);
    let table = Table::read(&summary.results_path);
    let (p_perm, p_param, t, effect) = (
        table.f64s("p_perm"),
        table.f64s("p_param"),
        table.f64s("statistic"),
        table.f64s("effect"),
    );
    let ones = vec![1.0; 7];
    let group: Vec<f64> = classes.iter().map(|&c| c as f64).collect();
    let site_y: Vec<f64> = site
        .iter()
        .map(|&s| f64::from(u8::from(s == "y")))
        .collect();
    let full = vec![group.clone(), ones.clone(), age.to_vec(), site_y.clone()];
    let nuisance = vec![ones, age.to_vec(), site_y];
    let student = statrs::distribution::StudentsT::new(0.0, 1.0, 3.0).unwrap();
    use statrs::distribution::ContinuousCDF;
    for (f, y) in rows.iter().enumerate() {
        let (beta, t_obs) = ols_t(&full, y, 0);
        assert!(
            (effect[f] - beta).abs() < 1e-9,
            "feature {f}: effect {} vs {beta}",
            effect[f]
        );
        assert!(
            (t[f] - t_obs).abs() < 1e-9,
            "feature {f}: t {} vs {t_obs}",
            t[f]
        );
        assert!((p_param[f] - 2.0 * student.sf(t_obs.abs())).abs() < 1e-9);
        let all = freedman_lane_null(&nuisance, y, |y_star| ols_t(&full, y_star, 0).1.abs());
        let expected = exact_p(t_obs.abs(), &all);
        assert!(
            (p_perm[f] - expected).abs() < 1e-12,
            "feature {f}: {} vs {expected}",
            p_perm[f]
        );
    }
}

/// Type I error of Freedman–Lane under the null with a covariate strongly
/// correlated with the group (common practice, no single source: the
/// nominal level holds approximately): share at p_perm <= 0.05 over 2,000
/// null features within its binomial 99.9% interval.
#[test]
fn freedman_lane_is_calibrated_with_a_confounding_covariate() {
    use statrs::distribution::{Binomial, DiscreteCDF};
    let n = 30;
    let classes: Vec<usize> = (0..n).map(|i| usize::from(i >= n / 2)).collect();
    let mut rng = TestRng::new(8);
    let age: Vec<f64> = classes
        .iter()
        .map(|&c| 40.0 + 10.0 * c as f64 + 5.0 * rng.normal())
        .collect();
    let site: Vec<&str> = (0..n).map(|i| if i % 3 == 0 { "a" } else { "b" }).collect();
    let rows: Vec<Vec<f64>> = (0..2000)
        .map(|_| age.iter().map(|a| 0.1 * a + rng.normal()).collect())
        .collect();
    let dir = tempfile::tempdir().unwrap();
    let mut o = options(dir.path());
    o.test = TestKind::Student;
    o.perms = 999;
    o.covariates = vec!["age".into(), "site".into()];
    let columns = DesignColumns {
        group: Some("group".into()),
        covariates: o.covariates.clone(),
        ..Default::default()
    };
    let summary = scan_with_sheet(
        &rows,
        &covariate_sheet(&classes, &age, &site),
        DesignKind::Groups,
        &columns,
        &o,
    );
    let p = Table::read(&summary.results_path).f64s("p_perm");
    let hits = p.iter().filter(|&&v| v <= 0.05).count() as u64;
    let binomial = Binomial::new(0.05, 2000).unwrap();
    let (low, high) = (binomial.inverse_cdf(0.0005), binomial.inverse_cdf(0.9995));
    assert!(
        (low..=high).contains(&hits),
        "{hits} of 2000 at p <= 0.05, expected [{low}, {high}]"
    );
}

/// Residual sum of squares of the least-squares fit of y on `columns`.
fn rss(columns: &[Vec<f64>], y: &[f64]) -> f64 {
    let fit = fitted(columns, y);
    y.iter().zip(&fit).map(|(a, b)| (a - b) * (a - b)).sum()
}

/// k groups with a covariate (Freedman–Lane for the F of several effect
/// columns, Winkler et al. 2014, NeuroImage 92): the reported F is the
/// textbook extra-sum-of-squares F of the group indicators after the
/// intercept and age, p_param its F(2, 3) tail, the effect the partial eta
/// squared, and with all 7! residual permutations listed, p_perm equals the
/// share of permuted data sets y* = P e + H_Z y whose F reaches the observed.
#[test]
fn freedman_lane_k_groups_exact_enumeration_and_ols_agree() {
    use statrs::distribution::{ContinuousCDF, FisherSnedecor};
    let classes = [0usize, 1, 2, 0, 1, 2, 1];
    let age = [31.0, 45.0, 52.0, 38.0, 61.0, 29.0, 50.0];
    let site = ["x"; 7];
    let mut rng = TestRng::new(33);
    let rows: Vec<Vec<f64>> = (0..4)
        .map(|f| {
            (0..7)
                .map(|i| {
                    1.0 + 0.04 * age[i] + rng.normal() * 0.5 + 0.5 * f as f64 * classes[i] as f64
                })
                .collect()
        })
        .collect();
    let dir = tempfile::tempdir().unwrap();
    let mut o = options(dir.path());
    o.test = TestKind::Anova;
    o.perms = 6000;
    o.covariates = vec!["age".into()];
    let columns = DesignColumns {
        group: Some("group".into()),
        covariates: o.covariates.clone(),
        ..Default::default()
    };
    let summary = scan_with_sheet(
        &rows,
        &covariate_sheet(&classes, &age, &site),
        DesignKind::Groups,
        &columns,
        &o,
    );
    assert!(summary.exact);
    let table = Table::read(&summary.results_path);
    let (p_perm, p_param, f_reported, effect) = (
        table.f64s("p_perm"),
        table.f64s("p_param"),
        table.f64s("statistic"),
        table.f64s("effect"),
    );
    let indicator = |level: usize| -> Vec<f64> {
        classes
            .iter()
            .map(|&c| f64::from(u8::from(c == level)))
            .collect()
    };
    let nuisance = vec![vec![1.0; 7], age.to_vec()];
    let mut full = nuisance.clone();
    full.push(indicator(1));
    full.push(indicator(2));
    let f_of = |y: &[f64]| {
        let (reduced, complete) = (rss(&nuisance, y), rss(&full, y));
        ((reduced - complete) / 2.0) / (complete / 3.0)
    };
    let reference = FisherSnedecor::new(2.0, 3.0).unwrap();
    for (f, y) in rows.iter().enumerate() {
        let f_obs = f_of(y);
        assert!(
            (f_reported[f] - f_obs).abs() < 1e-9 * (1.0 + f_obs),
            "feature {f}: F {} vs {f_obs}",
            f_reported[f]
        );
        assert!((p_param[f] - reference.sf(f_obs)).abs() < 1e-9);
        let (reduced, complete) = (rss(&nuisance, y), rss(&full, y));
        assert!((effect[f] - (reduced - complete) / reduced).abs() < 1e-9);
        let all = freedman_lane_null(&nuisance, y, f_of);
        let expected = exact_p(f_obs, &all);
        assert!(
            (p_perm[f] - expected).abs() < 1e-12,
            "feature {f}: {} vs {expected}",
            p_perm[f]
        );
    }
}
