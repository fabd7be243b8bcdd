//! The `riffle` binary end to end: the demo, a scan of a simulated file in
//! both formats, and one clear error with a non-zero exit for bad input.

mod common;

use std::path::{Path, PathBuf};
use std::process::Output;

use common::riffle;
use common::Table;
use riffle::input::{create_matrix_writer, MatrixFormat, ValueType};

fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

/// A small matrix (6 features, samples s1..s6) and a sheet with groups.
fn write_inputs(dir: &Path, format: MatrixFormat) -> (PathBuf, PathBuf) {
    let samples: Vec<String> = (1..=6).map(|i| format!("s{i}")).collect();
    let matrix = dir.join(match format {
        MatrixFormat::ArrowIpc => "m.arrow",
        MatrixFormat::Parquet => "m.parquet",
    });
    let mut w =
        create_matrix_writer(&matrix, format, "feature", &samples, ValueType::F64, 4).unwrap();
    let ids: Vec<String> = (0..6).map(|i| format!("g{i}")).collect();
    let values: Vec<f64> = (0..36)
        .map(|k| ((k * 37) % 11) as f64 + (k / 6) as f64)
        .collect();
    w.write_block(&ids, &values).unwrap();
    w.finish().unwrap();
    let sheet = dir.join("sheet.tsv");
    std::fs::write(
        &sheet,
        "sample\tcond\tbatch\ns1\tctl\tx\ns2\tctl\tx\ns3\tctl\ty\ns4\ttrt\ty\ns5\ttrt\tx\ns6\ttrt\ty\n",
    )
    .unwrap();
    (matrix, sheet)
}

#[test]
fn demo_runs_end_to_end() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("demo");
    let o = riffle(&["demo", "--out", out.to_str().unwrap()]);
    assert!(o.status.success(), "{}", stderr(&o));
    let stdout = String::from_utf8_lossy(&o.stdout);
    assert!(stdout.contains("2500 features"), "{stdout}");
    assert!(stdout.contains("screening results"), "{stdout}");
    let table = Table::read(&out.join("results.tsv"));
    assert_eq!(table.rows, 2500);
    // The planted shifts must dominate the hits (invented data with known truth).
    let truth = std::fs::read_to_string("demo-data/leaf_heat_truth.tsv").unwrap();
    let planted: std::collections::HashSet<&str> = truth
        .lines()
        .skip(1)
        .map(|l| l.split('\t').next().unwrap())
        .collect();
    let q = table.f64s("q_bh");
    let hits: Vec<&String> = table
        .text("feature")
        .iter()
        .zip(&q)
        .filter(|(_, &q)| q <= 0.05)
        .map(|(f, _)| f)
        .collect();
    let true_hits = hits.iter().filter(|f| planted.contains(f.as_str())).count();
    assert!(hits.len() > 100, "{} hits", hits.len());
    assert!(
        true_hits as f64 >= 0.85 * hits.len() as f64,
        "{true_hits} of {}",
        hits.len()
    );
}

#[test]
fn scan_reads_both_formats_the_same() {
    let dir = tempfile::tempdir().unwrap();
    let mut tables = Vec::new();
    for format in [MatrixFormat::ArrowIpc, MatrixFormat::Parquet] {
        let (matrix, sheet) = write_inputs(dir.path(), format);
        let out = dir.path().join(format!("out-{format:?}"));
        let o = riffle(&[
            "scan",
            "--matrix",
            matrix.to_str().unwrap(),
            "--samples",
            sheet.to_str().unwrap(),
            "--group",
            "cond",
            "--levels",
            "ctl,trt",
            "--test",
            "student",
            "--perms",
            "100",
            "--seed",
            "3",
            "--out",
            out.to_str().unwrap(),
            "--format",
            "tsv",
            "--quiet",
        ]);
        assert!(o.status.success(), "{}", stderr(&o));
        tables.push(std::fs::read(out.join("results.tsv")).unwrap());
        assert!(out.join("run.json").exists());
    }
    assert_eq!(tables[0], tables[1]);
    let text = String::from_utf8(tables.remove(0)).unwrap();
    // 3 vs 3 samples: 20 splits, all enumerated.
    assert!(text.lines().nth(1).unwrap().contains("\texact\t"), "{text}");
}

