//! `riffle adjust` driven through the built binary, on every input format,
//! against a published worked example and the statsmodels reference.

mod common;

use std::fs::File;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::Arc;

use arrow_array::cast::AsArray;
use arrow_array::types::{Float64Type, Int64Type};
use arrow_array::{Array, ArrayRef, Float64Array, Int64Array, RecordBatch, StringArray};
use arrow_schema::{DataType, Field, Schema};
use common::TestRng;
use riffle::multitest::{adjust_in_memory, AdjustOptions};

/// The 15 p-values of the worked example of Benjamini & Hochberg (1995),
/// "Controlling the false discovery rate", JRSS-B 57, 289-300, section 4.
const BH_EXAMPLE: [f64; 15] = [
    0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459, 0.3240, 0.4262, 0.5719,
    0.6528, 0.7590, 1.0000,
];

/// BH-adjusted p-values of that example to 4 decimals, as computed by
/// statsmodels 0.15 `multipletests(method="fdr_bh")` (run for this test).
const BH_ADJUSTED: [f64; 15] = [
    0.0015, 0.0030, 0.0095, 0.0356, 0.0603, 0.0639, 0.0639, 0.0645, 0.0765, 0.486, 0.5812, 0.7149,
    0.7532, 0.8132, 1.0,
];

/// statsmodels 0.15 `multipletests` on the same 15 p-values, printed to 4
/// decimals (computed with that library for this test).
const HOLM_ADJUSTED: [f64; 15] = [
    0.0015, 0.0056, 0.0247, 0.114, 0.2211, 0.278, 0.278, 0.278, 0.3213, 1.0, 1.0, 1.0, 1.0, 1.0,
    1.0,
];
const HOCHBERG_ADJUSTED: [f64; 15] = [
    0.0015, 0.0056, 0.0247, 0.114, 0.2211, 0.2682, 0.2682, 0.2752, 0.3213, 1.0, 1.0, 1.0, 1.0, 1.0,
    1.0,
];
const BY_ADJUSTED: [f64; 15] = [
    0.005, 0.01, 0.0315, 0.1182, 0.2001, 0.2119, 0.2119, 0.214, 0.2538, 1.0, 1.0, 1.0, 1.0, 1.0,
    1.0,
];

/// Input row r holds example p-value number `SHUFFLE[r]`: rows are not in
/// p order, so a result sorted by p would show.
fn shuffle() -> Vec<usize> {
    (0..15).map(|r| (r * 7 + 3) % 15).collect()
}

struct Run {
    code: i32,
    stderr: String,
}

fn riffle(args: &[&str]) -> Run {
    let output = Command::new(env!("CARGO_BIN_EXE_riffle"))
        .args(args)
        .output()
        .expect("run riffle");
    Run {
        code: output.status.code().unwrap_or(-1),
        stderr: String::from_utf8_lossy(&output.stderr).into_owned(),
    }
}

fn adjust(input: &Path, pcol: &str, out: &Path, extra: &[&str]) -> Run {
    let mut args = vec![
        "adjust",
        "--input",
        input.to_str().unwrap(),
        "--pcol",
        pcol,
        "--out",
        out.to_str().unwrap(),
    ];
    args.extend_from_slice(extra);
    riffle(&args)
}

fn parse_cell(cell: &str) -> f64 {
    if cell == "NA" {
        f64::NAN
    } else {
        cell.parse().unwrap()
    }
}

/// A text table: header and rows of cells, split on `delimiter` (the test
/// tables hold no quoted delimiters).
fn read_text(path: &Path, delimiter: char) -> (Vec<String>, Vec<Vec<String>>) {
    let text = std::fs::read_to_string(path).unwrap();
    let mut lines = text.lines();
    let header = lines
        .next()
        .unwrap()
        .split(delimiter)
        .map(String::from)
        .collect();
    let rows = lines
        .map(|l| l.split(delimiter).map(String::from).collect())
        .collect();
    (header, rows)
}

