//! Sequential stopping (Besag & Clifford 1991, "Sequential Monte Carlo
//! p-values", Biometrika 78(2), 301-304) and the Phipson & Smyth (2010)
//! exact p-value ("Permutation P-values should never be zero", Stat. Appl.
//! Genet. Mol. Biol. 9(1), Article 39), checked against brute force and the
//! formulas written out in this file.

mod common;

use std::path::{Path, PathBuf};
use std::sync::atomic::AtomicBool;

use common::{options, scan_rows, student_t, Table, TestRng};
use riffle::design::Relabelings;
use riffle::multitest::{adjust, AdjustOptions, Method, SlicePValues};
use riffle::output::TableFormat;
use riffle::scan::{MaxtMode, ScanOptions};
use riffle::stats::{Side, TestKind};

/// `features` rows of `n_a + n_b` normal values; every `1 / effect_every`-th
/// feature has its group-B values shifted by `shift`.
fn study(
    features: usize,
    n_a: usize,
    n_b: usize,
    effect_every: usize,
    shift: f64,
    seed: u64,
) -> (Vec<Vec<f64>>, Vec<u8>) {
    let labels: Vec<u8> = (0..n_a + n_b).map(|i| u8::from(i >= n_a)).collect();
    let mut rng = TestRng::new(seed);
    let rows = (0..features)
        .map(|f| {
            let effect = if f % effect_every == 0 { shift } else { 0.0 };
            labels
                .iter()
                .map(|&l| rng.normal() + f64::from(l) * effect)
                .collect()
        })
        .collect();
    (rows, labels)
}

/// Plain Benjamini & Hochberg (1995, JRSS-B 57, 289-300) step-up q-values:
/// q_(i) = min over j >= i of p_(j) m / j.
fn plain_bh(p: &[f64]) -> Vec<f64> {
    let m = p.len();
    let mut order: Vec<usize> = (0..m).collect();
    order.sort_by(|&a, &b| p[a].total_cmp(&p[b]));
    let mut q = vec![0.0; m];
    let mut running = 1.0f64;
    for rank in (0..m).rev() {
        let i = order[rank];
        running = running.min(p[i] * m as f64 / (rank + 1) as f64);
        q[i] = running;
    }
    q
}

fn close(a: f64, b: f64, rel: f64) -> bool {
    (a - b).abs() <= rel * a.abs().max(b.abs()) + 1e-300
}

