//! Features with missing values are tested on their observed samples:
//! statistics from the textbook formulas on the observed values, exact
//! permutation p-values against brute force over every split of all
//! samples (the missing ones drop out of whichever group they land in),
//! maxT across complete and masked features, `--min-observed`, and
//! complete features unchanged by masked ones beside them; the same for
//! pairs, Pearson, Spearman (trait ranked among the observed samples) and
//! covariate designs (Freedman–Lane over the observed samples alone).

mod common;

use common::{least_squares, options, scan_rows, Table, TestRng};
use riffle::design::Relabelings;
use riffle::stats::{Side, TestKind};

/// Observed values of group B (`true`) or A under a split.
fn observed(x: &[f64], in_b: &[bool], b: bool) -> Vec<f64> {
    x.iter()
        .zip(in_b)
        .filter(|(v, &g)| g == b && !v.is_nan())
        .map(|(v, _)| *v)
        .collect()
}

fn mean(v: &[f64]) -> f64 {
    v.iter().sum::<f64>() / v.len() as f64
}

fn var(v: &[f64]) -> f64 {
    let m = mean(v);
    v.iter().map(|x| (x - m) * (x - m)).sum::<f64>() / (v.len() as f64 - 1.0)
}

/// Signed statistic of a split on the observed values, from the textbook
/// definitions; a split that leaves a group too few values for the
/// statistic scores 0 (riffle's documented rule). Mean difference is
/// permuted through the pooled-variance t, as riffle documents.
fn textbook(test: TestKind, x: &[f64], in_b: &[bool]) -> f64 {
    let (a, b) = (observed(x, in_b, false), observed(x, in_b, true));
    let (na, nb) = (a.len() as f64, b.len() as f64);
    match test {
        TestKind::Welch => {
            if a.len() < 2 || b.len() < 2 {
                return 0.0;
            }
            let t = (mean(&b) - mean(&a)) / (var(&a) / na + var(&b) / nb).sqrt();
            if t.is_nan() {
                0.0
            } else {
                t
            }
        }
        TestKind::Student | TestKind::MeanDiff => {
            if a.is_empty() || b.is_empty() {
                return 0.0;
            }
            let ss = |v: &[f64]| {
                let m = mean(v);
                v.iter().map(|x| (x - m) * (x - m)).sum::<f64>()
            };
            let pooled = (ss(&a) + ss(&b)) / (na + nb - 2.0);
            (mean(&b) - mean(&a)) / (pooled * (1.0 / na + 1.0 / nb)).sqrt()
        }
        TestKind::RankSum => {
            // Tie-corrected z-score of the Mann–Whitney U of B, without
            // continuity correction (Hollander & Wolfe, "Nonparametric
            // Statistical Methods", the large-sample form with ties).
            if a.is_empty() || b.is_empty() {
                return 0.0;
            }
            let all: Vec<f64> = a.iter().chain(&b).copied().collect();
            let n = all.len() as f64;
            let rank = |v: f64| {
                let below = all.iter().filter(|&&y| y < v).count() as f64;
                let equal = all.iter().filter(|&&y| y == v).count() as f64;
                below + (equal + 1.0) / 2.0
            };
            let u = b.iter().map(|&v| rank(v)).sum::<f64>() - nb * (nb + 1.0) / 2.0;
            let mut ties = 0.0;
            let mut seen: Vec<f64> = Vec::new();
            for &v in &all {
                if !seen.contains(&v) {
                    seen.push(v);
                    let t = all.iter().filter(|&&y| y == v).count() as f64;
                    ties += t * t * t - t;
                }
            }
            let sd = (na * nb / 12.0 * ((n + 1.0) - ties / (n * (n - 1.0)))).sqrt();
            (u - na * nb / 2.0) / sd
        }
        other => unreachable!("{other:?}"),
    }
}

fn orient(side: Side, t: f64) -> f64 {
    match side {
        Side::Both => t.abs(),
        Side::Greater => t,
        Side::Less => -t,
    }
}

/// Exact p by listing every split of all samples into the design's group
/// sizes (common practice, no single source).
fn brute_force_p(test: TestKind, side: Side, x: &[f64], labels: &[u8]) -> f64 {
    let n = x.len();
    let k = labels.iter().filter(|&&l| l == 1).count();
    let in_b: Vec<bool> = labels.iter().map(|&l| l == 1).collect();
    let t_obs = orient(side, textbook(test, x, &in_b));
    let (mut extreme, mut total) = (0u64, 0u64);
    for mask in 0u32..(1 << n) {
        if mask.count_ones() as usize != k {
            continue;
        }
        let split: Vec<bool> = (0..n).map(|i| mask >> i & 1 == 1).collect();
        total += 1;
        if orient(side, textbook(test, x, &split)) >= t_obs - 1e-9 * (1.0 + t_obs.abs()) {
            extreme += 1;
        }
    }
    extreme as f64 / total as f64
}

/// Rows of 10 samples (5 vs 5) with one to three values missing, ties,
/// and two complete rows.
fn small_rows(labels: &[u8]) -> Vec<Vec<f64>> {
    let mut rng = TestRng::new(23);
    let mut rows: Vec<Vec<f64>> = (0..8)
        .map(|f| {
            let mut row: Vec<f64> = labels
                .iter()
                .map(|&l| rng.normal() + 0.5 * f as f64 * f64::from(l))
                .collect();
            for j in 0..=(f % 3) {
                row[(3 * f + 4 * j) % labels.len()] = f64::NAN;
            }
            row
        })
        .collect();
    rows.push(vec![1.0, 2.0, f64::NAN, 1.0, 3.0, 1.0, 2.0, 2.0, 3.0, 2.0]);
    rows.push(vec![
        0.0,
        1.0,
        1.0,
        f64::NAN,
        1.0,
        0.0,
        f64::NAN,
        1.0,
        1.0,
        0.0,
    ]);
    rows.push((0..10).map(|i| (i * 7 % 10) as f64).collect());
    rows.push((0..10).map(|_| rng.normal()).collect());
    rows
}

#[test]
fn exact_p_with_missing_values_equals_brute_force() {
    let labels = [0u8, 1, 1, 0, 1, 0, 1, 0, 1, 0];
    let rows = small_rows(&labels);
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
            o.min_observed = 2;
            let summary = scan_rows(&rows, &labels, &o);
            assert!(summary.exact);
            assert_eq!(summary.tested as usize, rows.len(), "{test:?}");
            let table = Table::read(&summary.results_path);
            let p = table.f64s("p_perm");
            for (f, row) in rows.iter().enumerate() {
                let expected = brute_force_p(test, side, row, &labels);
                assert!(
                    (p[f] - expected).abs() < 1e-12,
                    "{test:?} {side:?} feature {f}: riffle {} brute force {expected}",
                    p[f]
                );
            }
        }
    }
}

#[test]
fn statistics_and_counts_are_those_of_the_observed_values() {
    let labels = [0u8, 1, 1, 0, 1, 0, 1, 0, 1, 0];
    let rows = small_rows(&labels);
    let in_b: Vec<bool> = labels.iter().map(|&l| l == 1).collect();
    let dir = tempfile::tempdir().unwrap();
    for test in [TestKind::Welch, TestKind::Student, TestKind::MeanDiff] {
        let mut o = options(dir.path());
        o.test = test;
        o.perms = 200;
        o.min_observed = 2;
        let summary = scan_rows(&rows, &labels, &o);
        let table = Table::read(&summary.results_path);
        let (stat, effect) = (table.f64s("statistic"), table.f64s("effect"));
        let (n_a, n_b) = (table.f64s("n_a"), table.f64s("n_b"));
        for (f, row) in rows.iter().enumerate() {
            let (a, b) = (observed(row, &in_b, false), observed(row, &in_b, true));
            assert_eq!((n_a[f], n_b[f]), (a.len() as f64, b.len() as f64), "{f}");
            let diff = mean(&b) - mean(&a);
            assert!((effect[f] - diff).abs() < 1e-12, "{test:?} {f}");
            let expected = if test == TestKind::MeanDiff {
                diff
            } else {
                textbook(test, row, &in_b)
            };
            assert!(
                (stat[f] - expected).abs() < 1e-9 * (1.0 + expected.abs()),
                "{test:?} feature {f}: {} vs {expected}",
                stat[f]
            );
        }
    }
}

/// Single-step and step-down maxT (Westfall & Young 1993) over complete
/// and masked features together, against all statistics held in memory.
/// Welch: the kernel statistic is the Welch t of the observed values.
/// Student: a masked feature's t is put on the complete-data scale as the
/// group-B sum of standardized values a complete feature would need for
/// the same t: S1 = sqrt((N-1) t^2 / (N-2+t^2) * N_a N_b / N) (riffle's
/// documented choice; for a complete feature that is its own S1).
#[test]
fn maxt_compares_masked_and_complete_features_on_one_scale() {
    let labels: Vec<u8> = (0..24).map(|i| u8::from(i % 2 == 0)).collect();
    let n = labels.len() as f64;
    let mut rng = TestRng::new(41);
    let rows: Vec<Vec<f64>> = (0..120)
        .map(|f| {
            let shift = if f % 17 == 3 { 1.4 } else { 0.0 };
            labels
                .iter()
                .map(|&l| {
                    if f % 3 != 0 && rng.uniform() < 0.25 {
                        f64::NAN
                    } else {
                        rng.normal() + shift * f64::from(l)
                    }
                })
                .collect()
        })
        .collect();
    let (perms, seed) = (400, 12);
    let dir = tempfile::tempdir().unwrap();
    for test in [TestKind::Welch, TestKind::Student] {
        let mut o = options(dir.path());
        o.test = test;
        o.perms = perms;
        o.seed = seed;
        o.min_observed = 2;
        o.chunk_rows = Some(37);
        let summary = scan_rows(&rows, &labels, &o);
        assert_eq!(summary.tested as usize, rows.len());
        let table = Table::read(&summary.results_path);
        let (p_maxt, p_single) = (table.f64s("p_maxt"), table.f64s("p_maxt_single"));
        let p_perm = table.f64s("p_perm");
        let scale = |t: f64| -> f64 {
            match test {
                TestKind::Welch => t.abs(),
                _ => {
                    let u = if t.is_infinite() {
                        n - 1.0
                    } else {
                        (n - 1.0) * t * t / (n - 2.0 + t * t)
                    };
                    (u * 12.0 * 12.0 / n).sqrt()
                }
            }
        };
        let relabel = Relabelings::draw(&labels, perms, seed);
        let big_b = relabel.count;
        let split = |l: &[u8]| -> Vec<bool> { l.iter().map(|&v| v == 1).collect() };
        let obs: Vec<f64> = rows
            .iter()
            .map(|x| scale(textbook(test, x, &split(&labels))))
            .collect();
        let null: Vec<Vec<f64>> = rows
            .iter()
            .map(|x| {
                (0..big_b)
                    .map(|b| scale(textbook(test, x, &split(relabel.row(b)))))
                    .collect()
            })
            .collect();
        let tol = 1e-9;
        let denominator = (big_b + 1) as f64;
        let m = rows.len();
        let column_max: Vec<f64> = (0..big_b)
            .map(|b| null.iter().map(|t| t[b]).fold(f64::NEG_INFINITY, f64::max))
            .collect();
        let mut p_tilde = vec![0.0; m];
        for j in 0..m {
            let exceed = null[j]
                .iter()
                .filter(|&&t| t >= obs[j] * (1.0 - tol))
                .count();
            let expected = (exceed + 1) as f64 / denominator;
            assert!((p_perm[j] - expected).abs() < 1e-15, "{test:?} p_perm {j}");
            let single = column_max
                .iter()
                .filter(|&&c| c >= obs[j] * (1.0 - tol))
                .count();
            let expected = (single + 1) as f64 / denominator;
            assert!(
                (p_single[j] - expected).abs() < 1e-15,
                "{test:?} single-step {j}: riffle {} brute force {expected}",
                p_single[j]
            );
            let reached = (0..big_b)
                .filter(|&b| {
                    (0..m)
                        .filter(|&k| obs[k] <= obs[j] * (1.0 + tol))
                        .any(|k| null[k][b] >= obs[j] * (1.0 - tol))
                })
                .count();
            p_tilde[j] = (reached + 1) as f64 / denominator;
        }
        for j in 0..m {
            let expected = (0..m)
                .filter(|&k| obs[k] >= obs[j] * (1.0 - tol))
                .map(|k| p_tilde[k])
                .fold(0.0, f64::max);
            assert!(
                (p_maxt[j] - expected).abs() < 1e-15,
                "{test:?} step-down {j}: riffle {} brute force {expected}",
                p_maxt[j]
            );
        }
    }
}

