//! Nightly runs through the binary: `--skip-if-unchanged` skips exactly
//! when inputs and result-defining options are unchanged, and a TOML job
//! file stands for the same command line (which overrides it).

mod common;

use std::path::{Path, PathBuf};
use std::process::Output;

use common::riffle;
use common::TestRng;
use riffle::input::{create_matrix_writer, MatrixFormat, ValueType};

fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

/// 400 features, 12 samples; `renamed` changes one character of one id.
fn write_matrix(path: &Path, renamed: bool) {
    let samples: Vec<String> = (0..12).map(|i| format!("s{i}")).collect();
    let mut rng = TestRng::new(21);
    let mut w = create_matrix_writer(
        path,
        MatrixFormat::ArrowIpc,
        "feature",
        &samples,
        ValueType::F64,
        100,
    )
    .unwrap();
    let ids: Vec<String> = (0..400)
        .map(|i| {
            if renamed && i == 10 {
                "g00010".to_string()
            } else {
                format!("f{i:05}")
            }
        })
        .collect();
    let values: Vec<f64> = (0..400 * 12).map(|_| rng.normal()).collect();
    w.write_block(&ids, &values).unwrap();
    w.finish().unwrap();
}

fn write_sheet(path: &Path, note: &str) {
    let mut text = String::from("sample\tcond\tnote\n");
    for i in 0..12 {
        let level = if i % 2 == 0 { "ctl" } else { "trt" };
        text.push_str(&format!(
            "s{i}\t{level}\t{}\n",
            if i == 3 { note } else { "x" }
        ));
    }
    std::fs::write(path, text).unwrap();
}

struct Inputs {
    matrix: PathBuf,
    sheet: PathBuf,
    out: PathBuf,
}

impl Inputs {
    fn scan(&self, extra: &[&str]) -> Output {
        let mut args = vec![
            "scan",
            "--matrix",
            self.matrix.to_str().unwrap(),
            "--samples",
            self.sheet.to_str().unwrap(),
            "--group",
            "cond",
            "--perms",
            "120",
            "--format",
            "tsv",
            "--quiet",
            "--skip-if-unchanged",
            "--out",
            self.out.to_str().unwrap(),
        ];
        args.extend_from_slice(extra);
        let o = riffle(&args);
        assert!(o.status.success(), "{}", stderr(&o));
        o
    }
    fn run_record(&self) -> String {
        std::fs::read_to_string(self.out.join("run.json")).unwrap()
    }
}

fn skipped(o: &Output) -> bool {
    stderr(o).contains("nothing to do")
}

#[test]
fn skip_if_unchanged_skips_only_when_nothing_changed() {
    let dir = tempfile::tempdir().unwrap();
    let inputs = Inputs {
        matrix: dir.path().join("m.arrow"),
        sheet: dir.path().join("sheet.tsv"),
        out: dir.path().join("out"),
    };
    write_matrix(&inputs.matrix, false);
    write_sheet(&inputs.sheet, "x");

    assert!(!skipped(&inputs.scan(&[])));
    let first = inputs.run_record();
    assert!(first.contains("\"complete\": true") && first.contains("xxh3_128"));
    let o = inputs.scan(&[]);
    assert!(skipped(&o), "{}", stderr(&o));
    assert_eq!(
        inputs.run_record(),
        first,
        "a skipped run must not rewrite run.json"
    );
    // Thread count and memory do not change results, so they do not count.
    assert!(skipped(&inputs.scan(&[
        "--threads",
        "1",
        "--memory",
        "64M"
    ])));

    // One option changed.
    assert!(!skipped(&inputs.scan(&["--seed", "2"])));
    assert!(skipped(&inputs.scan(&["--seed", "2"])));
    assert!(!skipped(&inputs.scan(&[])));
    assert!(skipped(&inputs.scan(&[])));

    // One byte of the sample sheet changed (an unused column).
    write_sheet(&inputs.sheet, "y");
    assert!(!skipped(&inputs.scan(&[])));
    assert!(skipped(&inputs.scan(&[])));

    // One byte of the matrix changed (one character of one feature id).
    let before = std::fs::read(&inputs.matrix).unwrap();
    write_matrix(&inputs.matrix, true);
    let after = std::fs::read(&inputs.matrix).unwrap();
    assert_eq!(before.len(), after.len());
    let differing = before.iter().zip(&after).filter(|(a, b)| a != b).count();
    assert_eq!(
        differing, 1,
        "the matrices should differ in exactly one byte"
    );
    assert!(!skipped(&inputs.scan(&[])));
    assert!(skipped(&inputs.scan(&[])));

    // A results table that no longer matches run.json is not a finished run.
    let results = inputs.out.join("results.tsv");
    let mut text = std::fs::read_to_string(&results).unwrap();
    text.push('\n');
    std::fs::write(&results, text).unwrap();
    assert!(!skipped(&inputs.scan(&[])));
}