/// Test 3 of the issue: 100,000 features, 1% with real effects. The
/// sequential run (h = 10) must use at most a tenth of the relabelings of
/// the fixed run (B = 2,000), counted per feature from the results table,
/// and agree with it within Monte Carlo error where the fixed p_perm is at
/// most 0.01. Its q_bh must be plain BH of its p_perm.
#[test]
fn sequential_run_uses_a_tenth_of_the_relabelings_and_agrees_with_fixed_b() {
    let (rows, labels) = study(100_000, 10, 10, 100, 2.0, 31);
    let b_total = 2_000usize;
    let run = |stop_after: Option<u64>| {
        let dir = tempfile::tempdir().unwrap();
        let mut o = options(dir.path());
        o.test = TestKind::Student;
        o.perms = b_total;
        o.seed = 5;
        o.maxt = MaxtMode::Single;
        o.stop_after = stop_after;
        let summary = scan_rows(&rows, &labels, &o);
        (summary, Table::read(&dir.path().join("results.tsv")))
    };
    let (fixed_summary, fixed) = run(None);
    let (seq_summary, seq) = run(Some(10));

    let used: Vec<f64> = seq.f64s("n_relabel");
    let seq_total: f64 = used.iter().sum();
    let fixed_total: f64 = fixed.f64s("n_relabel").iter().sum();
    assert_eq!(fixed_total, 100_000.0 * b_total as f64);
    assert_eq!(seq_total as u64, seq_summary.relabelings_used);
    assert_eq!(fixed_total as u64, fixed_summary.relabelings_used);
    assert!(
        seq_total <= 0.1 * fixed_total,
        "sequential used {seq_total} relabelings, fixed {fixed_total}: more than 10%"
    );
    eprintln!(
        "relabelings used: sequential {seq_total}, fixed {fixed_total} ({:.2}%)",
        100.0 * seq_total / fixed_total
    );

    let p_fixed = fixed.f64s("p_perm");
    let p_seq = seq.f64s("p_perm");
    let exceed = seq.f64s("n_exceed");
    let source = seq.text("p_source");
    let mut checked = 0;
    for f in 0..rows.len() {
        let l = used[f];
        if source[f] == "sequential" {
            // Besag & Clifford: h exceedances after L relabelings, p = h / L.
            assert_eq!(exceed[f], 10.0, "feature {f}");
            assert_eq!(p_seq[f], 10.0 / l, "feature {f}");
        } else {
            // Ran to the end over the same relabelings as the fixed run.
            assert_eq!(source[f], "counted", "feature {f}");
            assert_eq!(l, b_total as f64, "feature {f}");
            assert_eq!(p_seq[f], p_fixed[f], "feature {f}");
        }
        if p_fixed[f] <= 0.01 {
            // Binomial Monte Carlo standard errors of the two estimates
            // at the fixed p (common practice, no single source).
            let p = p_fixed[f];
            let se = (p * (1.0 - p) / l + p * (1.0 - p) / b_total as f64).sqrt();
            assert!(
                (p_seq[f] - p).abs() <= 4.0 * se,
                "feature {f}: sequential p {} vs fixed {p} (L = {l}, 4 se = {})",
                p_seq[f],
                4.0 * se
            );
            checked += 1;
        }
    }
    assert!(checked > 900, "only {checked} features at p_perm <= 0.01");

    // The step-up over these non-grid p-values is plain BH.
    let want = plain_bh(&p_seq);
    let got = seq.f64s("q_bh");
    for f in 0..rows.len() {
        assert!(
            close(got[f], want[f], 1e-12),
            "feature {f}: q_bh {} vs {}",
            got[f],
            want[f]
        );
    }
    // maxT needs every relabelling of every feature: not computed.
    assert!(seq.f64s("p_maxt_single").iter().all(|v| v.is_nan()));
}

/// The stopping point of each feature against a brute-force walk over the
/// same relabelings with the textbook t statistic.
#[test]
fn stopping_point_matches_brute_force() {
    let (rows, labels) = study(300, 6, 6, 3, 1.5, 7);
    let b_total = 500;
    for h in [1u64, 4, 10] {
        let dir = tempfile::tempdir().unwrap();
        let mut o = options(dir.path());
        o.test = TestKind::Student;
        o.perms = b_total;
        o.seed = 3;
        o.stop_after = Some(h);
        scan_rows(&rows, &labels, &o);
        let table = Table::read(&dir.path().join("results.tsv"));
        let (used, p) = (table.f64s("n_relabel"), table.f64s("p_perm"));
        // C(12, 6) = 924 > 500 arrangements: drawn, not listed.
        let relabel = Relabelings::draw(&labels, b_total, 3);
        assert!(!relabel.exact);
        for (f, x) in rows.iter().enumerate() {
            let observed = student_t(x, &labels).abs();
            // riffle's tie rule: within a relative 1e-10 counts as reached.
            let threshold = observed - 1e-10 * (1.0 + observed);
            let mut hits = 0u64;
            let mut stop = None;
            for b in 0..b_total {
                if student_t(x, relabel.row(b)).abs() >= threshold {
                    hits += 1;
                    if hits == h {
                        stop = Some(b + 1);
                        break;
                    }
                }
            }
            match stop {
                Some(l) => {
                    assert_eq!(used[f], l as f64, "h {h}, feature {f}");
                    assert_eq!(p[f], h as f64 / l as f64, "h {h}, feature {f}");
                }
                None => {
                    assert_eq!(used[f], b_total as f64, "h {h}, feature {f}");
                    assert_eq!(p[f], (hits + 1) as f64 / (b_total + 1) as f64);
                }
            }
        }
    }
}

