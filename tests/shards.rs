//! Shards and merge: the merged results table is byte-identical to a
//! single-process run (step-down maxT across shards included), and merge
//! refuses shards that do not belong together. The reference here is the
//! single-process run, whose p-values are themselves checked against brute
//! force and scipy in `tests/maxt.rs` and `tests/python/`.

mod common;

use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::atomic::AtomicBool;

use common::TestRng;
use riffle::input::{create_matrix_writer, MatrixFormat, ValueType};
use riffle::merge::{run_merge, MergeOptions};
use riffle::output::TableFormat;
use riffle::scan::{self, MaxtMode, ScanOptions, ScanOutcome};
use riffle::shard::ShardSpec;

const SAMPLES: usize = 20;

/// Correlated blocks of 10 features (shared factor, loading 0.8), a few
/// strong effects, exact ties (duplicated rows, also across shard
/// boundaries, and coarse discrete rows) and a constant row.
fn write_study(dir: &Path, features: usize, seed: u64) -> (PathBuf, PathBuf) {
    let labels: Vec<u8> = (0..SAMPLES).map(|i| u8::from(i % 2 == 1)).collect();
    let mut rng = TestRng::new(seed);
    let mut rows: Vec<Vec<f64>> = Vec::new();
    let mut factor = vec![0.0; SAMPLES];
    for f in 0..features {
        if f % 10 == 0 {
            factor = (0..SAMPLES).map(|_| rng.normal()).collect();
        }
        let shift = if f % 97 == 5 { 2.0 } else { 0.0 };
        rows.push(
            (0..SAMPLES)
                .map(|i| 0.8 * factor[i] + 0.6 * rng.normal() + shift * f64::from(labels[i]))
                .collect(),
        );
    }
    for (to, from) in [(features - 3, 5), (features / 2, 102), (7, features - 10)] {
        rows[to] = rows[from].clone();
    }
    for f in (20..features).step_by(53) {
        rows[f] = rows[f].iter().map(|v| (v * 1.5).round()).collect();
    }
    rows[11] = vec![4.0; SAMPLES];
    let samples: Vec<String> = (0..SAMPLES).map(|i| format!("s{i}")).collect();
    let matrix = dir.join("m.arrow");
    let mut w = create_matrix_writer(
        &matrix,
        MatrixFormat::ArrowIpc,
        "feature",
        &samples,
        ValueType::F64,
        500,
    )
    .unwrap();
    let ids: Vec<String> = (0..features).map(|i| format!("f{i:05}")).collect();
    let values: Vec<f64> = rows.into_iter().flatten().collect();
    w.write_block(&ids, &values).unwrap();
    w.finish().unwrap();
    let sheet = dir.join("sheet.tsv");
    let mut text = String::from("sample\tcond\tnote\n");
    for (i, s) in samples.iter().enumerate() {
        let level = if labels[i] == 1 { "trt" } else { "ctl" };
        text.push_str(&format!("{s}\t{level}\tx\n"));
    }
    std::fs::write(&sheet, text).unwrap();
    (matrix, sheet)
}

fn options(matrix: &Path, sheet: &Path, out: &Path) -> ScanOptions {
    let mut o = ScanOptions::new(matrix, sheet, "cond", out);
    o.perms = 300;
    o.seed = 11;
    o.threads = 2;
    o.memory_bytes = 32 << 20;
    o.chunk_rows = Some(173);
    o.format = TableFormat::Tsv;
    o
}

fn results(out: &Path, format: TableFormat) -> Vec<u8> {
    std::fs::read(out.join(format.file_name("results"))).unwrap()
}