#[test]
fn job_file_stands_for_the_command_line_which_overrides_it() {
    let dir = tempfile::tempdir().unwrap();
    let matrix = dir.path().join("m.arrow");
    let sheet = dir.path().join("sheet.tsv");
    write_matrix(&matrix, false);
    write_sheet(&sheet, "x");
    let job = dir.path().join("nightly.toml");
    std::fs::write(
        &job,
        format!(
            "# nightly\nmatrix = {:?}\nsamples = {:?}\ngroup = \"cond\"\nlevels = [\"trt\", \"ctl\"]\n\
             perms = 150\nseed = 4\nformat = \"tsv\"\npooled-null = true\nquiet = true\n\
             out = {:?}\n",
            matrix,
            sheet,
            dir.path().join("from-job")
        ),
    )
    .unwrap();
    let job_s = job.to_str().unwrap();
    let o = riffle(&["scan", "--job", job_s]);
    assert!(o.status.success(), "{}", stderr(&o));
    let direct = dir.path().join("direct");
    let common_args = [
        "scan",
        "--matrix",
        matrix.to_str().unwrap(),
        "--samples",
        sheet.to_str().unwrap(),
        "--group",
        "cond",
        "--levels",
        "trt,ctl",
        "--perms",
        "150",
        "--format",
        "tsv",
        "--pooled-null",
        "--quiet",
    ];
    let mut args = common_args.to_vec();
    args.extend(["--seed", "4", "--out", direct.to_str().unwrap()]);
    let o = riffle(&args);
    assert!(o.status.success(), "{}", stderr(&o));
    let read = |d: &Path| std::fs::read(d.join("results.tsv")).unwrap();
    assert_eq!(read(&dir.path().join("from-job")), read(&direct));

    // The command line wins over the file.
    let overridden = dir.path().join("overridden");
    let o = riffle(&[
        "scan",
        "--job",
        job_s,
        "--seed",
        "9",
        "--out",
        overridden.to_str().unwrap(),
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    let mut args = common_args.to_vec();
    let direct9 = dir.path().join("direct9");
    args.extend(["--seed", "9", "--out", direct9.to_str().unwrap()]);
    assert!(riffle(&args).status.success());
    assert_eq!(read(&overridden), read(&direct9));
    assert_ne!(read(&overridden), read(&direct));

    // Unknown keys are named, with the file.
    std::fs::write(&job, "matrix = \"m.arrow\"\nchunk_rows = 5\n").unwrap();
    let o = riffle(&["scan", "--job", job_s]);
    assert_eq!(o.status.code(), Some(2));
    let e = stderr(&o);
    assert!(
        e.contains("nightly.toml") && e.contains("'chunk-rows'"),
        "{e}"
    );
    std::fs::write(&job, "matrix = [1, \n").unwrap();
    let o = riffle(&["scan", "--job", job_s]);
    assert_eq!(o.status.code(), Some(2));
    assert!(stderr(&o).contains("nightly.toml"), "{}", stderr(&o));
}