#[test]
fn too_few_observed_values_are_untested_with_the_reason() {
    let labels: Vec<u8> = (0..12).map(|i| u8::from(i >= 6)).collect();
    let mut rng = TestRng::new(3);
    let mut row = |missing_b: usize| -> Vec<f64> {
        (0..12)
            .map(|i| {
                if i >= 6 && i < 6 + missing_b {
                    f64::NAN
                } else {
                    rng.normal()
                }
            })
            .collect()
    };
    // Group B keeps 3, 2, 0 observed values.
    let rows = vec![row(3), row(4), row(6), vec![f64::NAN; 12]];
    let dir = tempfile::tempdir().unwrap();
    let mut o = options(dir.path());
    o.perms = 99;
    let summary = scan_rows(&rows, &labels, &o);
    let table = Table::read(&summary.results_path);
    let note = table.text("note");
    assert_eq!(note[0], "");
    let source = table.text("p_source");
    for (f, (note, source)) in note.iter().zip(source).enumerate().skip(1) {
        assert_eq!(note, "too few observed values", "feature {f}");
        assert_eq!(source, "untested", "feature {f}");
    }
    assert_eq!(table.f64s("n_b")[1], 2.0);
    o.min_observed = 2;
    let summary = scan_rows(&rows, &labels, &o);
    let table = Table::read(&summary.results_path);
    assert_eq!(table.text("note")[1], "");
    assert_eq!(table.text("note")[2], "too few observed values");
}

/// A complete feature's results do not depend on masked features beside
/// it (the masked path is separate); the same per-feature columns whether
/// or not masked rows are interleaved, in tiles mixing both.
#[test]
fn complete_features_are_unchanged_by_masked_neighbours() {
    let labels: Vec<u8> = (0..20).map(|i| u8::from(i % 4 < 2)).collect();
    let mut rng = TestRng::new(17);
    let complete: Vec<Vec<f64>> = (0..150)
        .map(|f| {
            labels
                .iter()
                .map(|&l| rng.normal() + 0.02 * f as f64 * f64::from(l))
                .collect()
        })
        .collect();
    let mut mixed = Vec::new();
    let mut where_complete = Vec::new();
    for (f, row) in complete.iter().enumerate() {
        where_complete.push(mixed.len());
        mixed.push(row.clone());
        if f % 2 == 0 {
            let mut masked: Vec<f64> = (0..20).map(|_| rng.normal()).collect();
            masked[f % 20] = f64::NAN;
            mixed.push(masked);
        }
    }
    for test in [TestKind::Welch, TestKind::Student, TestKind::RankSum] {
        let dir_a = tempfile::tempdir().unwrap();
        let dir_b = tempfile::tempdir().unwrap();
        let mut o = options(dir_a.path());
        o.test = test;
        o.perms = 300;
        o.maxt = riffle::scan::MaxtMode::Single;
        let alone = Table::read(&scan_rows(&complete, &labels, &o).results_path);
        o.out = dir_b.path().to_path_buf();
        let beside = Table::read(&scan_rows(&mixed, &labels, &o).results_path);
        for column in [
            "effect",
            "statistic",
            "p_param",
            "p_perm",
            "n_exceed",
            "n_a",
            "n_b",
        ] {
            for (f, &g) in where_complete.iter().enumerate() {
                assert_eq!(
                    alone.text(column)[f],
                    beside.text(column)[g],
                    "{test:?} {column} feature {f}"
                );
            }
        }
    }
}

#[test]
fn masked_results_do_not_depend_on_threads_or_chunk_size() {
    let labels: Vec<u8> = (0..16).map(|i| u8::from(i % 3 == 0)).collect();
    let mut rng = TestRng::new(8);
    let rows: Vec<Vec<f64>> = (0..1500)
        .map(|f| {
            labels
                .iter()
                .map(|&l| {
                    if rng.uniform() < 0.1 {
                        f64::NAN
                    } else {
                        rng.normal() * (1.0 + f as f64 % 7.0) + f64::from(l) * 0.5
                    }
                })
                .collect()
        })
        .collect();
    for test in [TestKind::Welch, TestKind::Student, TestKind::RankSum] {
        let mut outputs = Vec::new();
        for (threads, chunk) in [(1, 5000), (2, 37), (2, 1000)] {
            let dir = tempfile::tempdir().unwrap();
            let mut o = options(dir.path());
            o.test = test;
            o.perms = 500;
            o.threads = threads;
            o.chunk_rows = Some(chunk);
            o.pooled_null = true;
            let summary = scan_rows(&rows, &labels, &o);
            assert!(summary.tested > 1000, "{test:?}: {}", summary.tested);
            outputs.push(std::fs::read(&summary.results_path).unwrap());
        }
        assert_eq!(outputs[0], outputs[1], "{test:?}: 1 vs 2 threads");
        assert_eq!(outputs[1], outputs[2], "{test:?}: chunk sizes");
    }
}

/// `riffle simulate --missing-fraction`: about that share of values is
/// missing, and the observed values are those of the complete matrix of the
/// same seed (a complete feature of both gives the same statistic).
#[test]
fn simulated_missing_values_leave_the_other_values_unchanged() {
    let dir = tempfile::tempdir().unwrap();
    let path = |name: &str| dir.path().join(name).to_str().unwrap().to_string();
    let mut tables = Vec::new();
    for (name, fraction) in [("complete", "0"), ("gaps", "0.1")] {
        let matrix = path(&format!("{name}.arrow"));
        let sheet = path("sheet.tsv");
        let out = common::riffle(&[
            "simulate",
            "--out",
            &matrix,
            "--sheet",
            &sheet,
            "--features",
            "2000",
            "--group-sizes",
            "12,12",
            "--missing-fraction",
            fraction,
            "--seed",
            "4",
        ]);
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        let results = path(&format!("out-{name}"));
        let out = common::riffle(&[
            "scan",
            "--matrix",
            &matrix,
            "--samples",
            &sheet,
            "--group",
            "group",
            "--perms",
            "99",
            "--format",
            "tsv",
            "--no-report",
            "--quiet",
            "--out",
            &results,
        ]);
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        tables.push(Table::read(
            &dir.path().join(format!("out-{name}/results.tsv")),
        ));
    }
    let (complete, gaps) = (&tables[0], &tables[1]);
    let (n_a, n_b) = (gaps.f64s("n_a"), gaps.f64s("n_b"));
    let observed: f64 = n_a.iter().zip(&n_b).map(|(a, b)| a + b).sum();
    let share = 1.0 - observed / (2000.0 * 24.0);
    // Binomial SD of the share over 48,000 values is 0.0014.
    assert!((share - 0.1).abs() < 0.01, "missing share {share}");
    let mut whole = 0;
    for f in 0..2000 {
        if n_a[f] + n_b[f] == 24.0 {
            whole += 1;
            assert_eq!(
                complete.text("statistic")[f],
                gaps.text("statistic")[f],
                "{f}"
            );
        }
    }
    // 0.9^24 = 8% of features keep all their values.
    assert!(whole > 80, "{whole} complete features");
}

/// The f32 GEMM path with its f64 rechecks counts exactly what an all-f64
/// computation counts, on masked rows with large offsets, heavy missing
/// shares, ties and strong effects (sampled relabelings, 60 samples).
#[test]
fn masked_counts_equal_an_all_f64_count() {
    let labels: Vec<u8> = (0..60).map(|i| u8::from(i % 5 < 2)).collect();
    let mut rng = TestRng::new(99);
    let mut rows: Vec<Vec<f64>> = (0..90)
        .map(|f| {
            let offset = [0.0, 1e4, -3e6][f % 3];
            let scale = [1.0, 1e-2, 50.0][f / 3 % 3];
            let shift = [0.0, 0.3, 1.0, 3.0][f % 4];
            let missing = [0.02, 0.15, 0.4][f / 9 % 3];
            labels
                .iter()
                .map(|&l| {
                    if rng.uniform() < missing {
                        f64::NAN
                    } else {
                        offset + scale * (rng.normal() + shift * f64::from(l))
                    }
                })
                .collect()
        })
        .collect();
    rows[10] = rows[4].clone();
    for row in rows.iter_mut().skip(60).step_by(3) {
        for v in row.iter_mut() {
            *v = (*v * 0.5).round();
        }
    }
    let (perms, seed) = (800, 21);
    let relabel = Relabelings::draw(&labels, perms, seed);
    let split = |l: &[u8]| -> Vec<bool> { l.iter().map(|&v| v == 1).collect() };
    let dir = tempfile::tempdir().unwrap();
    for test in [TestKind::Welch, TestKind::Student, TestKind::RankSum] {
        for side in [Side::Both, Side::Less] {
            let mut o = options(dir.path());
            o.test = test;
            o.side = side;
            o.perms = perms;
            o.seed = seed;
            o.maxt = riffle::scan::MaxtMode::Single;
            let summary = scan_rows(&rows, &labels, &o);
            let table = Table::read(&summary.results_path);
            let exceed = table.f64s("n_exceed");
            let note = table.text("note");
            for (f, x) in rows.iter().enumerate() {
                if !note[f].is_empty() {
                    continue;
                }
                let obs = orient(side, textbook(test, x, &split(&labels)));
                let count = (0..relabel.count)
                    .filter(|&b| {
                        orient(side, textbook(test, x, &split(relabel.row(b))))
                            >= obs - 1e-9 * (1.0 + obs.abs())
                    })
                    .count();
                assert_eq!(exceed[f], count as f64, "{test:?} {side:?} feature {f}");
            }
            assert!(summary.tested > 80, "{test:?}: {}", summary.tested);
        }
    }
}