/// Runs all N shards (threads as given) and merges them into `out`.
fn shards_then_merge(base: &ScanOptions, root: &Path, n: u64, threads: usize, out: &Path) {
    let mut dirs = Vec::new();
    for k in (1..=n).rev() {
        let mut o = base.clone();
        o.threads = threads;
        o.chunk_rows = Some(97 + k as usize * 13);
        o.shard = Some(ShardSpec { index: k, count: n });
        o.out = root.join(format!("shard-{k}-of-{n}-t{threads}"));
        match scan::run(&o, &AtomicBool::new(false)).unwrap() {
            ScanOutcome::Shard(record) => {
                assert_eq!(record.range, ShardSpec { index: k, count: n }.range(3001))
            }
            other => panic!("expected a shard, got {other:?}"),
        }
        assert!(!o.out.join("results.tsv").exists());
        dirs.push(o.out);
    }
    run_merge(
        &MergeOptions {
            shards: dirs,
            out: out.to_path_buf(),
            memory_bytes: 32 << 20,
            quiet: true,
        },
        &AtomicBool::new(false),
    )
    .unwrap();
}

#[test]
fn merged_shards_are_byte_identical_to_one_process() {
    let dir = tempfile::tempdir().unwrap();
    let (matrix, sheet) = write_study(dir.path(), 3001, 3);
    for pooled in [false, true] {
        let mut base = options(&matrix, &sheet, &dir.path().join("single"));
        base.pooled_null = pooled;
        scan::run_scan(&base, &AtomicBool::new(false)).unwrap();
        let single = results(&base.out, TableFormat::Tsv);
        let text = String::from_utf8(single.clone()).unwrap();
        assert!(text.lines().count() == 3002 && text.contains("constant"));
        for threads in [1, 2] {
            for n in [1, 2, 3, 5] {
                let out = dir.path().join(format!("merged-{pooled}-{threads}-{n}"));
                shards_then_merge(&base, dir.path(), n, threads, &out);
                assert!(
                    results(&out, TableFormat::Tsv) == single,
                    "pooled {pooled}, {threads} threads, {n} shards: results.tsv differs"
                );
            }
        }
    }
}

#[test]
fn merged_parquet_and_single_step_are_byte_identical() {
    let dir = tempfile::tempdir().unwrap();
    let (matrix, sheet) = write_study(dir.path(), 3001, 4);
    for (maxt, format) in [
        (MaxtMode::StepDown, TableFormat::Parquet),
        (MaxtMode::Single, TableFormat::Tsv),
    ] {
        let mut base = options(&matrix, &sheet, &dir.path().join("single"));
        base.pooled_null = true;
        base.also_param = true;
        base.maxt = maxt;
        base.format = format;
        scan::run_scan(&base, &AtomicBool::new(false)).unwrap();
        let single = results(&base.out, format);
        for n in [2, 3] {
            let out = dir.path().join(format!("merged-{maxt:?}-{n}"));
            shards_then_merge(&base, dir.path(), n, 2, &out);
            assert!(
                results(&out, format) == single,
                "{maxt:?}, {format:?}, {n} shards: results differ"
            );
        }
    }
}

fn run_shard(base: &ScanOptions, root: &Path, k: u64, n: u64, tag: &str) -> PathBuf {
    let mut o = base.clone();
    o.shard = Some(ShardSpec { index: k, count: n });
    o.out = root.join(format!("{tag}-{k}-of-{n}"));
    scan::run(&o, &AtomicBool::new(false)).unwrap();
    o.out
}

fn merge_error(dirs: Vec<PathBuf>, out: &Path) -> (String, i32) {
    let e = run_merge(
        &MergeOptions {
            shards: dirs,
            out: out.to_path_buf(),
            memory_bytes: 32 << 20,
            quiet: true,
        },
        &AtomicBool::new(false),
    )
    .expect_err("merge should refuse");
    (e.to_string(), e.exit_code())
}