#[test]
fn sequential_results_do_not_depend_on_threads_chunks_or_shards() {
    use riffle::merge::{run_merge, MergeOptions};
    use riffle::scan::ScanOutcome;
    use riffle::shard::ShardSpec;

    let (rows, labels) = study(3001, 9, 7, 20, 1.5, 12);
    let dir = tempfile::tempdir().unwrap();
    let (matrix, sheet) = write_study(dir.path(), &rows, &labels);

    for (test, format) in [
        (TestKind::Welch, TableFormat::Tsv),
        (TestKind::RankSum, TableFormat::Parquet),
    ] {
        let base = {
            let mut o = ScanOptions::new(&matrix, &sheet, "cond", &dir.path().join("x"));
            o.test = test;
            o.perms = 3000;
            o.stop_after = Some(7);
            o.phipson_smyth = true;
            o.memory_bytes = 32 << 20;
            o.quiet = true;
            o.format = format;
            o
        };
        let results = |out: &Path| std::fs::read(out.join(format.file_name("results"))).unwrap();
        let mut outputs = Vec::new();
        for (threads, chunk) in [(1, 5000), (2, 37), (2, 1000)] {
            let mut o = base.clone();
            o.threads = threads;
            o.chunk_rows = Some(chunk);
            o.out = dir.path().join(format!("{test:?}-{threads}-{chunk}"));
            riffle::scan::run_scan(&o, &AtomicBool::new(false)).unwrap();
            outputs.push(results(&o.out));
        }
        assert!(outputs[0] == outputs[1], "{test:?}: 1 vs 2 threads");
        assert!(outputs[1] == outputs[2], "{test:?}: chunk sizes");
        for n in [2u64, 3] {
            let mut dirs = Vec::new();
            for k in 1..=n {
                let mut o = base.clone();
                o.threads = 2;
                o.chunk_rows = Some(101 + k as usize * 13);
                o.shard = Some(ShardSpec { index: k, count: n });
                o.out = dir.path().join(format!("{test:?}-shard-{k}-of-{n}"));
                match riffle::scan::run(&o, &AtomicBool::new(false)).unwrap() {
                    ScanOutcome::Shard(_) => {}
                    other => panic!("expected a shard, got {other:?}"),
                }
                dirs.push(o.out);
            }
            let out = dir.path().join(format!("{test:?}-merged-{n}"));
            run_merge(
                &MergeOptions {
                    shards: dirs,
                    out: out.clone(),
                    memory_bytes: 32 << 20,
                    quiet: true,
                },
                &AtomicBool::new(false),
            )
            .unwrap();
            assert!(results(&out) == outputs[0], "{test:?}: {n} shards");
        }
    }
}

/// The study as an Arrow matrix and a sample sheet (column `cond`, levels
/// a and b), so that shards and the binary can read it.
fn write_study(dir: &Path, rows: &[Vec<f64>], labels: &[u8]) -> (PathBuf, PathBuf) {
    let samples: Vec<String> = (0..labels.len()).map(|i| format!("s{i}")).collect();
    let matrix = dir.join("m.arrow");
    let mut w = riffle::input::create_matrix_writer(
        &matrix,
        riffle::input::MatrixFormat::ArrowIpc,
        "feature",
        &samples,
        riffle::input::ValueType::F64,
        500,
    )
    .unwrap();
    let ids: Vec<String> = (0..rows.len()).map(|i| format!("f{i:05}")).collect();
    let values: Vec<f64> = rows.iter().flatten().copied().collect();
    w.write_block(&ids, &values).unwrap();
    w.finish().unwrap();
    let sheet = dir.join("sheet.tsv");
    let mut text = String::from("sample\tcond\n");
    for (s, &l) in samples.iter().zip(labels) {
        text.push_str(&format!("{s}\t{}\n", if l == 1 { "b" } else { "a" }));
    }
    std::fs::write(&sheet, text).unwrap();
    (matrix, sheet)
}