/// One-way F and tie-corrected Kruskal–Wallis H on the observed values of
/// each class, from their textbook definitions (Kruskal & Wallis 1952,
/// JASA 47, with the tie correction 1 - sum(t^3 - t)/(n^3 - n)); 0 when a
/// class has no observed value (riffle's documented rule).
fn k_group_statistic(test: TestKind, x: &[f64], classes: &[usize], k: usize) -> f64 {
    let kept: Vec<(f64, usize)> = x
        .iter()
        .zip(classes)
        .filter(|(v, _)| !v.is_nan())
        .map(|(&v, &c)| (v, c))
        .collect();
    let n = kept.len() as f64;
    let values: Vec<f64> = if test == TestKind::Kruskal {
        kept.iter()
            .map(|(v, _)| {
                kept.iter().filter(|(y, _)| y < v).count() as f64
                    + (kept.iter().filter(|(y, _)| y == v).count() as f64 + 1.0) / 2.0
            })
            .collect()
    } else {
        kept.iter().map(|(v, _)| *v).collect()
    };
    let group = |g: usize| -> Vec<f64> {
        values
            .iter()
            .zip(&kept)
            .filter(|(_, (_, c))| *c == g)
            .map(|(v, _)| *v)
            .collect()
    };
    if (0..k).any(|g| group(g).is_empty()) {
        return 0.0;
    }
    if test == TestKind::Kruskal {
        let mut h = -3.0 * (n + 1.0);
        for g in 0..k {
            let r = group(g);
            h += 12.0 / (n * (n + 1.0)) * r.iter().sum::<f64>().powi(2) / r.len() as f64;
        }
        let mut ties = 0.0;
        let mut seen: Vec<f64> = Vec::new();
        for &(v, _) in &kept {
            if !seen.contains(&v) {
                seen.push(v);
                let t = kept.iter().filter(|(y, _)| *y == v).count() as f64;
                ties += t * t * t - t;
            }
        }
        return h / (1.0 - ties / (n * n * n - n));
    }
    let grand = mean(&values);
    let (mut ssb, mut ssw) = (0.0, 0.0);
    for g in 0..k {
        let v = group(g);
        let m = mean(&v);
        ssb += v.len() as f64 * (m - grand) * (m - grand);
        ssw += v.iter().map(|a| (a - m) * (a - m)).sum::<f64>();
    }
    (ssb / (k as f64 - 1.0)) / (ssw / (n - k as f64))
}

/// Every distinct arrangement of class labels (common practice, no single
/// source): recursive placement of a multiset.
fn arrangements(items: &[usize]) -> Vec<Vec<usize>> {
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
    let mut sorted = items.to_vec();
    sorted.sort();
    let mut out = Vec::new();
    place(&mut sorted, &mut Vec::new(), &mut out);
    out
}

#[test]
fn k_groups_with_missing_values_equal_brute_force() {
    let classes = [0usize, 1, 2, 0, 1, 2, 0, 1, 2];
    let mut rng = TestRng::new(6);
    let mut rows: Vec<Vec<f64>> = (0..6)
        .map(|f| {
            let mut row: Vec<f64> = classes
                .iter()
                .map(|&c| rng.normal() + 0.6 * f as f64 * c as f64)
                .collect();
            row[f % 9] = f64::NAN;
            if f % 2 == 1 {
                row[(f + 4) % 9] = f64::NAN;
            }
            row
        })
        .collect();
    rows.push(vec![1.0, 2.0, 2.0, 1.0, f64::NAN, 3.0, 2.0, 3.0, 3.0]);
    let mut sheet = String::from("sample\tgroup\n");
    for (i, c) in classes.iter().enumerate() {
        sheet.push_str(&format!("s{i}\tg{c}\n"));
    }
    let columns = riffle::design::DesignColumns {
        group: Some("group".into()),
        ..Default::default()
    };
    let all = arrangements(&classes);
    let dir = tempfile::tempdir().unwrap();
    for test in [TestKind::Anova, TestKind::Kruskal] {
        let mut o = options(dir.path());
        o.test = test;
        o.perms = 5000;
        o.min_observed = 2;
        let summary = common::scan_with_sheet(
            &rows,
            &sheet,
            riffle::stats::DesignKind::Groups,
            &columns,
            &o,
        );
        assert!(summary.exact);
        assert_eq!(summary.tested as usize, rows.len(), "{test:?}");
        let table = Table::read(&summary.results_path);
        let (p, stat, n_a) = (
            table.f64s("p_perm"),
            table.f64s("statistic"),
            table.f64s("n_a"),
        );
        for (f, row) in rows.iter().enumerate() {
            let observed = k_group_statistic(test, row, &classes, 3);
            assert!(
                (stat[f] - observed).abs() < 1e-9 * (1.0 + observed),
                "{test:?} feature {f}: statistic {} vs {observed}",
                stat[f]
            );
            assert_eq!(n_a[f], row.iter().filter(|v| !v.is_nan()).count() as f64);
            let reached = all
                .iter()
                .filter(|a| {
                    k_group_statistic(test, row, a, 3) >= observed - 1e-9 * (1.0 + observed)
                })
                .count();
            let expected = reached as f64 / all.len() as f64;
            assert!(
                (p[f] - expected).abs() < 1e-12,
                "{test:?} feature {f}: p_perm {} vs brute force {expected}",
                p[f]
            );
        }
    }
}