#[test]
fn merge_refuses_shards_that_do_not_belong_together() {
    let dir = tempfile::tempdir().unwrap();
    let root = dir.path();
    let (matrix, sheet) = write_study(root, 600, 5);
    let other_dir = root.join("other");
    std::fs::create_dir_all(&other_dir).unwrap();
    let (other_matrix, _) = write_study(&other_dir, 600, 6);
    let base = options(&matrix, &sheet, &root.join("unused"));
    let s1 = run_shard(&base, root, 1, 3, "a");
    let s2 = run_shard(&base, root, 2, 3, "a");
    let s3 = run_shard(&base, root, 3, 3, "a");
    let out = root.join("merged");

    let mut seed = base.clone();
    seed.seed = 12;
    let s2_seed = run_shard(&seed, root, 2, 3, "seed");
    let (e, code) = merge_error(vec![s1.clone(), s2_seed, s3.clone()], &out);
    assert!(
        e.contains("shard 2/3") && e.contains("option seed: 11 vs 12"),
        "{e}"
    );
    assert_eq!(code, 2);

    let mut side = base.clone();
    side.side = riffle::stats::Side::Greater;
    let s3_side = run_shard(&side, root, 3, 3, "side");
    let (e, _) = merge_error(vec![s1.clone(), s2.clone(), s3_side], &out);
    assert!(e.contains("shard 3/3") && e.contains("option side"), "{e}");

    let mut input = base.clone();
    input.matrix = other_matrix;
    let s2_input = run_shard(&input, root, 2, 3, "input");
    let (e, _) = merge_error(vec![s1.clone(), s2_input, s3.clone()], &out);
    assert!(e.contains("input matrix differs"), "{e}");

    let (e, code) = merge_error(vec![s1.clone(), s3.clone()], &out);
    assert!(
        e.contains("shard 2/3 is missing (features 200..400)"),
        "{e}"
    );
    assert_eq!(code, 2);

    let (e, _) = merge_error(vec![s1.clone(), s2.clone(), s2.clone(), s3.clone()], &out);
    assert!(e.contains("shard 2/3 given twice"), "{e}");

    let s2_of_4 = run_shard(&base, root, 2, 4, "four");
    let (e, _) = merge_error(vec![s1.clone(), s2_of_4, s3.clone()], &out);
    assert!(e.contains("one of 4 shards"), "{e}");

    std::fs::remove_file(s3.join("shard.json")).unwrap();
    let (e, _) = merge_error(vec![s1, s2, s3], &out);
    assert!(e.contains("no shard.json"), "{e}");
    assert!(!out.join("results.tsv").exists());
}

#[test]
fn slurm_array_environment_gives_the_shard() {
    // Slurm's documented array variables (sbatch man page, "OUTPUT
    // ENVIRONMENT VARIABLES"); `--array=0-3` and `--array=1-4` both map
    // to shards 1/4..4/4.
    let bin = env!("CARGO_BIN_EXE_riffle");
    let dir = tempfile::tempdir().unwrap();
    let (matrix, sheet) = write_study(dir.path(), 300, 7);
    for (id, min, expect) in [("0", "0", "1/4"), ("4", "1", "4/4"), ("2", "1", "2/4")] {
        let out = dir.path().join(format!("task-{id}-{min}"));
        let o = Command::new(bin)
            .args(["scan", "--matrix"])
            .arg(&matrix)
            .arg("--samples")
            .arg(&sheet)
            .args(["--group", "cond", "--perms", "50", "--out"])
            .arg(&out)
            .env("SLURM_ARRAY_TASK_ID", id)
            .env("SLURM_ARRAY_TASK_MIN", min)
            .env("SLURM_ARRAY_TASK_COUNT", "4")
            .output()
            .unwrap();
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        let record: serde_json::Value =
            serde_json::from_str(&std::fs::read_to_string(out.join("shard.json")).unwrap())
                .unwrap();
        let k: u64 = expect[..1].parse().unwrap();
        assert_eq!(record["shard"]["index"], k, "task {id} min {min}");
        assert_eq!(record["shard"]["count"], 4);
    }
}