fn column(header: &[String], rows: &[Vec<String>], name: &str) -> Vec<String> {
    let k = header.iter().position(|h| h == name).unwrap();
    rows.iter().map(|r| r[k].clone()).collect()
}

fn example_text(delimiter: &str) -> String {
    let mut text = ["id", "p", "score"].join(delimiter) + "\n";
    for (r, &k) in shuffle().iter().enumerate() {
        text.push_str(&format!(
            "g{}{delimiter}{}{delimiter}{}\n",
            k + 1,
            BH_EXAMPLE[k],
            r * 3
        ));
    }
    text
}

fn example_batch() -> RecordBatch {
    let order = shuffle();
    let ids: Vec<String> = order.iter().map(|k| format!("g{}", k + 1)).collect();
    let p: Vec<f64> = order.iter().map(|&k| BH_EXAMPLE[k]).collect();
    let score: Vec<i64> = (0..15).map(|r| r * 3).collect();
    let schema = Arc::new(Schema::new(vec![
        Field::new("id", DataType::Utf8, false),
        Field::new("p", DataType::Float64, true),
        Field::new("score", DataType::Int64, false),
    ]));
    RecordBatch::try_new(
        schema,
        vec![
            Arc::new(StringArray::from(ids)) as ArrayRef,
            Arc::new(Float64Array::from(p)),
            Arc::new(Int64Array::from(score)),
        ],
    )
    .unwrap()
}

fn write_parquet(path: &Path, batches: &[RecordBatch]) {
    let file = File::create(path).unwrap();
    let mut writer = parquet::arrow::ArrowWriter::try_new(file, batches[0].schema(), None).unwrap();
    for batch in batches {
        writer.write(batch).unwrap();
    }
    writer.close().unwrap();
}

fn write_arrow(path: &Path, batches: &[RecordBatch]) {
    let file = File::create(path).unwrap();
    let mut writer = arrow_ipc::writer::FileWriter::try_new(file, &batches[0].schema()).unwrap();
    for batch in batches {
        writer.write(batch).unwrap();
    }
    writer.finish().unwrap();
}

fn read_batches(path: &Path, parquet: bool) -> Vec<RecordBatch> {
    let file = File::open(path).unwrap();
    if parquet {
        parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder::try_new(file)
            .unwrap()
            .build()
            .unwrap()
            .map(|b| b.unwrap())
            .collect()
    } else {
        arrow_ipc::reader::FileReader::try_new(file, None)
            .unwrap()
            .map(|b| b.unwrap())
            .collect()
    }
}

fn floats(batches: &[RecordBatch], name: &str) -> Vec<f64> {
    batches
        .iter()
        .flat_map(|b| {
            let a = b
                .column_by_name(name)
                .unwrap()
                .as_primitive::<Float64Type>();
            (0..a.len())
                .map(|i| if a.is_null(i) { f64::NAN } else { a.value(i) })
                .collect::<Vec<_>>()
        })
        .collect()
}

/// Checks the adjusted columns of the example, rows in input order.
fn check_example(columns: &dyn Fn(&str) -> Vec<f64>) {
    let order = shuffle();
    for (name, expected) in [
        ("q_bh", BH_ADJUSTED),
        ("p_holm", HOLM_ADJUSTED),
        ("p_hochberg", HOCHBERG_ADJUSTED),
        ("q_by", BY_ADJUSTED),
    ] {
        let got = columns(name);
        assert_eq!(got.len(), 15, "{name}");
        for (r, &k) in order.iter().enumerate() {
            assert!(
                (got[r] - expected[k]).abs() <= 0.5e-4 + 1e-12,
                "{name} of p = {}: {} vs {}",
                BH_EXAMPLE[k],
                got[r],
                expected[k]
            );
        }
    }
    let bonferroni = columns("p_bonferroni");
    for (r, &k) in order.iter().enumerate() {
        assert!((bonferroni[r] - (BH_EXAMPLE[k] * 15.0).min(1.0)).abs() < 1e-12);
    }
    // At 0.05: BH rejects 4 hypotheses, Bonferroni 3 (Benjamini & Hochberg
    // 1995, section 4); Holm, Hochberg and BY also 3 (statsmodels 0.15).
    let hits = |name: &str| columns(name).iter().filter(|&&q| q <= 0.05).count();
    assert_eq!(hits("q_bh"), 4);
    for name in ["p_bonferroni", "p_holm", "p_hochberg", "q_by"] {
        assert_eq!(hits(name), 3, "{name}");
    }
}