/// Designs without masking (Spearman: the trait's ranks among a feature's
/// observed samples change with every relabelling) say so for a feature
/// with missing values.
/// Shards and merge give the single run's bytes with masked features
/// (their standardized rows carry the mask into the step-down pass).
#[test]
fn shards_with_missing_values_merge_to_the_single_run() {
    let dir = tempfile::tempdir().unwrap();
    let path = |name: &str| dir.path().join(name).to_str().unwrap().to_string();
    let (matrix, sheet) = (path("m.arrow"), path("s.tsv"));
    let out = common::riffle(&[
        "simulate",
        "--out",
        &matrix,
        "--sheet",
        &sheet,
        "--features",
        "1500",
        "--group-sizes",
        "7,9",
        "--missing-fraction",
        "0.15",
        "--seed",
        "2",
    ]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let scan = |out_dir: &str, shard: Option<&str>| {
        let mut args = vec![
            "scan",
            "--matrix",
            &matrix,
            "--samples",
            &sheet,
            "--group",
            "group",
            "--test",
            "student",
            "--perms",
            "300",
            "--pooled-null",
            "--format",
            "tsv",
            "--no-report",
            "--quiet",
            "--out",
            out_dir,
        ];
        if let Some(s) = shard {
            args.extend(["--shard", s]);
        }
        let out = common::riffle(&args);
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
    };
    let (single, one, two, merged) = (path("single"), path("one"), path("two"), path("merged"));
    scan(&single, None);
    scan(&one, Some("1/2"));
    scan(&two, Some("2/2"));
    let out = common::riffle(&["merge", &one, &two, "--out", &merged, "--quiet"]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let a = std::fs::read(dir.path().join("single/results.tsv")).unwrap();
    let b = std::fs::read(dir.path().join("merged/results.tsv")).unwrap();
    assert!(a == b, "merged shards differ from the single run");
    let table = Table::read(&dir.path().join("single/results.tsv"));
    let observed: f64 = table.f64s("n_a").iter().chain(&table.f64s("n_b")).sum();
    assert!(
        observed < 0.9 * 1500.0 * 16.0,
        "the matrix has missing values"
    );
}

// ---- Paired designs: a pair is missing when either of its samples is. ----

/// Sample sheet of `m` pairs: samples a0.. in arm A, then b0.. in arm B;
/// rows give the A values, then the B values, so d = B - A.
fn pair_sheet(m: usize) -> String {
    let mut text = String::from("sample\tarm\tpair\n");
    for i in 0..m {
        text.push_str(&format!("a{i}\tA\tp{i}\n"));
    }
    for i in 0..m {
        text.push_str(&format!("b{i}\tB\tp{i}\n"));
    }
    text
}

fn scan_pairs(rows: &[Vec<f64>], o: &riffle::scan::ScanOptions) -> riffle::scan::ScanSummary {
    let columns = riffle::design::DesignColumns {
        group: Some("arm".into()),
        levels: Some(vec!["A".into(), "B".into()]),
        pair: Some("pair".into()),
        ..Default::default()
    };
    common::scan_with_sheet(
        rows,
        &pair_sheet(rows[0].len() / 2),
        riffle::stats::DesignKind::Paired,
        &columns,
        o,
    )
}

/// Differences B - A of the pairs with both samples observed, with the
/// index of their pair.
fn observed_pairs(row: &[f64]) -> Vec<(usize, f64)> {
    let m = row.len() / 2;
    (0..m)
        .filter(|&i| !row[i].is_nan() && !row[m + i].is_nan())
        .map(|i| (i, row[m + i] - row[i]))
        .collect()
}

/// Paired t of differences: mean over its standard error (Student 1908;
/// common practice).
fn paired_t_of(d: &[f64]) -> f64 {
    let v = var(d);
    mean(d) / (v / d.len() as f64).sqrt()
}

/// Wilcoxon signed-rank: zero differences dropped, mid-ranks of |d|
/// (Wilcoxon 1945, zeros dropped as in Wilcoxon's own treatment; common
/// practice). Returns W+ and the permutation z-score
/// (W+ - sum(r) / 2) / (sqrt(sum r^2) / 2).
fn signed_rank_of(d: &[f64]) -> (f64, f64) {
    let nonzero: Vec<f64> = d.iter().copied().filter(|&v| v != 0.0).collect();
    let rank = |v: f64| {
        let below = nonzero.iter().filter(|y| y.abs() < v.abs()).count() as f64;
        let equal = nonzero.iter().filter(|y| y.abs() == v.abs()).count() as f64;
        below + (equal + 1.0) / 2.0
    };
    let ranks: Vec<f64> = nonzero.iter().map(|&v| rank(v)).collect();
    let w_plus: f64 = nonzero
        .iter()
        .zip(&ranks)
        .filter(|(v, _)| **v > 0.0)
        .map(|(_, r)| r)
        .sum();
    let total: f64 = ranks.iter().sum();
    let sd = ranks.iter().map(|r| r * r).sum::<f64>().sqrt() / 2.0;
    let z = if sd > 0.0 {
        (w_plus - total / 2.0) / sd
    } else {
        0.0
    };
    (w_plus, z)
}

/// Signed statistic of the observed differences of `row` with the pairs
/// of `flips` (bit i: pair i) sign-flipped.
fn flipped_statistic(test: TestKind, row: &[f64], flips: u32) -> f64 {
    let d: Vec<f64> = observed_pairs(row)
        .iter()
        .map(|&(i, v)| if flips >> i & 1 == 1 { -v } else { v })
        .collect();
    match test {
        TestKind::PairedT => paired_t_of(&d),
        _ => signed_rank_of(&d).1,
    }
}

/// Pairs of 10 with one to three samples missing (sometimes both of a
/// pair), ties and zero differences, and two complete rows.
fn small_pair_rows() -> Vec<Vec<f64>> {
    let mut rng = TestRng::new(31);
    let mut rows: Vec<Vec<f64>> = (0..8)
        .map(|f| {
            let mut row: Vec<f64> = (0..20)
                .map(|i| rng.normal() + if i >= 10 { 0.3 * f as f64 } else { 0.0 })
                .collect();
            for j in 0..=(f % 3) {
                row[(7 * f + 5 * j + 1) % 20] = f64::NAN;
            }
            row
        })
        .collect();
    let mut tied: Vec<f64> = (0..20)
        .map(|i| ((i * 7) % 5 + i / 10 * (i % 3)) as f64)
        .collect();
    tied[3] = f64::NAN;
    tied[15] = f64::NAN;
    rows.push(tied);
    rows.push((0..20).map(|i| ((i * 3) % 7) as f64).collect());
    rows.push((0..20).map(|_| rng.normal()).collect());
    rows
}

/// Exact p over all 2^10 sign flips of every pair, by brute force over the
/// observed pairs (common practice, no single source); the reported
/// statistic and the observed pair count are those of the observed pairs.
#[test]
fn paired_exact_p_with_missing_pairs_equals_brute_force() {
    let rows = small_pair_rows();
    let dir = tempfile::tempdir().unwrap();
    for test in [TestKind::PairedT, TestKind::SignedRank] {
        for side in [Side::Both, Side::Greater, Side::Less] {
            let mut o = options(dir.path());
            o.test = test;
            o.side = side;
            o.perms = 5000;
            o.min_observed = 2;
            let summary = scan_pairs(&rows, &o);
            assert!(summary.exact);
            assert_eq!(summary.tested as usize, rows.len(), "{test:?}");
            let table = Table::read(&summary.results_path);
            let (p, stat, n_a) = (
                table.f64s("p_perm"),
                table.f64s("statistic"),
                table.f64s("n_a"),
            );
            for (f, row) in rows.iter().enumerate() {
                let d: Vec<f64> = observed_pairs(row).iter().map(|p| p.1).collect();
                assert_eq!(n_a[f], d.len() as f64, "{f}");
                let expected_stat = match test {
                    TestKind::PairedT => paired_t_of(&d),
                    _ => signed_rank_of(&d).0,
                };
                assert!(
                    (stat[f] - expected_stat).abs() < 1e-9 * (1.0 + expected_stat.abs()),
                    "{test:?} feature {f}: {} vs {expected_stat}",
                    stat[f]
                );
                let t_obs = orient(side, flipped_statistic(test, row, 0));
                let reached = (0..1u32 << 10)
                    .filter(|&flips| {
                        orient(side, flipped_statistic(test, row, flips))
                            >= t_obs - 1e-9 * (1.0 + t_obs.abs())
                    })
                    .count();
                let expected = reached as f64 / 1024.0;
                assert!(
                    (p[f] - expected).abs() < 1e-12,
                    "{test:?} {side:?} feature {f}: riffle {} brute force {expected}",
                    p[f]
                );
            }
        }
    }
}

/// Single-step and step-down maxT (Westfall & Young 1993) over complete and
/// masked paired features, all 2^12 flips held in memory. The complete-data
/// scale (riffle's documented choice): paired t as the flipped sum a
/// complete feature of m pairs would need for the same t,
/// S = sqrt(m (m - 1) t^2 / (m - 1 + t^2)); signed-rank as the permutation
/// z-score (any positive multiple orders the same).
#[test]
fn paired_maxt_compares_masked_and_complete_features_on_one_scale() {
    let m = 12usize;
    let mut rng = TestRng::new(57);
    let rows: Vec<Vec<f64>> = (0..40)
        .map(|f| {
            let shift = if f % 9 == 2 { 1.2 } else { 0.0 };
            (0..2 * m)
                .map(|i| {
                    if f % 3 != 0 && rng.uniform() < 0.2 {
                        f64::NAN
                    } else {
                        rng.normal() + if i >= m { shift } else { 0.0 }
                    }
                })
                .collect()
        })
        .collect();
    let dir = tempfile::tempdir().unwrap();
    let mf = m as f64;
    for test in [TestKind::PairedT, TestKind::SignedRank] {
        let mut o = options(dir.path());
        o.test = test;
        o.perms = 10_000;
        o.min_observed = 2;
        o.chunk_rows = Some(13);
        let summary = scan_pairs(&rows, &o);
        assert!(summary.exact);
        assert_eq!(summary.tested as usize, rows.len());
        let table = Table::read(&summary.results_path);
        let (p_maxt, p_single) = (table.f64s("p_maxt"), table.f64s("p_maxt_single"));
        let scale = |t: f64| -> f64 {
            match test {
                TestKind::PairedT if t.is_infinite() => (mf * (mf - 1.0)).sqrt(),
                TestKind::PairedT => (mf * (mf - 1.0) * t * t / (mf - 1.0 + t * t)).sqrt(),
                _ => t.abs(),
            }
        };
        let all = 1u32 << m;
        let obs: Vec<f64> = rows
            .iter()
            .map(|x| scale(flipped_statistic(test, x, 0)))
            .collect();
        let null: Vec<Vec<f64>> = rows
            .iter()
            .map(|x| {
                (0..all)
                    .map(|b| scale(flipped_statistic(test, x, b)))
                    .collect()
            })
            .collect();
        let tol = 1e-9;
        let denominator = all as f64;
        let count = rows.len();
        let column_max: Vec<f64> = (0..all as usize)
            .map(|b| null.iter().map(|t| t[b]).fold(f64::NEG_INFINITY, f64::max))
            .collect();
        let mut p_tilde = vec![0.0; count];
        for j in 0..count {
            let single = column_max
                .iter()
                .filter(|&&c| c >= obs[j] * (1.0 - tol))
                .count();
            let expected = single as f64 / denominator;
            assert!(
                (p_single[j] - expected).abs() < 1e-15,
                "{test:?} single-step {j}: riffle {} brute force {expected}",
                p_single[j]
            );
            let reached = (0..all as usize)
                .filter(|&b| {
                    (0..count)
                        .filter(|&k| obs[k] <= obs[j] * (1.0 + tol))
                        .any(|k| null[k][b] >= obs[j] * (1.0 - tol))
                })
                .count();
            p_tilde[j] = reached as f64 / denominator;
        }
        for j in 0..count {
            let expected = (0..count)
                .filter(|&k| obs[k] >= obs[j] * (1.0 - tol))
                .map(|k| p_tilde[k])
                .fold(0.0, f64::max);
            assert!(
                (p_maxt[j] - expected).abs() < 1e-15,
                "{test:?} step-down {j}: riffle {} brute force {expected}",
                p_maxt[j]
            );
        }
    }
}

/// Paired rows with missing values: complete rows beside them keep every
/// value they have alone, results do not depend on threads or chunk size,
/// and `--min-observed` counts observed pairs.
#[test]
fn paired_masked_rows_are_deterministic_and_leave_complete_rows_unchanged() {
    let m = 30usize;
    let mut rng = TestRng::new(77);
    let rows: Vec<Vec<f64>> = (0..600)
        .map(|f| {
            (0..2 * m)
                .map(|i| {
                    if f % 2 == 1 && rng.uniform() < 0.15 {
                        f64::NAN
                    } else {
                        rng.normal() * (1.0 + (f % 5) as f64) + if i >= m { 0.4 } else { 0.0 }
                    }
                })
                .collect()
        })
        .collect();
    let complete: Vec<Vec<f64>> = rows.iter().step_by(2).cloned().collect();
    for test in [TestKind::PairedT, TestKind::SignedRank] {
        let mut outputs = Vec::new();
        let mut last = None;
        for (threads, chunk) in [(1, 5000), (2, 37), (2, 1000)] {
            let dir = tempfile::tempdir().unwrap();
            let mut o = options(dir.path());
            o.test = test;
            o.perms = 400;
            o.threads = threads;
            o.chunk_rows = Some(chunk);
            o.pooled_null = true;
            let summary = scan_pairs(&rows, &o);
            assert!(summary.tested > 590, "{test:?}: {}", summary.tested);
            outputs.push(std::fs::read(&summary.results_path).unwrap());
            last = Some((Table::read(&summary.results_path), dir));
        }
        assert_eq!(outputs[0], outputs[1], "{test:?}: 1 vs 2 threads");
        assert_eq!(outputs[1], outputs[2], "{test:?}: chunk sizes");
        let (mixed, _keep) = last.unwrap();
        let dir = tempfile::tempdir().unwrap();
        let mut o = options(dir.path());
        o.test = test;
        o.perms = 400;
        let alone = Table::read(&scan_pairs(&complete, &o).results_path);
        for column in ["statistic", "p_param", "p_perm", "n_exceed", "effect"] {
            let (a, b) = (alone.f64s(column), mixed.f64s(column));
            for (k, value) in a.iter().enumerate() {
                assert_eq!(value.to_bits(), b[2 * k].to_bits(), "{test:?} {column} {k}");
            }
        }
        assert!(
            mixed.f64s("n_a").iter().any(|&v| v < m as f64),
            "some pairs are missing"
        );
    }
    // Two observed pairs out of 30: untested under the default of three.
    let mut sparse = rows[0].clone();
    for v in sparse.iter_mut().skip(2).take(m - 2) {
        *v = f64::NAN;
    }
    let dir = tempfile::tempdir().unwrap();
    let mut o = options(dir.path());
    o.test = TestKind::PairedT;
    o.perms = 100;
    let table = Table::read(&scan_pairs(&[rows[0].clone(), sparse], &o).results_path);
    assert_eq!(table.text("note")[1], "too few observed values");
    assert_eq!(table.f64s("n_a")[1], 2.0);
    assert!(table.f64s("p_perm")[1].is_nan());
    assert_eq!(table.text("note")[0], "");
}

// ---- Trait designs (Pearson): each feature correlates its observed
// samples with their trait values. ----

const TRAIT: [f64; 7] = [3.1, 0.5, 2.2, 4.8, 1.0, 2.6, 1.7];

fn scan_trait(rows: &[Vec<f64>], o: &riffle::scan::ScanOptions) -> riffle::scan::ScanSummary {
    let mut sheet = String::from("sample\tage\n");
    for (i, t) in TRAIT.iter().enumerate() {
        sheet.push_str(&format!("s{i}\t{t}\n"));
    }
    let columns = riffle::design::DesignColumns {
        trait_column: Some("age".into()),
        ..Default::default()
    };
    common::scan_with_sheet(rows, &sheet, riffle::stats::DesignKind::Trait, &columns, o)
}

/// Pearson r of the observed values of `x` with the trait values that
/// `order` puts on their samples (sample i takes TRAIT[order[i]]); the
/// textbook product-moment formula (common practice, no single source).
fn observed_r(x: &[f64], order: &[usize]) -> f64 {
    let (a, b): (Vec<f64>, Vec<f64>) = x
        .iter()
        .zip(order)
        .filter(|(v, _)| !v.is_nan())
        .map(|(&v, &k)| (v, TRAIT[k]))
        .unzip();
    let (ma, mb) = (mean(&a), mean(&b));
    let sab: f64 = a.iter().zip(&b).map(|(p, q)| (p - ma) * (q - mb)).sum();
    let saa: f64 = a.iter().map(|p| (p - ma) * (p - ma)).sum();
    let sbb: f64 = b.iter().map(|q| (q - mb) * (q - mb)).sum();
    sab / (saa * sbb).sqrt()
}

/// Every ordering of 0..n (common practice, no single source).
fn orderings(n: usize) -> Vec<Vec<usize>> {
    if n == 0 {
        return vec![Vec::new()];
    }
    let mut out = Vec::new();
    for rest in orderings(n - 1) {
        for at in 0..n {
            let mut o = rest.clone();
            o.insert(at, n - 1);
            out.push(o);
        }
    }
    out
}

fn trait_rows() -> Vec<Vec<f64>> {
    let mut rng = TestRng::new(17);
    let mut rows: Vec<Vec<f64>> = (0..10)
        .map(|f| {
            let mut row: Vec<f64> = TRAIT
                .iter()
                .map(|t| rng.normal() + 0.4 * f as f64 * t)
                .collect();
            for j in 0..(f % 3) {
                row[(3 * f + 2 * j) % 7] = f64::NAN;
            }
            row
        })
        .collect();
    rows.push(vec![1.0, 2.0, f64::NAN, 1.0, 3.0, 2.0, 2.0]);
    rows
}

/// Exact p over all 7! = 5040 orderings of the trait, by brute force over
/// the observed samples; r and the observed count are those of the
/// observed samples.
#[test]
fn pearson_exact_p_with_missing_values_equals_brute_force() {
    let rows = trait_rows();
    let all = orderings(7);
    let identity: Vec<usize> = (0..7).collect();
    let dir = tempfile::tempdir().unwrap();
    for side in [Side::Both, Side::Greater, Side::Less] {
        let mut o = options(dir.path());
        o.test = TestKind::Pearson;
        o.side = side;
        o.perms = 10_000;
        let summary = scan_trait(&rows, &o);
        assert!(summary.exact);
        assert_eq!(summary.tested as usize, rows.len());
        let table = Table::read(&summary.results_path);
        let (p, stat, n_a) = (
            table.f64s("p_perm"),
            table.f64s("statistic"),
            table.f64s("n_a"),
        );
        for (f, row) in rows.iter().enumerate() {
            let r = observed_r(row, &identity);
            assert!(
                (stat[f] - r).abs() < 1e-12,
                "feature {f}: {} vs {r}",
                stat[f]
            );
            assert_eq!(n_a[f], row.iter().filter(|v| !v.is_nan()).count() as f64);
            let t_obs = orient(side, r);
            let reached = all
                .iter()
                .filter(|order| orient(side, observed_r(row, order)) >= t_obs - 1e-9)
                .count();
            let expected = reached as f64 / all.len() as f64;
            assert!(
                (p[f] - expected).abs() < 1e-12,
                "{side:?} feature {f}: riffle {} brute force {expected}",
                p[f]
            );
        }
    }
}

/// Single-step maxT over complete and masked Pearson features against all
/// 5040 orderings held in memory; the complete-data scale (riffle's
/// documented choice) is the r of all N samples with the same t as r on
/// the n observed ones, r_eq^2 = t^2 / (N - 2 + t^2).
#[test]
fn pearson_maxt_compares_masked_and_complete_features_on_one_scale() {
    let rows = trait_rows();
    let all = orderings(7);
    let big_n = 7.0;
    let scale = |x: &[f64], order: &[usize]| -> f64 {
        let n = x.iter().filter(|v| !v.is_nan()).count() as f64;
        let r = observed_r(x, order);
        let t2 = r * r * (n - 2.0) / (1.0 - r * r);
        (t2 / (big_n - 2.0 + t2)).sqrt()
    };
    let dir = tempfile::tempdir().unwrap();
    let mut o = options(dir.path());
    o.test = TestKind::Pearson;
    o.perms = 10_000;
    o.chunk_rows = Some(4);
    let table = Table::read(&scan_trait(&rows, &o).results_path);
    let p_single = table.f64s("p_maxt_single");
    let identity: Vec<usize> = (0..7).collect();
    let column_max: Vec<f64> = all
        .iter()
        .map(|order| {
            rows.iter()
                .map(|x| scale(x, order))
                .fold(f64::NEG_INFINITY, f64::max)
        })
        .collect();
    for (j, x) in rows.iter().enumerate() {
        let obs = scale(x, &identity);
        let single = column_max.iter().filter(|&&c| c >= obs - 1e-9).count();
        let expected = single as f64 / all.len() as f64;
        assert!(
            (p_single[j] - expected).abs() < 1e-12,
            "single-step {j}: riffle {} brute force {expected}",
            p_single[j]
        );
    }
}

/// Pearson on 40 samples with offsets, scales, ties and heavy missing
/// shares: exceedance counts equal an all-f64 count of the textbook r over
/// the same drawn relabelings (the kernel's f32 sums with their error
/// band), results do not depend on threads or chunk size, and complete rows
/// keep every value they have alone.
#[test]
fn pearson_masked_counts_equal_an_all_f64_count_and_are_deterministic() {
    use riffle::design::{DesignColumns, SampleSheet, StudyDesign};
    let big_n = 40usize;
    let mut rng = TestRng::new(5);
    let trait_values: Vec<f64> = (0..big_n).map(|_| 50.0 + 10.0 * rng.normal()).collect();
    let mut sheet_text = String::from("sample\tage\n");
    for (i, t) in trait_values.iter().enumerate() {
        sheet_text.push_str(&format!("s{i}\t{t}\n"));
    }
    let mut rows: Vec<Vec<f64>> = (0..90)
        .map(|f| {
            let offset = [0.0, 1e4, -3e6][f % 3];
            let scale = [1.0, 1e-2, 50.0][f / 3 % 3];
            let slope = [0.0, 0.03, 0.1, 0.3][f % 4];
            let missing = [0.0, 0.15, 0.4][f / 9 % 3];
            trait_values
                .iter()
                .map(|t| {
                    if rng.uniform() < missing {
                        f64::NAN
                    } else {
                        offset + scale * (rng.normal() + slope * (t - 50.0))
                    }
                })
                .collect()
        })
        .collect();
    rows[10] = rows[4].clone();
    for row in rows.iter_mut().skip(60).step_by(3) {
        for v in row.iter_mut() {
            *v = (*v * 0.5).round();
        }
    }
    let columns = DesignColumns {
        trait_column: Some("age".into()),
        ..Default::default()
    };
    let sheet = SampleSheet::parse(
        std::path::Path::new("sheet.tsv"),
        sheet_text.as_bytes(),
        "sample",
    )
    .unwrap();
    let design =
        StudyDesign::from_sheet(&sheet, riffle::stats::DesignKind::Trait, &columns).unwrap();
    assert_eq!(design.trait_values, trait_values, "sheet order kept");
    let (perms, seed) = (800, 21);
    let classes = design.trait_classes();
    let relabel = Relabelings::generate(&design.scheme(&classes), perms, seed);
    // r of the observed values with the trait as unit i takes it from
    // sources[i] (the textbook product-moment formula).
    let r_of = |x: &[f64], sources: &[u32]| -> f64 {
        let (a, b): (Vec<f64>, Vec<f64>) = x
            .iter()
            .zip(sources)
            .filter(|(v, _)| !v.is_nan())
            .map(|(&v, &s)| (v, trait_values[s as usize]))
            .unzip();
        let (ma, mb) = (mean(&a), mean(&b));
        let sab: f64 = a.iter().zip(&b).map(|(p, q)| (p - ma) * (q - mb)).sum();
        let saa: f64 = a.iter().map(|p| (p - ma) * (p - ma)).sum();
        let sbb: f64 = b.iter().map(|q| (q - mb) * (q - mb)).sum();
        sab / (saa * sbb).sqrt()
    };
    let identity: Vec<u32> = (0..big_n as u32).collect();
    let run = |side: Side, threads: usize, chunk: usize, rows: &[Vec<f64>]| {
        let dir = tempfile::tempdir().unwrap();
        let mut o = options(dir.path());
        o.test = TestKind::Pearson;
        o.side = side;
        o.perms = perms;
        o.seed = seed;
        o.threads = threads;
        o.chunk_rows = Some(chunk);
        o.pooled_null = true;
        let summary = common::scan_with_sheet(
            rows,
            &sheet_text,
            riffle::stats::DesignKind::Trait,
            &columns,
            &o,
        );
        let bytes = std::fs::read(&summary.results_path).unwrap();
        (Table::read(&summary.results_path), bytes, dir)
    };
    for side in [Side::Both, Side::Less] {
        let (table, bytes, _dir) = run(side, 2, 37, &rows);
        let exceed = table.f64s("n_exceed");
        let note = table.text("note");
        let mut tested = 0;
        for (f, x) in rows.iter().enumerate() {
            if !note[f].is_empty() {
                continue;
            }
            tested += 1;
            // r is monotone in the kernel's statistic for a fixed row.
            let obs = orient(side, r_of(x, &identity));
            let count = (0..relabel.count)
                .filter(|&b| {
                    orient(side, r_of(x, relabel.source_row(b))) >= obs - 1e-9 * (1.0 + obs.abs())
                })
                .count();
            assert_eq!(exceed[f], count as f64, "{side:?} feature {f}");
        }
        assert!(tested > 80, "{side:?}: {tested}");
        let (_, single, _d) = run(side, 1, 5000, &rows);
        assert!(single == bytes, "{side:?}: 1 vs 2 threads, chunk sizes");
    }
    let complete: Vec<Vec<f64>> = rows.iter().take(9).cloned().collect();
    assert!(complete.iter().flatten().all(|v| !v.is_nan()));
    let (alone, _, _d1) = run(Side::Both, 2, 37, &complete);
    let (mixed, _, _d2) = run(Side::Both, 2, 37, &rows);
    for column in ["statistic", "p_param", "p_perm", "n_exceed", "effect"] {
        let (a, b) = (alone.f64s(column), mixed.f64s(column));
        for (k, value) in a.iter().enumerate() {
            assert_eq!(value.to_bits(), b[k].to_bits(), "{column} {k}");
        }
    }
}

// ---- Spearman and covariate designs: the per-row f64 path. ----

/// Mid-ranks (ties share the mean of their positions), 1-based (common
/// practice, no single source).
fn textbook_mid_ranks(v: &[f64]) -> Vec<f64> {
    v.iter()
        .map(|x| {
            let below = v.iter().filter(|y| *y < x).count() as f64;
            let equal = v.iter().filter(|y| *y == x).count() as f64;
            below + (equal + 1.0) / 2.0
        })
        .collect()
}

/// Product-moment correlation (common practice, no single source); 0 when
/// either side is constant.
fn product_moment(a: &[f64], b: &[f64]) -> f64 {
    let (ma, mb) = (mean(a), mean(b));
    let sab: f64 = a.iter().zip(b).map(|(p, q)| (p - ma) * (q - mb)).sum();
    let saa: f64 = a.iter().map(|p| (p - ma) * (p - ma)).sum();
    let sbb: f64 = b.iter().map(|q| (q - mb) * (q - mb)).sum();
    if saa == 0.0 || sbb == 0.0 {
        return 0.0;
    }
    sab / (saa * sbb).sqrt()
}

/// Spearman's rho of the observed values of `x` with the trait values that
/// `order` puts on their samples (sample i takes `values[order[i]]`): the
/// product-moment correlation of the mid-ranks of both among the observed
/// samples (Spearman 1904; ties by mid-ranks, common practice).
fn observed_rho(x: &[f64], values: &[f64], order: &[usize]) -> f64 {
    let (a, b): (Vec<f64>, Vec<f64>) = x
        .iter()
        .zip(order)
        .filter(|(v, _)| !v.is_nan())
        .map(|(&v, &k)| (v, values[k]))
        .unzip();
    product_moment(&textbook_mid_ranks(&a), &textbook_mid_ranks(&b))
}

/// A trait with ties, and rows with ties and up to two missing values.
const TIED_TRAIT: [f64; 7] = [3.1, 0.5, 2.2, 3.1, 1.0, 2.2, 1.7];

fn scan_trait_values(
    rows: &[Vec<f64>],
    values: &[f64],
    o: &riffle::scan::ScanOptions,
) -> riffle::scan::ScanSummary {
    let mut sheet = String::from("sample\tage\n");
    for (i, t) in values.iter().enumerate() {
        sheet.push_str(&format!("s{i}\t{t}\n"));
    }
    let columns = riffle::design::DesignColumns {
        trait_column: Some("age".into()),
        ..Default::default()
    };
    common::scan_with_sheet(rows, &sheet, riffle::stats::DesignKind::Trait, &columns, o)
}

fn spearman_rows() -> Vec<Vec<f64>> {
    let mut rows = trait_rows();
    rows.push(vec![2.0, 1.0, f64::NAN, 2.0, 3.0, 1.0, 2.0]);
    rows.push(vec![5.0, f64::NAN, 1.0, 4.0, f64::NAN, 3.0, 2.0]);
    rows
}

/// Spearman with missing values and ties in the trait: exact p over every
/// ordering of the trait (7! = 5040; riffle lists the 1260 distinct
/// arrangements) equals the brute force over the observed samples; rho and
/// the observed count are those of the observed samples.
#[test]
fn spearman_exact_p_with_missing_values_equals_brute_force() {
    let rows = spearman_rows();
    let all = orderings(7);
    let identity: Vec<usize> = (0..7).collect();
    let dir = tempfile::tempdir().unwrap();
    for side in [Side::Both, Side::Greater, Side::Less] {
        let mut o = options(dir.path());
        o.test = TestKind::Spearman;
        o.side = side;
        o.perms = 10_000;
        let summary = scan_trait_values(&rows, &TIED_TRAIT, &o);
        assert!(summary.exact);
        assert_eq!(summary.relabelings, 1259);
        assert_eq!(summary.tested as usize, rows.len());
        let table = Table::read(&summary.results_path);
        let (p, stat, n_a) = (
            table.f64s("p_perm"),
            table.f64s("statistic"),
            table.f64s("n_a"),
        );
        for (f, row) in rows.iter().enumerate() {
            let rho = observed_rho(row, &TIED_TRAIT, &identity);
            assert!(
                (stat[f] - rho).abs() < 1e-12,
                "feature {f}: {} vs {rho}",
                stat[f]
            );
            assert_eq!(n_a[f], row.iter().filter(|v| !v.is_nan()).count() as f64);
            let t_obs = orient(side, rho);
            let reached = all
                .iter()
                .filter(|order| orient(side, observed_rho(row, &TIED_TRAIT, order)) >= t_obs - 1e-9)
                .count();
            let expected = reached as f64 / all.len() as f64;
            assert!(
                (p[f] - expected).abs() < 1e-12,
                "{side:?} feature {f}: riffle {} brute force {expected}",
                p[f]
            );
        }
    }
}

/// Brute-force maxT (Westfall & Young 1993) over rows x relabelings of
/// statistics on one common scale: (p_perm, single-step, step-down); the
/// observed relabelling is among the columns.
fn brute_force_maxt(obs: &[f64], null: &[Vec<f64>]) -> (Vec<f64>, Vec<f64>, Vec<f64>) {
    let tol = 1e-9;
    let m = obs.len();
    let total = null[0].len() as f64;
    let reach = |v: f64, o: f64| v >= o - tol * (1.0 + o.abs());
    let columns = null[0].len();
    let column_max: Vec<f64> = (0..columns)
        .map(|b| null.iter().map(|t| t[b]).fold(f64::NEG_INFINITY, f64::max))
        .collect();
    let mut p_perm = vec![0.0; m];
    let mut single = vec![0.0; m];
    let mut tilde = vec![0.0; m];
    for j in 0..m {
        p_perm[j] = null[j].iter().filter(|&&t| reach(t, obs[j])).count() as f64 / total;
        single[j] = column_max.iter().filter(|&&c| reach(c, obs[j])).count() as f64 / total;
        let below: Vec<usize> = (0..m)
            .filter(|&k| obs[k] <= obs[j] + tol * (1.0 + obs[j].abs()))
            .collect();
        tilde[j] = (0..columns)
            .filter(|&b| below.iter().any(|&k| reach(null[k][b], obs[j])))
            .count() as f64
            / total;
    }
    let step = (0..m)
        .map(|j| {
            (0..m)
                .filter(|&k| reach(obs[k], obs[j]))
                .map(|k| tilde[k])
                .fold(0.0, f64::max)
        })
        .collect();
    (p_perm, single, step)
}

/// Single-step and step-down maxT over complete and masked Spearman rows
/// against all 5040 orderings in memory, on riffle's documented common
/// scale (the rho of N samples with the same t as rho on the n observed).
#[test]
fn spearman_maxt_over_complete_and_masked_rows_equals_brute_force() {
    let rows = spearman_rows();
    let all = orderings(7);
    let big_n = 7.0;
    let scale = |x: &[f64], order: &[usize]| -> f64 {
        let n = x.iter().filter(|v| !v.is_nan()).count() as f64;
        let r = observed_rho(x, &TIED_TRAIT, order);
        if r.abs() >= 1.0 {
            return 1.0;
        }
        let t2 = r * r * (n - 2.0) / (1.0 - r * r);
        (t2 / (big_n - 2.0 + t2)).sqrt()
    };
    // The observed ordering is one of the columns.
    let null: Vec<Vec<f64>> = rows
        .iter()
        .map(|x| all.iter().map(|order| scale(x, order)).collect())
        .collect();
    let identity: Vec<usize> = (0..7).collect();
    let obs: Vec<f64> = rows.iter().map(|x| scale(x, &identity)).collect();
    let (p_perm, single, step) = brute_force_maxt(&obs, &null);
    let dir = tempfile::tempdir().unwrap();
    for chunk in [3, 100] {
        let mut o = options(dir.path());
        o.test = TestKind::Spearman;
        o.perms = 10_000;
        o.chunk_rows = Some(chunk);
        let table = Table::read(&scan_trait_values(&rows, &TIED_TRAIT, &o).results_path);
        let got = [
            table.f64s("p_perm"),
            table.f64s("p_maxt_single"),
            table.f64s("p_maxt"),
        ];
        for (name, (riffle, expected)) in ["p_perm", "single-step", "step-down"]
            .iter()
            .zip(got.iter().zip([&p_perm, &single, &step]))
        {
            for j in 0..rows.len() {
                assert!(
                    (riffle[j] - expected[j]).abs() < 1e-12,
                    "{name} {j}: riffle {} brute force {}",
                    riffle[j],
                    expected[j]
                );
            }
        }
    }
}

/// The t of column 0 (one effect column) or the extra-sum-of-squares F of
/// the first `effects` columns, after the remaining (nuisance) columns.
fn ols_statistic(columns: &[Vec<f64>], effects: usize, y: &[f64]) -> f64 {
    let (beta, inverse, rss) = least_squares(columns, y);
    let df = (y.len() - columns.len()) as f64;
    if effects == 1 {
        return beta[0] / (rss / df * inverse[0][0]).sqrt();
    }
    let (_, _, reduced) = least_squares(&columns[effects..], y);
    ((reduced - rss) / effects as f64) / (rss / df)
}

/// Every permutation of `units` that keeps each unit in its stratum
/// (common practice, no single source): perm[k] is the unit whose residual
/// unit `units[k]` takes.
fn stratum_permutations(units: &[usize], strata: &[usize]) -> Vec<Vec<usize>> {
    let mut out = vec![Vec::new()];
    for k in 0..units.len() {
        let mut next = Vec::new();
        for partial in &out {
            for &u in units {
                if strata[u] == strata[units[k]] && !partial.contains(&u) {
                    let mut p = partial.clone();
                    p.push(u);
                    next.push(p);
                }
            }
        }
        out = next;
    }
    out
}

/// Freedman–Lane on the observed samples alone (Winkler, Ridgway, Webster,
/// Smith & Nichols 2014, NeuroImage 92): the model fitted on the observed
/// rows (design columns that are all zero there dropped), and every
/// permutation of their nuisance residuals within strata. Returns the
/// observed statistic, the exact p (|t| or F) and the effect (coefficient
/// or partial eta squared).
fn freedman_lane_observed(
    design: &[Vec<f64>],
    effects: usize,
    y: &[f64],
    strata: &[usize],
) -> (f64, f64, f64) {
    let units: Vec<usize> = (0..y.len()).filter(|&i| !y[i].is_nan()).collect();
    let columns: Vec<Vec<f64>> = design
        .iter()
        .map(|c| units.iter().map(|&i| c[i]).collect::<Vec<f64>>())
        .filter(|c| c.iter().any(|&v| v != 0.0))
        .collect();
    let yo: Vec<f64> = units.iter().map(|&i| y[i]).collect();
    let nuisance = &columns[effects..];
    let (gamma, _, _) = least_squares(nuisance, &yo);
    let fit: Vec<f64> = (0..yo.len())
        .map(|k| (0..nuisance.len()).map(|r| gamma[r] * nuisance[r][k]).sum())
        .collect();
    let resid: Vec<f64> = yo.iter().zip(&fit).map(|(a, b)| a - b).collect();
    let stat = |v: &[f64]| {
        let s = ols_statistic(&columns, effects, v);
        if effects == 1 {
            s.abs()
        } else {
            s
        }
    };
    let observed = stat(&yo);
    let position = |u: usize| units.iter().position(|&x| x == u).unwrap();
    let perms = stratum_permutations(&units, strata);
    let reached = perms
        .iter()
        .filter(|perm| {
            let y_star: Vec<f64> = (0..yo.len())
                .map(|k| resid[position(perm[k])] + fit[k])
                .collect();
            stat(&y_star) >= observed - 1e-9 * (1.0 + observed)
        })
        .count();
    let (beta, _, rss) = least_squares(&columns, &yo);
    let effect = if effects == 1 {
        beta[0]
    } else {
        let (_, _, reduced) = least_squares(nuisance, &yo);
        (reduced - rss) / reduced
    };
    (
        ols_statistic(&columns, effects, &yo),
        reached as f64 / perms.len() as f64,
        effect,
    )
}

fn model_sheet(classes: &[usize], age: &[f64], site: &[&str], batch: &[usize]) -> String {
    let mut text = String::from("sample\tgroup\tage\tsite\tbatch\n");
    for i in 0..classes.len() {
        text.push_str(&format!(
            "s{i}\tg{}\t{}\t{}\tb{}\n",
            classes[i], age[i], site[i], batch[i]
        ));
    }
    text
}

/// Covariate designs with missing values (two groups: t; three groups: F;
/// a trait with strata: t): every statistic, p_param, effect and exact
/// p_perm equals an OLS fit and a brute-force Freedman–Lane over the
/// observed samples alone. The site level `y` is missing entirely from one
/// row (its column drops out of that row's model).
#[test]
fn covariates_with_missing_values_equal_brute_force_on_the_observed_samples() {
    use statrs::distribution::{ContinuousCDF, FisherSnedecor, StudentsT};
    let age = [31.0, 45.0, 52.0, 38.0, 61.0, 29.0, 50.0, 44.0];
    let site = ["x", "y", "x", "x", "x", "y", "x", "x"];
    let batch = [0usize, 0, 0, 0, 1, 1, 1, 1];
    let site_y: Vec<f64> = site
        .iter()
        .map(|&s| f64::from(u8::from(s == "y")))
        .collect();
    let mut rng = TestRng::new(77);
    let cases: [(&str, [usize; 8], TestKind, bool); 3] = [
        (
            "two groups",
            [0, 1, 0, 1, 1, 0, 1, 0],
            TestKind::Student,
            false,
        ),
        (
            "three groups",
            [0, 1, 2, 0, 1, 2, 1, 0],
            TestKind::Anova,
            false,
        ),
        ("trait, strata", [0; 8], TestKind::Pearson, true),
    ];
    for (name, classes, test, trait_design) in cases {
        let effect_columns: Vec<Vec<f64>> = if trait_design {
            vec![age.iter().map(|a| a * 0.1 + (a * 7.0) % 3.0).collect()]
        } else {
            let k = classes.iter().max().unwrap() + 1;
            (1..k)
                .map(|level| {
                    classes
                        .iter()
                        .map(|&c| f64::from(u8::from(c == level)))
                        .collect()
                })
                .collect()
        };
        let effects = effect_columns.len();
        let mut sheet = model_sheet(&classes, &age, &site, &batch);
        if trait_design {
            sheet = sheet.replace("\tgroup\t", "\tscore\t");
            for (i, v) in effect_columns[0].iter().enumerate() {
                sheet = sheet.replacen(&format!("s{i}\tg0\t"), &format!("s{i}\t{v}\t"), 1);
            }
        }
        let rows: Vec<Vec<f64>> = (0..7)
            .map(|f| {
                let mut row: Vec<f64> = (0..8)
                    .map(|i| {
                        let signal: f64 = effect_columns.iter().map(|x| x[i]).sum();
                        0.03 * age[i] + 0.4 * site_y[i] + rng.normal() + 0.7 * f as f64 * signal
                    })
                    .collect();
                match f {
                    0 => {}
                    // Both site-y samples missing.
                    1 => {
                        row[1] = f64::NAN;
                        row[5] = f64::NAN;
                    }
                    _ => row[(3 * f) % 8] = f64::NAN,
                }
                row
            })
            .collect();
        let dir = tempfile::tempdir().unwrap();
        let mut o = options(dir.path());
        o.test = test;
        o.perms = 50_000;
        o.min_observed = 2;
        o.covariates = vec!["age".into(), "site".into()];
        let columns = riffle::design::DesignColumns {
            group: (!trait_design).then(|| "group".into()),
            trait_column: trait_design.then(|| "score".into()),
            strata: trait_design.then(|| "batch".into()),
            covariates: o.covariates.clone(),
            ..Default::default()
        };
        let kind = if trait_design {
            riffle::stats::DesignKind::Trait
        } else {
            riffle::stats::DesignKind::Groups
        };
        let summary = common::scan_with_sheet(&rows, &sheet, kind, &columns, &o);
        assert!(summary.exact, "{name}");
        let table = Table::read(&summary.results_path);
        let note = table.text("note");
        // --min-observed 2: two observed values in every group.
        let few = |y: &[f64]| {
            let k = classes.iter().max().unwrap() + 1;
            (0..k).any(|level| {
                (0..8)
                    .filter(|&i| classes[i] == level && !y[i].is_nan())
                    .count()
                    < 2
            })
        };
        let mut tested = 0;
        for (f, y) in rows.iter().enumerate() {
            if few(y) {
                assert_eq!(note[f], "too few observed values", "{name} {f}");
            } else {
                assert_eq!(note[f], "", "{name} {f}");
                tested += 1;
            }
        }
        assert!(tested >= 4, "{name}: {tested}");
        let (p_perm, p_param, stat, effect) = (
            table.f64s("p_perm"),
            table.f64s("p_param"),
            table.f64s("statistic"),
            table.f64s("effect"),
        );
        let mut design: Vec<Vec<f64>> = effect_columns.clone();
        design.push(vec![1.0; 8]);
        design.push(age.to_vec());
        design.push(site_y.clone());
        let strata: Vec<usize> = if trait_design {
            batch.to_vec()
        } else {
            vec![0; 8]
        };
        for (f, y) in rows.iter().enumerate() {
            if few(y) {
                continue;
            }
            let (s, p, e) = freedman_lane_observed(&design, effects, y, &strata);
            let m = y.iter().filter(|v| !v.is_nan()).count();
            let p_cols = design.len() - usize::from(f == 1);
            let df = (m - p_cols) as f64;
            let reference = if effects == 1 {
                2.0 * StudentsT::new(0.0, 1.0, df).unwrap().sf(s.abs())
            } else {
                FisherSnedecor::new(effects as f64, df).unwrap().sf(s)
            };
            let tol = 1e-9 * (1.0 + s.abs());
            assert!((stat[f] - s).abs() < tol, "{name} {f}: {} vs {s}", stat[f]);
            assert!(
                (effect[f] - e).abs() < 1e-9,
                "{name} {f}: effect {} vs {e}",
                effect[f]
            );
            assert!((p_param[f] - reference).abs() < 1e-9, "{name} {f}: p_param");
            assert!(
                (p_perm[f] - p).abs() < 1e-12,
                "{name} feature {f}: riffle {} brute force {p}",
                p_perm[f]
            );
        }
    }
}

/// The permutation of the observed units `units` induced by the relabelling
/// `perm` of all units (unit i takes the residual of `perm[i]`): riffle's
/// documented restriction by first return, unit i of `units` takes the
/// residual of the first observed unit on perm[i], perm[perm[i]], ...
fn first_return(perm: &[usize], units: &[usize]) -> Vec<usize> {
    units
        .iter()
        .map(|&i| {
            let mut j = perm[i];
            while !units.contains(&j) {
                j = perm[j];
            }
            j
        })
        .collect()
}

/// |t| of the group effect after age, fitted on the observed samples of y,
/// with the nuisance residuals moved by `perm` restricted to them.
fn masked_model_t(group: &[f64], age: &[f64], y: &[f64], perm: &[usize]) -> f64 {
    let units: Vec<usize> = (0..y.len()).filter(|&i| !y[i].is_nan()).collect();
    let take = |c: &[f64]| -> Vec<f64> { units.iter().map(|&i| c[i]).collect() };
    let nuisance = vec![vec![1.0; units.len()], take(age)];
    let yo = take(y);
    let (gamma, _, _) = least_squares(&nuisance, &yo);
    let fit: Vec<f64> = (0..yo.len())
        .map(|k| gamma[0] + gamma[1] * nuisance[1][k])
        .collect();
    let resid: Vec<f64> = yo.iter().zip(&fit).map(|(a, b)| a - b).collect();
    let position = |u: usize| units.iter().position(|&x| x == u).unwrap();
    let induced = first_return(perm, &units);
    let y_star: Vec<f64> = (0..yo.len())
        .map(|k| resid[position(induced[k])] + fit[k])
        .collect();
    let columns = vec![take(group), nuisance[0].clone(), nuisance[1].clone()];
    ols_statistic(&columns, 1, &y_star).abs()
}

/// Single-step and step-down maxT over complete and masked rows of a
/// covariate design (two groups after age) against all 7! relabelings held
/// in memory: complete rows permute all residuals, masked rows the
/// observed ones by the restriction of the same relabelling; the common
/// scale is the model's t (riffle's documented choice).
#[test]
fn covariate_maxt_over_complete_and_masked_rows_equals_brute_force() {
    let classes = [0usize, 1, 0, 1, 1, 0, 1];
    let age = [31.0, 45.0, 52.0, 38.0, 61.0, 29.0, 50.0];
    let group: Vec<f64> = classes.iter().map(|&c| c as f64).collect();
    let mut rng = TestRng::new(5);
    let rows: Vec<Vec<f64>> = (0..9)
        .map(|f| {
            let mut row: Vec<f64> = (0..7)
                .map(|i| 0.05 * age[i] + rng.normal() + 0.5 * f as f64 * group[i])
                .collect();
            if f % 3 != 0 {
                row[(2 * f) % 7] = f64::NAN;
            }
            row
        })
        .collect();
    let all = orderings(7);
    let null: Vec<Vec<f64>> = rows
        .iter()
        .map(|y| {
            all.iter()
                .map(|perm| masked_model_t(&group, &age, y, perm))
                .collect()
        })
        .collect();
    let identity: Vec<usize> = (0..7).collect();
    let obs: Vec<f64> = rows
        .iter()
        .map(|y| masked_model_t(&group, &age, y, &identity))
        .collect();
    let (p_perm, single, step) = brute_force_maxt(&obs, &null);
    let mut sheet = String::from("sample\tgroup\tage\n");
    for i in 0..7 {
        sheet.push_str(&format!("s{i}\tg{}\t{}\n", classes[i], age[i]));
    }
    let dir = tempfile::tempdir().unwrap();
    for chunk in [2, 100] {
        let mut o = options(dir.path());
        o.test = TestKind::Student;
        o.perms = 10_000;
        o.min_observed = 2;
        o.chunk_rows = Some(chunk);
        o.covariates = vec!["age".into()];
        let columns = riffle::design::DesignColumns {
            group: Some("group".into()),
            covariates: o.covariates.clone(),
            ..Default::default()
        };
        let summary = common::scan_with_sheet(
            &rows,
            &sheet,
            riffle::stats::DesignKind::Groups,
            &columns,
            &o,
        );
        assert_eq!(summary.tested as usize, rows.len());
        let table = Table::read(&summary.results_path);
        let got = [
            table.f64s("p_perm"),
            table.f64s("p_maxt_single"),
            table.f64s("p_maxt"),
        ];
        for (name, (riffle, expected)) in ["p_perm", "single-step", "step-down"]
            .iter()
            .zip(got.iter().zip([&p_perm, &single, &step]))
        {
            for j in 0..rows.len() {
                assert!(
                    (riffle[j] - expected[j]).abs() < 1e-12,
                    "{name} {j}: riffle {} brute force {}",
                    riffle[j],
                    expected[j]
                );
            }
        }
    }
}

/// Spearman and a covariate design (trait after age and a text covariate)
/// on 36 samples with up to 30% missing and ties: exceedance counts equal
/// a brute-force count over the same drawn relabelings (rho by textbook
/// mid-ranks; the model by OLS on the observed samples), results do not
/// depend on threads, chunk size or the pooled null, complete rows keep
/// every value they have alone, and sequential stopping and the tail fit
/// give the same bytes at any thread count.
#[test]
fn spearman_and_covariate_rows_with_missing_values_count_exactly_and_are_deterministic() {
    use riffle::design::{DesignColumns, SampleSheet, StudyDesign};
    let big_n = 36usize;
    let mut rng = TestRng::new(9);
    let score: Vec<f64> = (0..big_n)
        .map(|_| (5.0 + 2.0 * rng.normal()).round())
        .collect();
    let age: Vec<f64> = (0..big_n).map(|_| 50.0 + 10.0 * rng.normal()).collect();
    let site: Vec<&str> = (0..big_n).map(|i| ["a", "b", "c"][i % 3]).collect();
    let mut sheet_text = String::from("sample\tscore\tage\tsite\n");
    for i in 0..big_n {
        sheet_text.push_str(&format!("s{i}\t{}\t{}\t{}\n", score[i], age[i], site[i]));
    }
    let rows: Vec<Vec<f64>> = (0..48)
        .map(|f| {
            let missing = [0.0, 0.1, 0.3][f % 3];
            let slope = [0.0, 0.2, 0.6][f / 3 % 3];
            (0..big_n)
                .map(|i| {
                    if rng.uniform() < missing {
                        f64::NAN
                    } else {
                        let v = 0.05 * age[i] + slope * score[i] + rng.normal();
                        if f % 4 == 0 {
                            v.round()
                        } else {
                            v
                        }
                    }
                })
                .collect()
        })
        .collect();
    let sheet = SampleSheet::parse(
        std::path::Path::new("sheet.tsv"),
        sheet_text.as_bytes(),
        "sample",
    )
    .unwrap();
    let (perms, seed) = (300, 4);
    for covariates in [false, true] {
        let columns = DesignColumns {
            trait_column: Some("score".into()),
            covariates: if covariates {
                vec!["age".into(), "site".into()]
            } else {
                Vec::new()
            },
            ..Default::default()
        };
        let design =
            StudyDesign::from_sheet(&sheet, riffle::stats::DesignKind::Trait, &columns).unwrap();
        let classes = design.trait_classes();
        let relabel = Relabelings::generate(&design.scheme(&classes), perms, seed);
        let site_level =
            |l: &str| -> Vec<f64> { site.iter().map(|&s| f64::from(u8::from(s == l))).collect() };
        // Oriented (two-sided) statistic of row x as unit i takes trait
        // value (residual) of unit sources[i].
        let stat = |x: &[f64], sources: &[usize]| -> f64 {
            if !covariates {
                let order: Vec<usize> = sources.to_vec();
                return observed_rho(x, &score, &order).abs();
            }
            let units: Vec<usize> = (0..big_n).filter(|&i| !x[i].is_nan()).collect();
            let take = |c: &[f64]| -> Vec<f64> { units.iter().map(|&i| c[i]).collect() };
            let nuisance = vec![
                vec![1.0; units.len()],
                take(&age),
                take(&site_level("b")),
                take(&site_level("c")),
            ];
            let yo = take(x);
            let (gamma, _, _) = least_squares(&nuisance, &yo);
            let fit: Vec<f64> = (0..yo.len())
                .map(|k| (0..4).map(|r| gamma[r] * nuisance[r][k]).sum())
                .collect();
            let resid: Vec<f64> = yo.iter().zip(&fit).map(|(a, b)| a - b).collect();
            let induced = first_return(sources, &units);
            let position = |u: usize| units.iter().position(|&x| x == u).unwrap();
            let y_star: Vec<f64> = (0..yo.len())
                .map(|k| resid[position(induced[k])] + fit[k])
                .collect();
            let mut full = vec![take(&score)];
            full.extend(nuisance);
            ols_statistic(&full, 1, &y_star).abs()
        };
        let run = |threads: usize, chunk: usize, rows: &[Vec<f64>], extra: &str| {
            let dir = tempfile::tempdir().unwrap();
            let mut o = options(dir.path());
            o.test = TestKind::Spearman;
            if covariates {
                o.test = TestKind::Pearson;
                o.covariates = columns.covariates.clone();
            }
            o.perms = perms;
            o.seed = seed;
            o.threads = threads;
            o.chunk_rows = Some(chunk);
            o.pooled_null = extra == "pooled";
            if extra == "sequential" {
                o.stop_after = Some(5);
            }
            if extra == "tail" {
                o.tail_fit = Some(10);
            }
            let summary = common::scan_with_sheet(
                rows,
                &sheet_text,
                riffle::stats::DesignKind::Trait,
                &columns,
                &o,
            );
            let bytes = std::fs::read(&summary.results_path).unwrap();
            (Table::read(&summary.results_path), bytes, dir)
        };
        let (table, bytes, _dir) = run(2, 7, &rows, "pooled");
        let exceed = table.f64s("n_exceed");
        let note = table.text("note");
        let identity: Vec<usize> = (0..big_n).collect();
        // Sequential stopping at h = 5 (Besag & Clifford 1991): L is the
        // position of the 5th exceedance in relabelling order, else all B.
        let (sequential, _, _ds) = run(2, 7, &rows, "sequential");
        let (seq_exceed, seq_used) = (sequential.f64s("n_exceed"), sequential.f64s("n_relabel"));
        let mut tested = 0;
        for (f, x) in rows.iter().enumerate() {
            if !note[f].is_empty() {
                continue;
            }
            tested += 1;
            let obs = stat(x, &identity);
            let hits: Vec<bool> = (0..relabel.count)
                .map(|b| {
                    let sources: Vec<usize> =
                        relabel.source_row(b).iter().map(|&s| s as usize).collect();
                    stat(x, &sources) >= obs - 1e-9 * (1.0 + obs)
                })
                .collect();
            let count = hits.iter().filter(|&&h| h).count();
            assert_eq!(
                exceed[f], count as f64,
                "covariates {covariates} feature {f}"
            );
            let fifth = hits
                .iter()
                .enumerate()
                .filter(|(_, &h)| h)
                .nth(4)
                .map(|(b, _)| b + 1);
            let (e, l) = match fifth {
                Some(l) => (5, l),
                None => (count, relabel.count),
            };
            assert_eq!(
                (seq_exceed[f], seq_used[f]),
                (e as f64, l as f64),
                "sequential, covariates {covariates} feature {f}"
            );
        }
        assert_eq!(tested, rows.len(), "covariates {covariates}");
        let (_, single, _d) = run(1, 5000, &rows, "pooled");
        assert!(
            single == bytes,
            "covariates {covariates}: threads, chunk sizes"
        );
        let (_, plain, _d) = run(2, 5, &rows, "");
        let (_, plain1, _d) = run(1, 100, &rows, "");
        assert!(
            plain == plain1,
            "covariates {covariates}: without pooled null"
        );
        for extra in ["sequential", "tail"] {
            let (_, a, _d1) = run(2, 5, &rows, extra);
            let (_, b, _d2) = run(1, 1000, &rows, extra);
            assert!(a == b, "covariates {covariates}: {extra}");
        }
        let complete: Vec<Vec<f64>> = rows.iter().step_by(3).cloned().collect();
        assert!(complete.iter().flatten().all(|v| !v.is_nan()));
        let interleaved: Vec<Vec<f64>> = rows.clone();
        let (alone, _, _d1) = run(2, 7, &complete, "");
        let (mixed, _, _d2) = run(2, 7, &interleaved, "");
        for column in ["statistic", "p_param", "p_perm", "n_exceed", "effect"] {
            let (a, b) = (alone.f64s(column), mixed.f64s(column));
            for (k, value) in a.iter().enumerate() {
                let v = b[3 * k];
                assert_eq!(value.to_bits(), v.to_bits(), "{column} {k}");
            }
        }
    }
}

/// Covariate designs: `--min-observed` per group, two residual df in the
/// refitted model, and an effect that the covariates explain on the
/// observed samples are each reported untested with their reason;
/// Spearman needs three observed samples.
#[test]
fn covariate_and_spearman_rows_name_why_they_are_untested() {
    let classes = [0usize, 0, 0, 0, 1, 1, 1, 1];
    // Site matches the group except on samples 3 and 4.
    let site = ["x", "x", "x", "y", "x", "y", "y", "y"];
    let age = [31.0, 45.0, 52.0, 38.0, 61.0, 29.0, 50.0, 44.0];
    let mut sheet = String::from("sample\tgroup\tage\tsite\n");
    for i in 0..8 {
        sheet.push_str(&format!("s{i}\tg{}\t{}\t{}\n", classes[i], age[i], site[i]));
    }
    let mut rng = TestRng::new(31);
    let base: Vec<f64> = (0..8).map(|_| rng.normal()).collect();
    let with_missing = |missing: &[usize]| -> Vec<f64> {
        (0..8)
            .map(|i| {
                if missing.contains(&i) {
                    f64::NAN
                } else {
                    base[i]
                }
            })
            .collect()
    };
    let rows = vec![
        with_missing(&[]),
        with_missing(&[0]),
        // Group A keeps two observed values.
        with_missing(&[0, 1]),
        // Site equals the group on the observed samples.
        with_missing(&[3, 4]),
        // Four observed samples, four model columns.
        with_missing(&[0, 1, 5, 6]),
    ];
    let dir = tempfile::tempdir().unwrap();
    let mut o = options(dir.path());
    o.test = TestKind::Student;
    o.perms = 200;
    o.covariates = vec!["age".into(), "site".into()];
    let columns = riffle::design::DesignColumns {
        group: Some("group".into()),
        covariates: o.covariates.clone(),
        ..Default::default()
    };
    let run = |o: &riffle::scan::ScanOptions| {
        let summary = common::scan_with_sheet(
            &rows,
            &sheet,
            riffle::stats::DesignKind::Groups,
            &columns,
            o,
        );
        Table::read(&summary.results_path)
    };
    let table = run(&o);
    let note = table.text("note");
    assert_eq!(note[0], "");
    assert_eq!(note[1], "");
    assert_eq!(note[2], "too few observed values");
    assert_eq!(
        note[3],
        "effect explained by the covariates on the observed values"
    );
    assert_eq!(note[4], "too few observed values");
    assert!(table.f64s("p_perm")[3].is_nan());
    assert_eq!(table.f64s("n_a")[1], 3.0);
    assert_eq!(table.f64s("n_b")[1], 4.0);
    o.min_observed = 2;
    let note = run(&o).text("note").to_vec();
    assert_eq!(
        note[2], "",
        "two observed values per group with --min-observed 2"
    );
    assert_eq!(note[4], "too few observed values", "df below two");
    // Spearman: three observed samples at least, whatever --min-observed.
    let trait_rows = vec![
        vec![1.0, f64::NAN, 3.0, f64::NAN, 2.0, f64::NAN, f64::NAN],
        vec![1.0, f64::NAN, 3.0, f64::NAN, f64::NAN, f64::NAN, f64::NAN],
    ];
    let mut o = options(dir.path());
    o.test = TestKind::Spearman;
    o.perms = 99;
    o.min_observed = 2;
    let table = Table::read(&scan_trait_values(&trait_rows, &TIED_TRAIT, &o).results_path);
    assert_eq!(table.text("note")[0], "");
    assert_eq!(table.text("note")[1], "too few observed values");
}

/// Shards and merge give the single run's bytes for masked Spearman and
/// covariate rows (step-down maxT across shards, pooled null).
#[test]
fn shards_with_masked_spearman_and_covariate_rows_merge_to_the_single_run() {
    let dir = tempfile::tempdir().unwrap();
    let path = |name: &str| dir.path().join(name).to_str().unwrap().to_string();
    let (matrix, plain) = (path("m.arrow"), path("plain.tsv"));
    let out = common::riffle(&[
        "simulate",
        "--out",
        &matrix,
        "--sheet",
        &plain,
        "--features",
        "400",
        "--group-sizes",
        "8,8",
        "--missing-fraction",
        "0.1",
        "--seed",
        "3",
    ]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    // Invented covariates and a tied score beside the simulated groups.
    let sheet = path("sheet.tsv");
    let text = std::fs::read_to_string(&plain).unwrap();
    let mut lines = text.lines();
    let mut extended = format!("{}\tage\tsite\tscore\n", lines.next().unwrap());
    for (i, line) in lines.enumerate() {
        extended.push_str(&format!(
            "{line}\t{}\ts{}\t{}\n",
            30 + (i * 17) % 41,
            i % 3,
            (i * 7) % 5
        ));
    }
    std::fs::write(&sheet, extended).unwrap();
    for (label, design) in [
        (
            "spearman",
            ["--trait", "score", "--test", "spearman", "--pooled-null"].as_slice(),
        ),
        (
            "covariates",
            [
                "--group",
                "group",
                "--test",
                "student",
                "--covariates",
                "age,site",
            ]
            .as_slice(),
        ),
    ] {
        let scan = |out_dir: &str, shard: Option<&str>| {
            let mut args = vec![
                "scan",
                "--matrix",
                &matrix,
                "--samples",
                &sheet,
                "--perms",
                "300",
                "--format",
                "tsv",
                "--no-report",
                "--quiet",
                "--out",
                out_dir,
            ];
            args.extend(design);
            if let Some(s) = shard {
                args.extend(["--shard", s]);
            }
            let out = common::riffle(&args);
            assert!(
                out.status.success(),
                "{}",
                String::from_utf8_lossy(&out.stderr)
            );
        };
        let name = |s: &str| path(&format!("{label}-{s}"));
        scan(&name("single"), None);
        scan(&name("one"), Some("1/2"));
        scan(&name("two"), Some("2/2"));
        let out = common::riffle(&[
            "merge",
            &name("one"),
            &name("two"),
            "--out",
            &name("merged"),
            "--quiet",
        ]);
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        let single = format!("{}/results.tsv", name("single"));
        let a = std::fs::read(&single).unwrap();
        let b = std::fs::read(format!("{}/results.tsv", name("merged"))).unwrap();
        assert!(a == b, "{label}: merged shards differ from the single run");
        let table = Table::read(std::path::Path::new(&single));
        let tested = table.text("note").iter().filter(|n| n.is_empty()).count();
        assert!(tested > 390, "{label}: {tested} tested");
        let observed: f64 = table.f64s("n_a").iter().chain(&table.f64s("n_b")).sum();
        assert!(
            observed < 0.95 * 400.0 * 16.0,
            "{label}: the matrix has missing values"
        );
    }
}