#[test]
fn command_line_sequential_run_and_its_refusals() {
    let (rows, labels) = study(400, 8, 8, 10, 2.0, 4);
    let dir = tempfile::tempdir().unwrap();
    let (matrix, sheet) = write_study(dir.path(), &rows, &labels);
    let out = dir.path().join("out");
    let base = [
        "scan",
        "--matrix",
        matrix.to_str().unwrap(),
        "--samples",
        sheet.to_str().unwrap(),
        "--group",
        "cond",
        "--out",
        out.to_str().unwrap(),
        "--perms",
        "4000",
        "--format",
        "tsv",
        "--quiet",
        "--no-report",
    ];
    let run = |extra: &[&str]| {
        let args: Vec<&str> = base.iter().chain(extra).copied().collect();
        common::riffle(&args)
    };
    let done = run(&["--stop-after", "10", "--phipson-smyth"]);
    assert!(
        done.status.success(),
        "{}",
        String::from_utf8_lossy(&done.stderr)
    );
    let table = Table::read(&out.join("results.tsv"));
    let sources = table.text("p_source");
    assert!(sources.iter().any(|s| s == "sequential"));
    assert!(sources.iter().any(|s| s == "phipson-smyth"));
    let record: serde_json::Value =
        serde_json::from_slice(&std::fs::read(out.join("run.json")).unwrap()).unwrap();
    let used = record["relabelings"]["used"].as_u64().unwrap();
    let summed: f64 = table.f64s("n_relabel").iter().sum();
    assert_eq!(used as f64, summed);
    assert_eq!(record["relabelings"]["fixed_b_equivalent"], 400 * 4000);
    assert!(used < 400 * 4000 / 2);

    for (extra, expect) in [
        (
            &["--stop-after", "0"][..],
            "--stop-after must be at least 1",
        ),
        (
            &["--stop-after", "10", "--pooled-null"][..],
            "--pooled-null",
        ),
    ] {
        let _ = std::fs::remove_dir_all(&out);
        let failed = run(extra);
        let stderr = String::from_utf8_lossy(&failed.stderr);
        assert_eq!(failed.status.code(), Some(2), "{stderr}");
        assert!(
            stderr.contains(expect) && stderr.lines().count() == 1,
            "{stderr}"
        );
        assert!(!out.join("results.tsv").exists());
    }
}

/// Binomial CDF F(b; n, p) by summing the probability mass function in
/// log space.
fn binomial_cdf(b: u64, n: u64, p: f64) -> f64 {
    if p >= 1.0 {
        return if b >= n { 1.0 } else { 0.0 };
    }
    let (lp, lq) = (p.ln(), (1.0 - p).ln());
    let mut log_choose = 0.0f64;
    let mut total = 0.0;
    for k in 0..=b.min(n) {
        if k > 0 {
            log_choose += ((n - k + 1) as f64).ln() - (k as f64).ln();
        }
        total += (log_choose + k as f64 * lp + (n - k) as f64 * lq).exp();
    }
    total.min(1.0)
}

/// Phipson & Smyth (2010), the exact p-value for B draws with replacement
/// from m_t equally likely distinct relabelings, b of them at least as
/// extreme: p = (1 / m_t) sum_{i = 1}^{m_t} F(b; B, i / m_t).
fn phipson_smyth_by_sum(b: u64, big_b: u64, m_t: u64) -> f64 {
    (1..=m_t)
        .map(|i| binomial_cdf(b, big_b, i as f64 / m_t as f64))
        .sum::<f64>()
        / m_t as f64
}

/// Test 4 of the issue: the library's Phipson–Smyth p equals the paper's
/// formula summed directly on small cases, and tends to (b + 1) / (B + 1)
/// as m_t grows.
#[test]
fn phipson_smyth_matches_the_papers_formula() {
    for &(b, big_b, m_t) in &[
        (0u64, 10u64, 5u64),
        (0, 99, 100),
        (3, 20, 50),
        (10, 200, 126),
        (5, 1000, 252),
        (0, 1000, 126),
        (40, 500, 3432),
        (199, 200, 70),
    ] {
        let want = phipson_smyth_by_sum(b, big_b, m_t);
        let got = riffle::tail::phipson_smyth_exact(b, big_b, m_t as u128);
        assert!(
            close(got, want, 1e-10),
            "b {b}, B {big_b}, m_t {m_t}: {got} vs {want}"
        );
        // Never below the smallest possible true p, never above the
        // usual (b + 1) / (B + 1).
        assert!(got <= (b + 1) as f64 / (big_b + 1) as f64 + 1e-15);
    }
    // Huge spaces: the correction integral is at most 0.5 / m_t.
    for &(b, big_b) in &[(0u64, 1000u64), (7, 999), (250, 10_000)] {
        let p = riffle::tail::phipson_smyth_exact(b, big_b, 1u128 << 80);
        let usual = (b + 1) as f64 / (big_b + 1) as f64;
        assert!(
            (p - usual).abs() <= 1e-15,
            "b {b}, B {big_b}: {p} vs {usual}"
        );
    }
}