#[test]
fn worked_example_on_text_inputs_keeps_lines_and_order() {
    let dir = tempfile::tempdir().unwrap();
    for (name, delimiter) in [("in.tsv", "\t"), ("in.csv", ",")] {
        let input = dir.path().join(name);
        let text = example_text(delimiter);
        std::fs::write(&input, &text).unwrap();
        let out = dir.path().join(format!("out-{name}"));
        let run = adjust(&input, "p", &out, &[]);
        assert_eq!(run.code, 0, "{}", run.stderr);
        assert!(run.stderr.contains("m = 15"), "{}", run.stderr);

        // Every input line is kept byte for byte, in order, new cells after.
        let written = std::fs::read_to_string(&out).unwrap();
        assert_eq!(written.lines().count(), text.lines().count());
        for (old, new) in text.lines().zip(written.lines()) {
            assert!(
                new.starts_with(&format!("{old}{delimiter}")),
                "{old} / {new}"
            );
        }
        let d = delimiter.chars().next().unwrap();
        let (header, rows) = read_text(&out, d);
        assert_eq!(
            header,
            [
                "id",
                "p",
                "score",
                "q_bh",
                "q_by",
                "q_storey",
                "p_holm",
                "p_hochberg",
                "p_bonferroni"
            ]
        );
        check_example(&|name| {
            column(&header, &rows, name)
                .iter()
                .map(|c| parse_cell(c))
                .collect()
        });
    }
}

#[test]
fn worked_example_on_parquet_and_arrow_inputs() {
    let dir = tempfile::tempdir().unwrap();
    let batch = example_batch();
    // Two batches / row groups, to cross a batch boundary.
    let parts = [batch.slice(0, 6), batch.slice(6, 9)];
    for parquet in [true, false] {
        let input = dir
            .path()
            .join(if parquet { "in.parquet" } else { "in.arrow" });
        if parquet {
            write_parquet(&input, &parts);
        } else {
            write_arrow(&input, &parts);
        }
        let out = dir
            .path()
            .join(if parquet { "out.parquet" } else { "out.arrow" });
        let run = adjust(&input, "p", &out, &["--quiet"]);
        assert_eq!(run.code, 0, "{}", run.stderr);
        assert!(run.stderr.is_empty());
        let batches = read_batches(&out, parquet);
        let names: Vec<String> = batches[0]
            .schema()
            .fields()
            .iter()
            .map(|f| f.name().clone())
            .collect();
        assert_eq!(names[..3], ["id", "p", "score"]);
        assert_eq!(names.len(), 9);
        // Original columns unchanged, rows in input order.
        let ids: Vec<String> = batches
            .iter()
            .flat_map(|b| {
                let a = b.column_by_name("id").unwrap().as_string::<i32>();
                a.iter().map(|s| s.unwrap().to_string()).collect::<Vec<_>>()
            })
            .collect();
        let expected_ids: Vec<String> = shuffle().iter().map(|k| format!("g{}", k + 1)).collect();
        assert_eq!(ids, expected_ids);
        let scores: Vec<i64> = batches
            .iter()
            .flat_map(|b| {
                b.column_by_name("score")
                    .unwrap()
                    .as_primitive::<Int64Type>()
                    .values()
                    .to_vec()
            })
            .collect();
        assert_eq!(scores, (0..15).map(|r| r * 3).collect::<Vec<i64>>());
        let p_out = floats(&batches, "p");
        let p_in: Vec<f64> = shuffle().iter().map(|&k| BH_EXAMPLE[k]).collect();
        assert_eq!(p_out, p_in);
        check_example(&|name| floats(&batches, name));
    }
}

