use std::time::Instant;

use rand_chacha::ChaCha20Rng;
use rand_core::{RngCore, SeedableRng};

use super::pi0::{binomial, binomial_ln_pmf};
use super::*;

fn uniform(rng: &mut ChaCha20Rng) -> f64 {
    (rng.next_u64() >> 11) as f64 / (1u64 << 53) as f64
}

fn options(scratch: &Path, memory_bytes: usize) -> AdjustOptions {
    AdjustOptions {
        memory_bytes,
        scratch_dir: scratch.to_path_buf(),
        ..AdjustOptions::default()
    }
}

/// Runs `adjust`, optionally forcing the external sort, and collects the
/// columns.
fn run(
    p: &[f64],
    opts: &AdjustOptions,
    force_external: bool,
) -> Result<(Vec<Vec<f64>>, AdjustSummary)> {
    let mut columns = vec![Vec::with_capacity(p.len()); opts.methods.len()];
    let summary = adjust_with_distinct_cap(
        &mut SlicePValues(p),
        opts,
        force_external.then_some(0),
        &mut |_, row| {
            for (column, &v) in columns.iter_mut().zip(row) {
                column.push(v);
            }
            Ok(())
        },
    )?;
    if force_external {
        assert!(summary.used_external_sort);
    }
    Ok((columns, summary))
}

fn rejections_at(summary: &AdjustSummary, method: Method, level_slot: usize) -> u64 {
    summary
        .rejections
        .iter()
        .find(|(m, _)| *m == method)
        .map(|(_, counts)| counts[level_slot])
        .expect("method present")
}

fn assert_bitwise_equal(a: &[Vec<f64>], b: &[Vec<f64>], what: &str) {
    for (k, (ca, cb)) in a.iter().zip(b).enumerate() {
        assert_eq!(ca.len(), cb.len(), "{what}: column {k} length");
        for (i, (x, y)) in ca.iter().zip(cb).enumerate() {
            assert!(
                x.to_bits() == y.to_bits(),
                "{what}: method {} row {i}: {x} vs {y}",
                Method::ALL[k].name()
            );
        }
    }
}

// Benjamini & Hochberg (1995), JRSS-B 57, 289-300, section 4.2: the 15
// p-values of the worked example.
const BH1995_P: [f64; 15] = [
    0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459, 0.3240, 0.4262, 0.5719,
    0.6528, 0.7590, 1.0000,
];

#[test]
fn bh1995_worked_example() {
    let dir = tempfile::tempdir().unwrap();
    // Source: Benjamini & Hochberg (1995), JRSS-B 57, section 4.2 (BH
    // rejects the 4 smallest at 0.05, Bonferroni-type procedures 3); the BH
    // adjusted values are the same example as printed by
    // statsmodels.stats.multitest.multipletests(method='fdr_bh'), rounded
    // to 4 places (from the brief, checked by hand: 0.0095*15/4 = 0.035625).
    let expected_bh = [
        0.0015, 0.0030, 0.0095, 0.0356, 0.0603, 0.0639, 0.0639, 0.0645, 0.0765, 0.486, 0.5812,
        0.7149, 0.7532, 0.8132, 1.0,
    ];
    for force_external in [false, true] {
        let (columns, summary) =
            run(&BH1995_P, &options(dir.path(), 1 << 20), force_external).expect("adjust");
        let bh = &columns[0];
        for (i, (&got, &want)) in bh.iter().zip(&expected_bh).enumerate() {
            assert!((got - want).abs() < 0.6e-4, "BH row {i}: {got} vs {want}");
        }
        assert_eq!(summary.m, 15);
        assert_eq!(summary.n_missing, 0);
        // Levels: slot 1 is 0.05.
        assert_eq!(rejections_at(&summary, Method::Bh, 1), 4);
        assert_eq!(rejections_at(&summary, Method::Bonferroni, 1), 3);
        assert_eq!(rejections_at(&summary, Method::Holm, 1), 3);
        assert_eq!(rejections_at(&summary, Method::Hochberg, 1), 3);
        assert_eq!(rejections_at(&summary, Method::By, 1), 3);
    }
}

