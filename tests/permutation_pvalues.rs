//! Permutation p-values against independent computations: brute-force
//! enumeration, the t distribution, and the uniform law under the null.

mod common;

use common::{options, scan_rows, Table, TestRng};
use riffle::stats::{Side, TestKind};
use statrs::distribution::{Binomial, DiscreteCDF};

/// Statistic of one labelling, written from the textbook definitions on the
/// raw values, independently of riffle's standardized kernel.
fn textbook_statistic(test: TestKind, x: &[f64], in_b: &[bool]) -> f64 {
    let pick = |b: bool| -> Vec<f64> {
        x.iter()
            .zip(in_b)
            .filter(|(_, &g)| g == b)
            .map(|(v, _)| *v)
            .collect()
    };
    let (a, bb) = (pick(false), pick(true));
    let mean = |v: &[f64]| v.iter().sum::<f64>() / v.len() as f64;
    let var = |v: &[f64]| {
        let m = mean(v);
        v.iter().map(|x| (x - m) * (x - m)).sum::<f64>() / (v.len() as f64 - 1.0)
    };
    let (na, nb) = (a.len() as f64, bb.len() as f64);
    match test {
        TestKind::Welch => (mean(&bb) - mean(&a)) / (var(&a) / na + var(&bb) / nb).sqrt(),
        TestKind::Student => {
            let pooled = ((na - 1.0) * var(&a) + (nb - 1.0) * var(&bb)) / (na + nb - 2.0);
            (mean(&bb) - mean(&a)) / (pooled * (1.0 / na + 1.0 / nb)).sqrt()
        }
        TestKind::MeanDiff => mean(&bb) - mean(&a),
        TestKind::RankSum => {
            // Rank sum of B minus its null mean nB(n+1)/2 (so that the
            // two-sided statistic is its absolute value); mid-rank of each
            // value: count below plus half the ties.
            let n = x.len() as f64;
            -nb * (n + 1.0) / 2.0
                + x.iter()
                    .zip(in_b)
                    .filter(|(_, &g)| g)
                    .map(|(v, _)| {
                        let below = x.iter().filter(|y| *y < v).count() as f64;
                        let equal = x.iter().filter(|y| *y == v).count() as f64;
                        below + (equal + 1.0) / 2.0
                    })
                    .sum::<f64>()
        }
        other => unreachable!("{other:?} is not a two-group test"),
    }
}

fn orient(side: Side, t: f64) -> f64 {
    match side {
        Side::Both => t.abs(),
        Side::Greater => t,
        Side::Less => -t,
    }
}

/// Exact p-value by listing every split of the samples into the observed
/// group sizes (common practice, no single source).
fn brute_force_p(test: TestKind, side: Side, x: &[f64], labels: &[u8]) -> f64 {
    let n = x.len();
    let k = labels.iter().filter(|&&l| l == 1).count();
    let observed: Vec<bool> = labels.iter().map(|&l| l == 1).collect();
    let t_obs = orient(side, textbook_statistic(test, x, &observed));
    let (mut extreme, mut total) = (0u64, 0u64);
    for mask in 0u32..(1 << n) {
        if mask.count_ones() as usize != k {
            continue;
        }
        let in_b: Vec<bool> = (0..n).map(|i| mask >> i & 1 == 1).collect();
        let t = orient(side, textbook_statistic(test, x, &in_b));
        total += 1;
        if t >= t_obs - 1e-9 * (1.0 + t_obs.abs()) {
            extreme += 1;
        }
    }
    extreme as f64 / total as f64
}

#[test]
fn exact_enumeration_equals_brute_force() {
    // 4 vs 5 samples: 126 splits, fewer than --perms, so riffle enumerates.
    let labels = [0, 1, 1, 0, 1, 0, 1, 0, 1];
    let mut rng = TestRng::new(11);
    let mut rows: Vec<Vec<f64>> = (0..6)
        .map(|f| {
            (0..9)
                .map(|i| rng.normal() + if labels[i] == 1 { 0.4 * f as f64 } else { 0.0 })
                .collect()
        })
        .collect();
    // Heavy ties, as in counts or ranks.
    rows.push(vec![1.0, 2.0, 2.0, 1.0, 3.0, 1.0, 2.0, 2.0, 3.0]);
    rows.push(vec![0.0, 1.0, 1.0, 0.0, 1.0, 0.0, 0.0, 1.0, 1.0]);
    let dir = tempfile::tempdir().unwrap();
    for test in [
        TestKind::Welch,
        TestKind::Student,
        TestKind::MeanDiff,
        TestKind::RankSum,
    ] {
        for side in [Side::Both, Side::Greater, Side::Less] {
            let mut o = options(dir.path());
            o.test = test;
            o.side = side;
            o.perms = 1000;
            let summary = scan_rows(&rows, &labels, &o);
            assert!(summary.exact);
            assert_eq!(summary.relabelings, 125);
            let table = Table::read(&summary.results_path);
            let p = table.f64s("p_perm");
            for (f, row) in rows.iter().enumerate() {
                let expected = brute_force_p(test, side, row, &labels);
                assert!(
                    (p[f] - expected).abs() < 1e-12,
                    "{test:?} {side:?} feature {f}: riffle {} brute force {expected}",
                    p[f]
                );
                assert_eq!(table.text("p_source")[f], "exact");
            }
        }
    }
}