#[test]
fn bad_inputs_get_one_clear_error() {
    let dir = tempfile::tempdir().unwrap();
    let (matrix, sheet) = write_inputs(dir.path(), MatrixFormat::ArrowIpc);
    let m = matrix.to_str().unwrap();
    let out = dir.path().join("out");
    let out = out.to_str().unwrap();
    let write = |name: &str, text: &str| -> String {
        let p = dir.path().join(name);
        std::fs::write(&p, text).unwrap();
        p.to_str().unwrap().to_string()
    };
    let one_level = write("one.tsv", "sample\tcond\ns1\tctl\ns2\ttrt\ns3\ttrt\n");
    let missing = write(
        "missing.tsv",
        "sample\tcond\ns1\tctl\ns2\tctl\ns9\ttrt\ns8\ttrt\n",
    );
    let text_matrix = write("m.tsv", "feature\ts1\ns2\ng1\t1\t2\n");
    let s = sheet.to_str().unwrap();
    // (arguments, words the message must hold, exit code: 2 bad input, 3 I/O)
    let cases: Vec<(Vec<&str>, Vec<&str>)> = vec![
        (
            vec!["--matrix", m, "--samples", s, "--group", "grp"],
            vec!["no column 'grp'", "cond"],
        ),
        (
            vec!["--matrix", m, "--samples", &one_level, "--group", "cond"],
            vec!["one.tsv", "level 'ctl' has 1 sample"],
        ),
        (
            vec!["--matrix", m, "--samples", &missing, "--group", "cond"],
            vec!["m.arrow", "s9", "s8"],
        ),
        (
            vec![
                "--matrix",
                "/nonexistent/m.arrow",
                "--samples",
                s,
                "--group",
                "cond",
            ],
            vec!["/nonexistent/m.arrow"],
        ),
        (
            vec!["--matrix", &text_matrix, "--samples", s, "--group", "cond"],
            vec!["m.tsv", "line 2"],
        ),
        (
            vec![
                "--matrix",
                m,
                "--samples",
                s,
                "--group",
                "cond",
                "--perms",
                "0",
            ],
            vec!["--perms 0"],
        ),
        (
            vec![
                "--matrix",
                m,
                "--samples",
                s,
                "--group",
                "cond",
                "--levels",
                "ctl,zzz",
            ],
            vec!["level 'zzz'"],
        ),
    ];
    for (args, expected) in cases {
        let mut full = vec!["scan", "--out", out, "--quiet"];
        full.extend(&args);
        let o = riffle(&full);
        let err = stderr(&o);
        let code = if args.contains(&"/nonexistent/m.arrow") {
            3
        } else {
            2
        };
        assert_eq!(o.status.code(), Some(code), "{args:?}: {err}");
        assert_eq!(
            err.trim().lines().count(),
            1,
            "{args:?}: one line expected: {err}"
        );
        for e in expected {
            assert!(err.contains(e), "{args:?}: '{e}' not in: {err}");
        }
        assert!(!err.contains("panicked"), "{err}");
    }
    assert!(!Path::new(out).join("results.parquet").exists());
}

#[test]
fn non_numeric_sample_column_is_named() {
    use arrow_array::{ArrayRef, Float64Array, RecordBatch, StringArray};
    use std::sync::Arc;
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("mixed.arrow");
    let batch = RecordBatch::try_from_iter(vec![
        (
            "feature",
            Arc::new(StringArray::from(vec!["a", "b"])) as ArrayRef,
        ),
        (
            "s1",
            Arc::new(Float64Array::from(vec![1.0, 2.0])) as ArrayRef,
        ),
        (
            "s2",
            Arc::new(Float64Array::from(vec![1.5, 2.5])) as ArrayRef,
        ),
        (
            "s3",
            Arc::new(StringArray::from(vec!["x", "y"])) as ArrayRef,
        ),
        (
            "s4",
            Arc::new(Float64Array::from(vec![0.5, 3.0])) as ArrayRef,
        ),
    ])
    .unwrap();
    let file = std::fs::File::create(&path).unwrap();
    let mut w = arrow_ipc::writer::FileWriter::try_new(file, &batch.schema()).unwrap();
    w.write(&batch).unwrap();
    w.finish().unwrap();
    let sheet = dir.path().join("s.tsv");
    std::fs::write(&sheet, "sample\tg\ns1\ta\ns2\ta\ns3\tb\ns4\tb\n").unwrap();
    let o = riffle(&[
        "scan",
        "--matrix",
        path.to_str().unwrap(),
        "--samples",
        sheet.to_str().unwrap(),
        "--group",
        "g",
        "--out",
        dir.path().join("o").to_str().unwrap(),
        "--quiet",
    ]);
    let err = stderr(&o);
    assert_eq!(o.status.code(), Some(2), "{err}");
    assert!(err.contains("mixed.arrow") && err.contains("s3"), "{err}");
}