/// Independent in-memory implementation: sort once, then the textbook
/// formulas per sorted position, written the way
/// statsmodels.stats.multitest.multipletests computes them (p / (j/m),
/// cumulative min from the top or max from the bottom, clip at 1).
fn reference_adjust(p: &[f64], pi0: f64) -> Vec<Vec<f64>> {
    let mut order: Vec<usize> = (0..p.len()).filter(|&i| !p[i].is_nan()).collect();
    order.sort_by(|&a, &b| p[a].partial_cmp(&p[b]).unwrap());
    let m = order.len();
    let sorted: Vec<f64> = order.iter().map(|&i| p[i]).collect();
    let harmonic: f64 = (1..=m).map(|i| 1.0 / i as f64).sum();
    let cummin_from_top = |raw: Vec<f64>| -> Vec<f64> {
        let mut out = raw;
        for j in (0..m.saturating_sub(1)).rev() {
            out[j] = out[j].min(out[j + 1]);
        }
        out.into_iter().map(|v| v.min(1.0)).collect()
    };
    let ecdf = |j: usize| (j + 1) as f64 / m as f64;
    let bh = cummin_from_top((0..m).map(|j| sorted[j] / ecdf(j)).collect());
    let by = cummin_from_top((0..m).map(|j| sorted[j] / (ecdf(j) / harmonic)).collect());
    let storey = cummin_from_top((0..m).map(|j| pi0 * sorted[j] / ecdf(j)).collect());
    let hochberg = cummin_from_top((0..m).map(|j| (m - j) as f64 * sorted[j]).collect());
    let mut holm: Vec<f64> = (0..m).map(|j| (m - j) as f64 * sorted[j]).collect();
    for j in 1..m {
        holm[j] = holm[j].max(holm[j - 1]);
    }
    let holm: Vec<f64> = holm.into_iter().map(|v| v.min(1.0)).collect();
    let bonferroni: Vec<f64> = sorted.iter().map(|&v| (v * m as f64).min(1.0)).collect();
    // Method::ALL order.
    [bh, by, storey, holm, hochberg, bonferroni]
        .into_iter()
        .map(|sorted_adj| {
            let mut column = vec![f64::NAN; p.len()];
            for (j, &i) in order.iter().enumerate() {
                column[i] = sorted_adj[j];
            }
            column
        })
        .collect()
}

fn assert_close_to_reference(got: &[Vec<f64>], want: &[Vec<f64>], what: &str) {
    for (k, (cg, cw)) in got.iter().zip(want).enumerate() {
        for (i, (&x, &y)) in cg.iter().zip(cw).enumerate() {
            let ok = (x.is_nan() && y.is_nan()) || (x - y).abs() <= 1e-12 * x.abs().max(y.abs());
            assert!(
                ok,
                "{what}: {} row {i}: {x} vs reference {y}",
                Method::ALL[k].name()
            );
        }
    }
}

/// Heavy ties: permutation p-values (b+1)/(B+1) for B = 999, a few
/// repeated special values, small continuous p-values, uniform ones and
/// missing values.
fn tied_mixture(n: usize, seed: u64) -> Vec<f64> {
    let mut rng = ChaCha20Rng::seed_from_u64(seed);
    (0..n)
        .map(|_| {
            let kind = uniform(&mut rng);
            if kind < 0.05 {
                f64::NAN
            } else if kind < 0.45 {
                (rng.next_u64() % 1000 + 1) as f64 / 1000.0
            } else if kind < 0.55 {
                [0.0, 1.0, 0.5, 0.05, 1e-300][(rng.next_u64() % 5) as usize]
            } else if kind < 0.75 {
                uniform(&mut rng).powi(8)
            } else {
                uniform(&mut rng)
            }
        })
        .collect()
}

#[test]
fn one_million_tied_p_values_match_reference_on_both_paths() {
    let p = tied_mixture(1_000_000, 7);
    let dir = tempfile::tempdir().unwrap();
    let m = p.iter().filter(|v| !v.is_nan()).count();
    let pi0 = (p.iter().filter(|&&v| v > 0.5).count() as f64 / (0.5 * m as f64)).min(1.0);
    let want = reference_adjust(&p, pi0);

    let start = Instant::now();
    let (fast, fast_summary) = run(&p, &options(dir.path(), 1 << 30), false).unwrap();
    let fast_time = start.elapsed();
    assert!(!fast_summary.used_external_sort);

    let start = Instant::now();
    let (external, external_summary) = run(&p, &options(dir.path(), 256 << 10), false).unwrap();
    let external_time = start.elapsed();
    assert!(
        external_summary.used_external_sort,
        "budget should force the external sort"
    );
    eprintln!("1M p-values: in-memory path {fast_time:?}, external sort {external_time:?}");

    assert_eq!(fast_summary.m, m as u64);
    assert_eq!(fast_summary.n_missing, (p.len() - m) as u64);
    assert_eq!(fast_summary.pi0.to_bits(), pi0.to_bits());
    assert_close_to_reference(&fast, &want, "in-memory path");
    assert_close_to_reference(&external, &want, "external sort");
    assert_bitwise_equal(&fast, &external, "in-memory vs external");
    assert_eq!(
        fast_summary.rejections, external_summary.rejections,
        "rejection counts"
    );

    // Tied p-values get identical adjusted values, bit for bit.
    let mut order: Vec<usize> = (0..p.len()).filter(|&i| !p[i].is_nan()).collect();
    order.sort_by(|&a, &b| p[a].partial_cmp(&p[b]).unwrap());
    for pair in order.windows(2) {
        if p[pair[0]] == p[pair[1]] {
            for column in &fast {
                assert_eq!(column[pair[0]].to_bits(), column[pair[1]].to_bits());
            }
        }
    }
    assert_eq!(
        std::fs::read_dir(dir.path()).unwrap().count(),
        0,
        "scratch left behind"
    );
}