/// Through scan: a 5 + 5 design has C(10, 5) = 252 arrangements, which pair
/// up (groups swapped) into 126 distinct two-sided statistics; 200 draws.
#[test]
fn scan_writes_phipson_smyth_p_for_small_spaces() {
    let (rows, labels) = study(60, 5, 5, 4, 1.5, 9);
    for (side, m_t) in [(Side::Both, 126u64), (Side::Greater, 252)] {
        for maxt in [MaxtMode::StepDown, MaxtMode::Single] {
            let dir = tempfile::tempdir().unwrap();
            let mut o = options(dir.path());
            o.test = TestKind::Student;
            o.side = side;
            o.perms = 200;
            o.maxt = maxt;
            o.phipson_smyth = true;
            scan_rows(&rows, &labels, &o);
            let table = Table::read(&dir.path().join("results.tsv"));
            let (p, b) = (table.f64s("p_perm"), table.f64s("n_exceed"));
            for f in 0..rows.len() {
                assert_eq!(table.text("p_source")[f], "phipson-smyth");
                let want = phipson_smyth_by_sum(b[f] as u64, 200, m_t);
                assert!(
                    close(p[f], want, 1e-10),
                    "{side:?} {maxt:?} feature {f}: {} vs {want}",
                    p[f]
                );
            }
        }
    }
    // 20 + 20: C(40, 20) / 2 is about 6.9e10, so p is (b + 1) / (B + 1).
    let (rows, labels) = study(40, 20, 20, 4, 1.0, 10);
    let dir = tempfile::tempdir().unwrap();
    let mut o = options(dir.path());
    o.perms = 500;
    o.phipson_smyth = true;
    scan_rows(&rows, &labels, &o);
    let table = Table::read(&dir.path().join("results.tsv"));
    for (p, b) in table.f64s("p_perm").iter().zip(table.f64s("n_exceed")) {
        assert!((p - (b + 1.0) / 501.0).abs() < 1e-10);
    }
}

/// The multiple-testing pass over continuous p-values (h / L and
/// Phipson–Smyth are off the (b + 1) / (B + 1) grid), on the external-sort
/// path that a small memory budget forces, against plain BH.
#[test]
fn bh_on_non_grid_p_values_external_sort() {
    let mut rng = TestRng::new(77);
    let p: Vec<f64> = (0..60_000)
        .map(|i| match i % 3 {
            0 => 10.0 / (10.0 + (rng.uniform() * 1e6).floor()),
            1 => (1.0 + (rng.uniform() * 2000.0).floor()) / 2001.0,
            _ => rng.uniform().powi(3),
        })
        .collect();
    let dir = tempfile::tempdir().unwrap();
    let opts = AdjustOptions {
        methods: vec![Method::Bh],
        memory_bytes: 64 << 10,
        scratch_dir: dir.path().to_path_buf(),
        ..AdjustOptions::default()
    };
    let mut got = Vec::new();
    let summary = adjust(&mut SlicePValues(&p), &opts, &mut |_, row| {
        got.push(row[0]);
        Ok(())
    })
    .unwrap();
    assert!(summary.used_external_sort);
    let want = plain_bh(&p);
    for i in 0..p.len() {
        assert!(
            close(got[i], want[i], 1e-12),
            "{i}: {} vs {}",
            got[i],
            want[i]
        );
    }
}

#[test]
fn sequential_refuses_what_needs_every_relabelling() {
    let (rows, labels) = study(10, 5, 5, 2, 1.0, 1);
    let d = common::design(&labels);
    let ids: Vec<String> = (0..rows.len()).map(|i| format!("f{i}")).collect();
    let values: Vec<f64> = rows.iter().flatten().copied().collect();
    for (pooled, h, expect) in [(true, 10, "--pooled-null"), (false, 0, "at least 1")] {
        let dir = tempfile::tempdir().unwrap();
        let mut o = options(dir.path());
        o.pooled_null = pooled;
        o.stop_after = Some(h);
        let source = riffle::input::memory::MemorySource::new(
            ids.clone(),
            d.samples.clone(),
            values.clone(),
        )
        .unwrap();
        let err =
            riffle::scan::run_scan_on(Box::new(source), &(&d).into(), &o, &AtomicBool::new(false))
                .unwrap_err()
                .to_string();
        assert!(err.contains(expect), "{err}");
        assert!(!dir.path().join("results.tsv").exists());
    }
}