#[test]
fn methods_and_format_options() {
    let dir = tempfile::tempdir().unwrap();
    let input = dir.path().join("in.arrow");
    write_arrow(&input, &[example_batch()]);
    let out = dir.path().join("out.tsv");
    let run = adjust(
        &input,
        "p",
        &out,
        &["--methods", "holm,bh", "--format", "tsv", "--quiet"],
    );
    assert_eq!(run.code, 0, "{}", run.stderr);
    let (header, rows) = read_text(&out, '\t');
    assert_eq!(header, ["id", "p", "score", "p_holm", "q_bh"]);
    let q: Vec<f64> = column(&header, &rows, "q_bh")
        .iter()
        .map(|c| parse_cell(c))
        .collect();
    for (r, &k) in shuffle().iter().enumerate() {
        assert!((q[r] - BH_ADJUSTED[k]).abs() <= 0.5e-4 + 1e-12);
    }
    assert_eq!(column(&header, &rows, "score")[1], "3");
}

#[test]
fn p_value_out_of_range_names_file_row_and_column() {
    let dir = tempfile::tempdir().unwrap();
    let input = dir.path().join("bad.tsv");
    let mut text = String::from("id\tp\n");
    for row in 1..=10 {
        let p = if row == 7 {
            "1.5".to_string()
        } else {
            format!("0.0{row}")
        };
        text.push_str(&format!("f{row}\t{p}\n"));
    }
    std::fs::write(&input, text).unwrap();
    let out = dir.path().join("out.tsv");
    let run = adjust(&input, "p", &out, &[]);
    assert_eq!(run.code, 2, "{}", run.stderr);
    for part in ["bad.tsv", "row 7", "line 8", "column 'p'", "1.5"] {
        assert!(run.stderr.contains(part), "{part}: {}", run.stderr);
    }
    assert!(!out.exists());

    // The same in a Parquet file: rows counted from 1 over the whole file.
    let p: Vec<f64> = (1..=10)
        .map(|r| if r == 7 { 1.5 } else { 0.01 * r as f64 })
        .collect();
    let schema = Arc::new(Schema::new(vec![Field::new(
        "pv",
        DataType::Float64,
        false,
    )]));
    let batch =
        RecordBatch::try_new(schema, vec![Arc::new(Float64Array::from(p)) as ArrayRef]).unwrap();
    let input = dir.path().join("bad.parquet");
    write_parquet(&input, &[batch.slice(0, 4), batch.slice(4, 6)]);
    let run = adjust(&input, "pv", &dir.path().join("out.parquet"), &[]);
    assert_eq!(run.code, 2, "{}", run.stderr);
    for part in ["bad.parquet", "row 7", "column 'pv'"] {
        assert!(run.stderr.contains(part), "{part}: {}", run.stderr);
    }

    // Text that is not a number at all.
    let input = dir.path().join("word.csv");
    std::fs::write(&input, "id,p\na,0.5\nb,low\n").unwrap();
    let run = adjust(&input, "p", &dir.path().join("out.csv"), &[]);
    assert_eq!(run.code, 2);
    for part in ["word.csv", "row 2", "line 3", "'low'"] {
        assert!(run.stderr.contains(part), "{part}: {}", run.stderr);
    }
}