#[test]
fn external_sort_is_identical_whatever_the_budget() {
    let p = tied_mixture(60_000, 11);
    let dir = tempfile::tempdir().unwrap();
    let (fast, _) = run(&p, &options(dir.path(), 1 << 30), false).unwrap();
    for memory in [0, MIN_MEMORY_BYTES, 200 << 10, 1 << 20, 64 << 20] {
        let (external, summary) = run(&p, &options(dir.path(), memory), true).unwrap();
        assert!(summary.used_external_sort);
        assert_bitwise_equal(&fast, &external, &format!("budget {memory}"));
    }
    let mut opts = options(dir.path(), 1 << 20);
    opts.lambda = LambdaChoice::Bootstrap;
    let (a, sa) = run(&p, &opts, false).unwrap();
    let (b, sb) = run(&p, &opts, true).unwrap();
    assert_bitwise_equal(&a, &b, "bootstrap lambda, both paths");
    assert_eq!(sa.pi0.to_bits(), sb.pi0.to_bits());
    assert_eq!(
        std::fs::read_dir(dir.path()).unwrap().count(),
        0,
        "scratch left behind"
    );
}

#[test]
fn method_subsets_and_order_follow_the_options() {
    let p = tied_mixture(5_000, 3);
    let dir = tempfile::tempdir().unwrap();
    let (all, _) = run(&p, &options(dir.path(), 1 << 20), false).unwrap();
    for methods in [
        vec![Method::Holm],
        vec![Method::Bonferroni, Method::Bh],
        vec![Method::Hochberg, Method::Storey, Method::Holm],
    ] {
        for force_external in [false, true] {
            let opts = AdjustOptions {
                methods: methods.clone(),
                ..options(dir.path(), 1 << 20)
            };
            let (columns, summary) = run(&p, &opts, force_external).unwrap();
            assert_eq!(summary.rejections.len(), methods.len());
            for (column, method) in columns.iter().zip(&methods) {
                let k = Method::ALL.iter().position(|m| m == method).unwrap();
                assert_bitwise_equal(
                    std::slice::from_ref(column),
                    std::slice::from_ref(&all[k]),
                    method.name(),
                );
            }
        }
    }
}

#[test]
fn storey_pi0_on_a_mixture_with_known_null_fraction() {
    // 80% uniform nulls, 20% Beta(0.1, 1) alternatives drawn by inverse CDF
    // (F(x) = x^0.1, so x = u^10): the true pi0 is 0.8. Bias of
    // pi0(lambda) is 0.2 (1 - lambda^0.1) / (1 - lambda), 0.027 at 0.5
    // (Storey 2002, JRSS-B 64: pi0(lambda) overestimates pi0).
    let mut rng = ChaCha20Rng::seed_from_u64(2002);
    let p: Vec<f64> = (0..200_000)
        .map(|i| {
            let u = uniform(&mut rng);
            if i % 5 == 0 {
                u.powi(10)
            } else {
                u
            }
        })
        .collect();
    let dir = tempfile::tempdir().unwrap();
    let fixed = AdjustOptions {
        methods: vec![Method::Storey, Method::Bh],
        ..options(dir.path(), 1 << 24)
    };
    let (fixed_cols, fixed_summary) = run(&p, &fixed, false).unwrap();
    assert_eq!(fixed_summary.lambda, 0.5);
    assert!(
        (fixed_summary.pi0 - 0.8).abs() < 0.03,
        "pi0 {}",
        fixed_summary.pi0
    );
    // q = pi0 * BH before the cap at 1 (Storey 2002).
    for (q, bh) in fixed_cols[0].iter().zip(&fixed_cols[1]) {
        let scaled = (fixed_summary.pi0 * bh).min(1.0);
        assert!((q - scaled).abs() <= 1e-12 * scaled.max(1e-300) || *bh >= 1.0);
    }

    let boot = AdjustOptions {
        lambda: LambdaChoice::Bootstrap,
        ..fixed.clone()
    };
    let (_, boot_summary) = run(&p, &boot, false).unwrap();
    eprintln!(
        "pi0: fixed 0.5 -> {}, bootstrap lambda {} -> {}",
        fixed_summary.pi0, boot_summary.lambda, boot_summary.pi0
    );
    assert!(
        (boot_summary.pi0 - 0.8).abs() < 0.03,
        "pi0 {}",
        boot_summary.pi0
    );
    let (_, again) = run(&p, &boot, false).unwrap();
    assert_eq!(again, boot_summary, "bootstrap is deterministic for a seed");
}