/// Common practice (no single source): with normal data the permutation
/// p-value of the t statistic lies within Monte Carlo error of the t-test
/// p-value; the Monte Carlo standard error of a sampled p is sqrt(p(1-p)/B).
#[test]
fn sampled_p_within_four_monte_carlo_errors_of_student_t() {
    let labels: Vec<u8> = (0..40).map(|i| u8::from(i % 2 == 1)).collect();
    let mut rng = TestRng::new(5);
    let rows: Vec<Vec<f64>> = (0..40)
        .map(|f| {
            let shift = 0.03 * f as f64;
            labels
                .iter()
                .map(|&l| rng.normal() + if l == 1 { shift } else { 0.0 })
                .collect()
        })
        .collect();
    let dir = tempfile::tempdir().unwrap();
    let mut o = options(dir.path());
    o.test = TestKind::Student;
    o.perms = 20_000;
    o.seed = 99;
    let summary = scan_rows(&rows, &labels, &o);
    assert!(!summary.exact);
    let table = Table::read(&summary.results_path);
    let (perm, param) = (table.f64s("p_perm"), table.f64s("p_param"));
    for f in 0..rows.len() {
        let se = (param[f] * (1.0 - param[f]) / 20_000.0).sqrt();
        assert!(
            (perm[f] - param[f]).abs() <= 4.0 * se + 1.0 / 20_001.0,
            "feature {f}: p_perm {} p_param {} se {se}",
            perm[f],
            param[f]
        );
    }
}

/// Under the null, P(p_perm <= 0.05) = 50/1000 exactly for B = 999; the
/// count among 2,000 null features must fall in its binomial 99.9% interval.
#[test]
fn null_features_are_calibrated() {
    let labels: Vec<u8> = (0..20).map(|i| u8::from(i >= 10)).collect();
    let mut rng = TestRng::new(2024);
    let rows: Vec<Vec<f64>> = (0..2000)
        .map(|_| (0..20).map(|_| rng.normal()).collect())
        .collect();
    let dir = tempfile::tempdir().unwrap();
    let binomial = Binomial::new(0.05, 2000).unwrap();
    let (low, high) = (binomial.inverse_cdf(0.0005), binomial.inverse_cdf(0.9995));
    for test in [TestKind::Welch, TestKind::RankSum] {
        let mut o = options(dir.path());
        o.test = test;
        o.perms = 999;
        let summary = scan_rows(&rows, &labels, &o);
        let table = Table::read(&summary.results_path);
        let hits = table.f64s("p_perm").iter().filter(|&&p| p <= 0.05).count() as u64;
        assert!(
            (low..=high).contains(&hits),
            "{test:?}: {hits} of 2000 null features at p <= 0.05, expected within [{low}, {high}]"
        );
    }
}

#[test]
fn results_do_not_depend_on_threads_or_chunk_size() {
    let labels: Vec<u8> = (0..16).map(|i| u8::from(i % 3 == 0)).collect();
    let mut rng = TestRng::new(8);
    let mut rows: Vec<Vec<f64>> = (0..3000)
        .map(|f| {
            labels
                .iter()
                .map(|&l| rng.normal() * (1.0 + f as f64 % 7.0) + f64::from(l) * 0.5)
                .collect()
        })
        .collect();
    rows[17] = vec![3.0; 16];
    for row in rows.iter_mut().skip(100).step_by(50) {
        for v in row.iter_mut() {
            *v = v.round();
        }
    }
    for format in [
        riffle::output::TableFormat::Tsv,
        riffle::output::TableFormat::Parquet,
    ] {
        for test in [TestKind::Welch, TestKind::RankSum] {
            let mut outputs = Vec::new();
            for (threads, chunk) in [(1, 5000), (2, 37), (2, 1000)] {
                let dir = tempfile::tempdir().unwrap();
                let mut o = options(dir.path());
                o.format = format;
                o.test = test;
                o.perms = 700;
                o.threads = threads;
                o.chunk_rows = Some(chunk);
                o.pooled_null = true;
                let summary = scan_rows(&rows, &labels, &o);
                outputs.push(std::fs::read(&summary.results_path).unwrap());
            }
            assert_eq!(
                outputs[0], outputs[1],
                "{format:?} {test:?}: 1 vs 2 threads"
            );
            assert_eq!(outputs[1], outputs[2], "{format:?} {test:?}: chunk sizes");
        }
    }
}