#[test]
fn unknown_column_lists_the_columns_and_clashes_are_refused() {
    let dir = tempfile::tempdir().unwrap();
    let input = dir.path().join("in.csv");
    std::fs::write(&input, example_text(",")).unwrap();
    let run = adjust(&input, "pvalue", &dir.path().join("out.csv"), &[]);
    assert_eq!(run.code, 2);
    for part in ["in.csv", "'pvalue'", "'id', 'p', 'score'"] {
        assert!(run.stderr.contains(part), "{part}: {}", run.stderr);
    }

    let clash = dir.path().join("clash.csv");
    std::fs::write(&clash, "id,p,q_bh\na,0.5,1\n").unwrap();
    let run = adjust(&clash, "p", &dir.path().join("out.csv"), &[]);
    assert_eq!(run.code, 2);
    assert!(
        run.stderr.contains("'q_bh' already exists"),
        "{}",
        run.stderr
    );
    // Leaving that method out makes the same file acceptable.
    let run = adjust(
        &clash,
        "p",
        &dir.path().join("out.csv"),
        &["--methods", "holm"],
    );
    assert_eq!(run.code, 0, "{}", run.stderr);
}

#[test]
fn missing_p_values_stay_missing_and_are_not_counted() {
    let dir = tempfile::tempdir().unwrap();
    let input = dir.path().join("gaps.tsv");
    let markers = ["NA", "", "NaN", "null"];
    let mut text = String::from("id\tp\n");
    let mut is_missing = Vec::new();
    for (k, &p) in BH_EXAMPLE.iter().enumerate() {
        if k % 4 == 1 {
            text.push_str(&format!("m{k}\t{}\n", markers[k % markers.len()]));
            is_missing.push(true);
        }
        text.push_str(&format!("g{k}\t{p}\n"));
        is_missing.push(false);
    }
    std::fs::write(&input, text).unwrap();
    let out = dir.path().join("out.tsv");
    let run = adjust(&input, "p", &out, &[]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    assert!(run.stderr.contains("m = 15"), "{}", run.stderr);
    assert!(run.stderr.contains("4 missing"), "{}", run.stderr);
    let (header, rows) = read_text(&out, '\t');
    let q: Vec<f64> = column(&header, &rows, "q_bh")
        .iter()
        .map(|c| parse_cell(c))
        .collect();
    let present: Vec<f64> = q
        .iter()
        .zip(&is_missing)
        .filter(|(_, &m)| !m)
        .map(|(&v, _)| v)
        .collect();
    for (got, want) in present.iter().zip(BH_ADJUSTED) {
        // BH with m = 15, as if the missing rows were absent.
        assert!((got - want).abs() <= 0.5e-4 + 1e-12, "{got} vs {want}");
    }
    for (row, &missing) in rows.iter().zip(&is_missing) {
        if missing {
            assert!(row[2..].iter().all(|c| c == "NA"), "{row:?}");
        }
    }

    // Nulls of a Parquet column give nulls.
    let p: Vec<Option<f64>> = vec![Some(0.01), None, Some(0.04), Some(f64::NAN), Some(0.03)];
    let schema = Arc::new(Schema::new(vec![Field::new("p", DataType::Float64, true)]));
    let batch =
        RecordBatch::try_new(schema, vec![Arc::new(Float64Array::from(p)) as ArrayRef]).unwrap();
    let input = dir.path().join("gaps.parquet");
    write_parquet(&input, &[batch]);
    let out = dir.path().join("out.parquet");
    let run = adjust(&input, "p", &out, &["--methods", "bh"]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    let q = floats(&read_batches(&out, true), "q_bh");
    // m = 3: 0.01 * 3 / 1, then 0.04 * 3 / 3 = 0.04 and min(0.03 * 3 / 2, 0.04).
    assert!((q[0] - 0.03).abs() < 1e-15);
    assert!(q[1].is_nan() && q[3].is_nan());
    assert!((q[2] - 0.04).abs() < 1e-15);
    assert!((q[4] - 0.04).abs() < 1e-15);
}

/// p-values with ties (a grid of permutation-like values) and missing
/// values, so both the tie handling and m are exercised.
fn synthetic_p_values(n: usize, seed: u64) -> Vec<f64> {
    let mut rng = TestRng::new(seed);
    (0..n)
        .map(|i| {
            let u = rng.uniform();
            match i % 10 {
                0 => ((u * 1000.0).floor() + 1.0) / 1001.0,
                1 if i % 1000 == 1 => f64::NAN,
                2 => u * u * 1e-3,
                _ => u,
            }
        })
        .collect()
}

fn write_p_tsv(path: &Path, p: &[f64]) {
    use std::io::Write;
    let mut out = std::io::BufWriter::new(File::create(path).unwrap());
    writeln!(out, "id\tp").unwrap();
    for (i, v) in p.iter().enumerate() {
        if v.is_nan() {
            writeln!(out, "f{i}\tNA").unwrap();
        } else {
            writeln!(out, "f{i}\t{v}").unwrap();
        }
    }
}

#[test]
fn million_rows_in_small_memory_match_the_in_memory_adjustment() {
    let dir = tempfile::tempdir().unwrap();
    let p = synthetic_p_values(1_000_000, 7);
    let input = dir.path().join("big.tsv");
    write_p_tsv(&input, &p);
    let small = dir.path().join("small.tsv");
    let run = adjust(&input, "p", &small, &["--memory", "16M"]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    assert!(
        run.stderr.contains("sorted on scratch files"),
        "the external sort should have run: {}",
        run.stderr
    );

    let (reference, summary) = adjust_in_memory(&p, &AdjustOptions::default()).unwrap();
    assert_eq!(summary.m, 1_000_000 - 1000);
    let text = std::fs::read_to_string(&small).unwrap();
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap().split('\t').collect();
    let methods = AdjustOptions::default().methods;
    let columns: Vec<usize> = methods
        .iter()
        .map(|m| header.iter().position(|h| *h == m.name()).unwrap())
        .collect();
    let mut n_rows = 0;
    for (i, line) in lines.enumerate() {
        let cells: Vec<&str> = line.split('\t').collect();
        for (k, &column) in columns.iter().enumerate() {
            let (got, want) = (parse_cell(cells[column]), reference[k][i]);
            assert!(
                (got.is_nan() && want.is_nan()) || (got - want).abs() <= 1e-12,
                "row {}, {}: {got} vs {want}",
                i + 1,
                methods[k].name()
            );
        }
        n_rows += 1;
    }
    assert_eq!(n_rows, p.len());

    // Same output bytes whatever the memory budget.
    let large = dir.path().join("large.tsv");
    let run = adjust(&input, "p", &large, &["--memory", "1G", "--quiet"]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    assert!(std::fs::read(&small).unwrap() == std::fs::read(&large).unwrap());
}

/// The statsmodels cross-check of tests/python/check_multitest.py on the
/// output of `riffle adjust`; skipped (with a note) where Python with
/// numpy and statsmodels is not installed.
#[test]
fn python_statsmodels_cross_check() {
    let has_statsmodels = Command::new("python3")
        .args(["-c", "import numpy, statsmodels"])
        .status()
        .is_ok_and(|s| s.success());
    if !has_statsmodels {
        eprintln!("skipped: python3 with numpy and statsmodels is not available");
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let input = dir.path().join("p.tsv");
    write_p_tsv(&input, &synthetic_p_values(100_000, 11));
    let out = dir.path().join("adjusted.tsv");
    let run = adjust(&input, "p", &out, &["--quiet"]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    let script: PathBuf = [
        env!("CARGO_MANIFEST_DIR"),
        "tests",
        "python",
        "check_multitest.py",
    ]
    .iter()
    .collect();
    let check = Command::new("python3")
        .arg(script)
        .arg(&out)
        .output()
        .unwrap();
    let report = String::from_utf8_lossy(&check.stdout);
    assert!(
        check.status.success(),
        "{report}{}",
        String::from_utf8_lossy(&check.stderr)
    );
    assert_eq!(report.matches("OK").count(), 5, "{report}");
}