#[test]
fn missing_values_are_not_counted_and_come_back_nan() {
    let dir = tempfile::tempdir().unwrap();
    let with_missing = [0.01, f64::NAN, 0.04, 0.03, f64::NAN, 0.7, 0.01];
    let without: Vec<f64> = with_missing
        .iter()
        .copied()
        .filter(|v| !v.is_nan())
        .collect();
    for force_external in [false, true] {
        let opts = options(dir.path(), 1 << 20);
        let (a, sa) = run(&with_missing, &opts, force_external).unwrap();
        let (b, sb) = run(&without, &opts, force_external).unwrap();
        assert_eq!(sa.m, 5);
        assert_eq!(sa.n_missing, 2);
        assert_eq!(sa.rejections, sb.rejections);
        for (ca, cb) in a.iter().zip(&b) {
            assert!(ca[1].is_nan() && ca[4].is_nan());
            let kept: Vec<f64> = ca.iter().copied().filter(|v| !v.is_nan()).collect();
            assert_eq!(&kept, cb);
        }
        // Bonferroni with m = 5 (not 7): 0.01 * 5.
        assert!((a[5][0] - 0.05).abs() < 1e-15);
    }
    let (cols, summary) = run(&[f64::NAN, f64::NAN], &options(dir.path(), 1 << 20), false).unwrap();
    assert_eq!((summary.m, summary.n_missing), (0, 2));
    assert!(summary.pi0.is_nan());
    assert!(cols.iter().flatten().all(|v| v.is_nan()));
}

struct NamedSource {
    values: Vec<f64>,
}

impl PValueSource for NamedSource {
    fn for_each(&mut self, f: &mut dyn FnMut(f64) -> Result<()>) -> Result<()> {
        self.values.iter().try_for_each(|&p| f(p))
    }

    fn location(&self, index: u64) -> (PathBuf, String) {
        (
            PathBuf::from("spill/pvalues.bin"),
            format!("row {}, column 'p'", index + 1),
        )
    }
}

#[test]
fn values_outside_zero_one_are_reported_with_their_place() {
    let opts = options(&std::env::temp_dir(), 1 << 20);
    for bad in [1.5, -0.1, f64::INFINITY] {
        let mut source = NamedSource {
            values: vec![0.2, 0.3, bad, 0.4],
        };
        let err = adjust(&mut source, &opts, &mut |_, _| Ok(())).unwrap_err();
        let message = err.to_string();
        assert!(
            message.starts_with("spill/pvalues.bin: row 3, column 'p': expected a p-value"),
            "{message}"
        );
        assert_eq!(err.exit_code(), crate::error::exit_code::BAD_INPUT);
    }
    let bad_lambda = AdjustOptions {
        lambda: LambdaChoice::Fixed(1.0),
        ..opts.clone()
    };
    let err = adjust_in_memory(&[0.1], &bad_lambda).unwrap_err();
    assert!(matches!(err, RiffleError::BadOptions(_)));
    // No p above lambda: Storey's pi0 is 0, so q_storey is reported
    // missing rather than 0 everywhere; the other methods are unaffected.
    let (columns, summary) = adjust_in_memory(&[0.1, 0.2], &opts).unwrap();
    assert_eq!(summary.pi0, 0.0);
    let storey = opts
        .methods
        .iter()
        .position(|&m| m == Method::Storey)
        .unwrap();
    assert!(columns[storey].iter().all(|q| q.is_nan()));
    let bh = opts.methods.iter().position(|&m| m == Method::Bh).unwrap();
    assert!(columns[bh].iter().all(|q| (0.0..=1.0).contains(q)));
    let without_storey = AdjustOptions {
        methods: vec![Method::Bh],
        ..opts.clone()
    };
    assert!(adjust_in_memory(&[0.1, 0.2], &without_storey).is_ok());
}

#[test]
fn scratch_is_removed_when_the_sink_fails() {
    let p = tied_mixture(20_000, 5);
    let dir = tempfile::tempdir().unwrap();
    let opts = options(dir.path(), 0);
    let err = adjust_with_distinct_cap(&mut SlicePValues(&p), &opts, Some(0), &mut |i, _| {
        if i == 100 {
            Err(RiffleError::options("sink gave up"))
        } else {
            Ok(())
        }
    })
    .unwrap_err();
    assert_eq!(err.to_string(), "sink gave up");
    assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 0);
}

#[test]
fn binomial_log_pmf_matches_the_product_formula() {
    // P(X = k) = C(n, k) p^k q^(n-k) by direct products (textbook
    // definition; common practice, no single source) against Loader's
    // saddle-point form.
    for &(n, p) in &[(30u64, 0.3f64), (17, 0.05), (200, 0.5)] {
        let mut total = 0.0;
        for k in 0..=n {
            let mut coefficient = 1.0f64;
            for i in 0..k {
                coefficient *= (n - i) as f64 / (i + 1) as f64;
            }
            let direct = coefficient * p.powi(k as i32) * (1.0 - p).powi((n - k) as i32);
            let loader = binomial_ln_pmf(k, n, p).exp();
            assert!(
                (direct - loader).abs() <= 1e-12 * direct.max(1e-300),
                "n={n} p={p} k={k}: {direct} vs {loader}"
            );
            total += loader;
        }
        assert!((total - 1.0).abs() < 1e-12);
    }
}

#[test]
fn binomial_draws_have_the_binomial_mean_and_variance() {
    // Mean n p and variance n p (1 - p) (common practice, no single source);
    // tolerances are 5 standard errors of the sample mean and variance.
    let mut rng = ChaCha20Rng::seed_from_u64(1);
    for &(n, p) in &[(100_000_000u64, 0.05f64), (1_000, 0.7), (50, 0.01)] {
        let draws = 4000;
        let xs: Vec<f64> = (0..draws)
            .map(|_| binomial(&mut rng, n, p) as f64)
            .collect();
        let mean = xs.iter().sum::<f64>() / draws as f64;
        let var = xs.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (draws - 1) as f64;
        let true_var = n as f64 * p * (1.0 - p);
        assert!(
            (mean - n as f64 * p).abs() < 5.0 * (true_var / draws as f64).sqrt(),
            "n={n} p={p}: mean {mean}"
        );
        assert!(
            (var - true_var).abs() < 5.0 * true_var * (2.0 / draws as f64).sqrt() + 0.05,
            "n={n} p={p}: var {var} vs {true_var}"
        );
        assert!(xs.iter().all(|&x| x >= 0.0 && x <= n as f64));
    }
}

/// Writes a TSV of p-values and this module's adjusted values, then runs
/// tests/python/check_multitest.py, which compares them with
/// statsmodels.stats.multitest.multipletests.
#[test]
#[ignore = "needs python3 with statsmodels: cargo test -- --ignored"]
fn statsmodels_agrees_through_the_check_script() {
    let p = tied_mixture(20_000, 13);
    let dir = tempfile::tempdir().unwrap();
    let methods = vec![
        Method::Bh,
        Method::By,
        Method::Holm,
        Method::Hochberg,
        Method::Bonferroni,
    ];
    let opts = AdjustOptions {
        methods: methods.clone(),
        ..options(dir.path(), 1 << 20)
    };
    let (columns, _) = adjust_in_memory(&p, &opts).unwrap();
    let tsv = dir.path().join("adjusted.tsv");
    let mut text = String::from("p");
    for method in &methods {
        text.push('\t');
        text.push_str(method.name());
    }
    text.push('\n');
    for (i, &pv) in p.iter().enumerate() {
        // {:e} prints the shortest string that reads back to the same double.
        text.push_str(&format!("{pv:e}"));
        for column in &columns {
            text.push_str(&format!("\t{:e}", column[i]));
        }
        text.push('\n');
    }
    std::fs::write(&tsv, text).unwrap();
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/python/check_multitest.py");
    let output = std::process::Command::new("python3")
        .arg(&script)
        .arg(&tsv)
        .output()
        .expect("python3 runs");
    let stdout = String::from_utf8_lossy(&output.stdout);
    eprintln!("{stdout}{}", String::from_utf8_lossy(&output.stderr));
    assert!(output.status.success(), "check script failed");
    assert_eq!(stdout.lines().filter(|l| l.contains("OK")).count(), 5);
}
