//! A table of hostile inputs, each run through the real `riffle` binary: the
//! exit code, and one line on stderr naming the file, the place in it and
//! what was expected. Never a panic, never a results file.
//!
//! The expectations follow riffle's documented contract (README "Exit
//! codes"): 2 for bad input or options, 3 for I/O failures. The file-format
//! facts used to build broken files are from the Arrow IPC format
//! specification ("File format": `ARROW1` magic, padding, footer, int32
//! footer length, `ARROW1` trailer) and the Apache Parquet format
//! specification ("File format": `PAR1` at both ends, 4-byte footer length
//! before the trailing magic).

use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use std::sync::Arc;

use arrow_array::{Array, ArrayRef, Float64Array, Int64Array, RecordBatch, StringArray};
use arrow_schema::{DataType, Field, Schema};
use riffle::input::{create_matrix_writer, MatrixFormat, ValueType};

const SAMPLES: [&str; 8] = ["s1", "s2", "s3", "s4", "s5", "s6", "s7", "s8"];
const GOOD_SHEET: &str = "sample\tcond\ns1\tctl\ns2\tctl\ns3\tctl\ns4\tctl\n\
s5\theat\ns6\theat\ns7\theat\ns8\theat\n";

/// The files every case starts from: a valid matrix in both formats, a valid
/// sheet, and an output folder path.
struct Fixture {
    dir: PathBuf,
    arrow: PathBuf,
    parquet: PathBuf,
    sheet: PathBuf,
    out: PathBuf,
}

impl Fixture {
    fn new(dir: &Path) -> Fixture {
        let samples: Vec<String> = SAMPLES.iter().map(|s| s.to_string()).collect();
        let write = |name: &str, format| {
            let path = dir.join(name);
            // 3 batches / row groups, so that cuts can land between them.
            let mut w =
                create_matrix_writer(&path, format, "feature", &samples, ValueType::F64, 40)
                    .unwrap();
            let ids: Vec<String> = (0..100).map(|i| format!("g{i:03}")).collect();
            let values: Vec<f64> = (0..800)
                .map(|k| ((k * 7919) % 113) as f64 / 7.0 + (k % 8 >= 4) as u8 as f64)
                .collect();
            w.write_block(&ids, &values).unwrap();
            w.finish().unwrap();
            path
        };
        let sheet = dir.join("sheet.tsv");
        std::fs::write(&sheet, GOOD_SHEET).unwrap();
        Fixture {
            dir: dir.to_path_buf(),
            arrow: write("good.arrow", MatrixFormat::ArrowIpc),
            parquet: write("good.parquet", MatrixFormat::Parquet),
            sheet,
            out: dir.join("out"),
        }
    }

    fn file(&self, name: &str, bytes: &[u8]) -> PathBuf {
        let p = self.dir.join(name);
        std::fs::write(&p, bytes).unwrap();
        p
    }

    fn sheet_text(&self, name: &str, text: &str) -> PathBuf {
        self.file(name, text.as_bytes())
    }

    /// `riffle scan` arguments on `matrix` and `sheet`, then `extra`.
    fn scan(&self, matrix: &Path, sheet: &Path, extra: &[&str]) -> Vec<String> {
        let mut args: Vec<String> = vec![
            "scan".into(),
            "--matrix".into(),
            path_text(matrix),
            "--samples".into(),
            path_text(sheet),
            "--group".into(),
            "cond".into(),
            "--quiet".into(),
            "--out".into(),
            path_text(&self.out),
        ];
        // Defaults that a case may override.
        for (option, value) in [("--perms", "99"), ("--threads", "2")] {
            if !extra.contains(&option) {
                args.extend([option.to_string(), value.to_string()]);
            }
        }
        args.extend(extra.iter().map(|s| s.to_string()));
        args
    }

    fn good_scan(&self, extra: &[&str]) -> Vec<String> {
        self.scan(&self.arrow, &self.sheet, extra)
    }

    /// The valid Arrow file with bytes `range` replaced by `with`.
    fn patched_arrow(&self, name: &str, at: usize, with: &[u8]) -> PathBuf {
        let mut bytes = std::fs::read(&self.arrow).unwrap();
        bytes[at..at + with.len()].copy_from_slice(with);
        self.file(name, &bytes)
    }

    fn cut(&self, source: &Path, name: &str, keep: impl Fn(usize) -> usize) -> PathBuf {
        let bytes = std::fs::read(source).unwrap();
        let n = keep(bytes.len());
        self.file(name, &bytes[..n])
    }

    /// An Arrow IPC file with the given columns (written with arrow-ipc
    /// directly, so that riffle's own writer cannot refuse the schema).
    fn arrow_with(&self, name: &str, columns: Vec<(&str, ArrayRef)>) -> PathBuf {
        let fields: Vec<Field> = columns
            .iter()
            .map(|(n, a)| Field::new(*n, a.data_type().clone(), true))
            .collect();
        let schema = Arc::new(Schema::new(fields));
        let batch = RecordBatch::try_new(
            schema.clone(),
            columns.into_iter().map(|(_, a)| a).collect(),
        )
        .unwrap();
        let path = self.dir.join(name);
        let file = std::fs::File::create(&path).unwrap();
        let mut w = arrow_ipc::writer::FileWriter::try_new(file, &schema).unwrap();
        w.write(&batch).unwrap();
        w.finish().unwrap();
        path
    }
}

fn path_text(p: &Path) -> String {
    p.to_str().unwrap().to_string()
}

fn floats(rows: usize, offset: f64) -> ArrayRef {
    Arc::new(Float64Array::from(
        (0..rows)
            .map(|r| r as f64 * 0.37 + offset)
            .collect::<Vec<_>>(),
    ))
}

fn ids(rows: usize) -> ArrayRef {
    Arc::new(StringArray::from(
        (0..rows).map(|r| format!("g{r}")).collect::<Vec<_>>(),
    ))
}

fn sample_columns(rows: usize) -> Vec<(&'static str, ArrayRef)> {
    SAMPLES
        .iter()
        .enumerate()
        .map(|(i, s)| (*s, floats(rows, i as f64)))
        .collect()
}

/// Offset of the footer: the file ends with footer, int32 length, "ARROW1".
fn arrow_footer_start(bytes: &[u8]) -> usize {
    let n = bytes.len();
    let len = i32::from_le_bytes(bytes[n - 10..n - 6].try_into().unwrap()) as usize;
    n - 10 - len
}

fn run(args: &[String]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_riffle"))
        .args(args)
        .output()
        .expect("run riffle")
}

struct Case {
    name: &'static str,
    code: i32,
    /// Every fragment must appear in the single stderr line.
    fragments: &'static [&'static str],
    args: fn(&Fixture) -> Vec<String>,
}

const BAD_INPUT: i32 = 2;
const IO: i32 = 3;

fn cases() -> Vec<Case> {
    vec![
        // ---- matrix files: empty, truncated, corrupted, wrong kind ----
        Case {
            name: "empty matrix file",
            code: BAD_INPUT,
            fragments: &[
                "empty.arrow",
                "start of file",
                "empty",
                "Arrow IPC",
                "Parquet",
            ],
            args: |f| {
                let m = f.file("empty.arrow", b"");
                f.scan(&m, &f.sheet, &[])
            },
        },
        Case {
            name: "Arrow cut inside the leading magic",
            code: BAD_INPUT,
            fragments: &["cut4.arrow", "end of file", "Arrow IPC", "truncated"],
            args: |f| {
                let m = f.cut(&f.arrow, "cut4.arrow", |_| 4);
                f.scan(&m, &f.sheet, &[])
            },
        },
        Case {
            name: "Arrow cut right after the leading magic",
            code: BAD_INPUT,
            fragments: &["cut8.arrow", "end of file", "ARROW1", "truncated"],
            args: |f| {
                let m = f.cut(&f.arrow, "cut8.arrow", |_| 8);
                f.scan(&m, &f.sheet, &[])
            },
        },
        Case {
            name: "Arrow cut in the middle of the batches",
            code: BAD_INPUT,
            fragments: &["cut-half.arrow", "end of file", "ARROW1", "truncated"],
            args: |f| {
                let m = f.cut(&f.arrow, "cut-half.arrow", |n| n / 2);
                f.scan(&m, &f.sheet, &[])
            },
        },
        Case {
            name: "Arrow missing its last byte",
            code: BAD_INPUT,
            fragments: &["cut-1.arrow", "end of file", "ARROW1", "truncated"],
            args: |f| {
                let m = f.cut(&f.arrow, "cut-1.arrow", |n| n - 1);
                f.scan(&m, &f.sheet, &[])
            },
        },
        Case {
            name: "Arrow cut in the middle, trailer glued back on",
            code: BAD_INPUT,
            fragments: &[
                "glued.arrow",
                "record batch 2 of 3",
                "runs past the data section",
                "corrupt or truncated",
            ],
            args: |f| {
                let bytes = std::fs::read(&f.arrow).unwrap();
                let footer = arrow_footer_start(&bytes);
                let mut glued = bytes[..footer / 2].to_vec();
                glued.extend_from_slice(&bytes[footer..]);
                let m = f.file("glued.arrow", &glued);
                f.scan(&m, &f.sheet, &[])
            },
        },
        Case {
            name: "Arrow footer length larger than the file",
            code: BAD_INPUT,
            fragments: &["footer-len.arrow", "footer", "corrupt or truncated"],
            args: |f| {
                let n = std::fs::metadata(&f.arrow).unwrap().len() as usize;
                let m = f.patched_arrow("footer-len.arrow", n - 10, &0x7fff_fff0i32.to_le_bytes());
                f.scan(&m, &f.sheet, &[])
            },
        },
        Case {
            name: "Arrow footer overwritten with garbage",
            code: BAD_INPUT,
            fragments: &["footer-junk.arrow", "footer", "corrupt"],
            args: |f| {
                let bytes = std::fs::read(&f.arrow).unwrap();
                let start = arrow_footer_start(&bytes);
                let junk = vec![0xA5u8; bytes.len() - 10 - start];
                let m = f.patched_arrow("footer-junk.arrow", start, &junk);
                f.scan(&m, &f.sheet, &[])
            },
        },
        Case {
            name: "Arrow with a wrong leading magic",
            code: BAD_INPUT,
            fragments: &[
                "magic.arrow",
                "start of file",
                "unrecognised content",
                "Arrow IPC",
            ],
            args: |f| {
                let m = f.patched_arrow("magic.arrow", 0, b"ARROW9\x01\x02");
                f.scan(&m, &f.sheet, &[])
            },
        },
        Case {
            name: "Arrow IPC stream instead of file",
            code: BAD_INPUT,
            fragments: &[
                "stream.arrows",
                "start of file",
                "IPC stream",
                "IPC file format",
            ],
            args: |f| {
                let schema = Arc::new(Schema::new(vec![Field::new(
                    "feature",
                    DataType::Utf8,
                    false,
                )]));
                let mut buf = Vec::new();
                let mut w = arrow_ipc::writer::StreamWriter::try_new(&mut buf, &schema).unwrap();
                w.finish().unwrap();
                drop(w);
                let m = f.file("stream.arrows", &buf);
                f.scan(&m, &f.sheet, &[])
            },
        },
        Case {
            // A text matrix is imported first; here it lacks the sheet's samples.
            name: "text table without the sheet's samples",
            code: BAD_INPUT,
            fragments: &["table.tsv", "imported", "have no column", "'s3'"],
            args: |f| {
                let m = f.file("table.tsv", b"feature\ts1\ts2\ng1\t1.0\t2.0\n");
                f.scan(&m, &f.sheet, &[])
            },
        },
        Case {
            name: "Parquet cut to half",
            code: BAD_INPUT,
            fragments: &["half.parquet", "end of file", "PAR1", "truncated"],
            args: |f| {
                let m = f.cut(&f.parquet, "half.parquet", |n| n / 2);
                f.scan(&m, &f.sheet, &[])
            },
        },
        Case {
            name: "Parquet missing its last byte",
            code: BAD_INPUT,
            fragments: &["cut-1.parquet", "end of file", "PAR1", "truncated"],
            args: |f| {
                let m = f.cut(&f.parquet, "cut-1.parquet", |n| n - 1);
                f.scan(&m, &f.sheet, &[])
            },
        },
        Case {
            name: "Parquet cut inside its leading magic",
            code: BAD_INPUT,
            fragments: &["cut3.parquet", "end of file", "Parquet", "truncated"],
            args: |f| {
                let m = f.cut(&f.parquet, "cut3.parquet", |_| 3);
                f.scan(&m, &f.sheet, &[])
            },
        },
        Case {
            name: "Parquet cut in the middle, trailer glued back on",
            code: BAD_INPUT,
            fragments: &["glued.parquet", "row group 1", "Parquet file is corrupt"],
            args: |f| {
                let bytes = std::fs::read(&f.parquet).unwrap();
                let n = bytes.len();
                let meta_len = u32::from_le_bytes(bytes[n - 8..n - 4].try_into().unwrap()) as usize;
                let footer = n - 8 - meta_len;
                let mut glued = bytes[..footer / 2].to_vec();
                glued.extend_from_slice(&bytes[footer..]);
                let m = f.file("glued.parquet", &glued);
                f.scan(&m, &f.sheet, &[])
            },
        },
        Case {
            name: "Parquet footer length larger than the file",
            code: BAD_INPUT,
            fragments: &["footer-len.parquet", "footer", "Parquet file is corrupt"],
            args: |f| {
                let mut bytes = std::fs::read(&f.parquet).unwrap();
                let n = bytes.len();
                bytes[n - 8..n - 4].copy_from_slice(&0x7fff_0000u32.to_le_bytes());
                let m = f.file("footer-len.parquet", &bytes);
                f.scan(&m, &f.sheet, &[])
            },
        },
        Case {
            name: "Parquet data pages overwritten with garbage",
            code: BAD_INPUT,
            fragments: &["pages-junk.parquet", "row group", "Parquet file is corrupt"],
            args: |f| {
                let mut bytes = std::fs::read(&f.parquet).unwrap();
                for b in &mut bytes[4..600] {
                    *b = 0x5A;
                }
                let m = f.file("pages-junk.parquet", &bytes);
                f.scan(&m, &f.sheet, &[])
            },
        },
        Case {
            name: "matrix file does not exist",
            code: IO,
            fragments: &["absent.arrow", "No such file"],
            args: |f| f.scan(&f.dir.join("absent.arrow"), &f.sheet, &[]),
        },
        // ---- matrix columns ----
        Case {
            name: "id column missing",
            code: BAD_INPUT,
            fragments: &[
                "no-id.arrow",
                "column list",
                "no feature id column 'feature'",
                "'s1'",
            ],
            args: |f| {
                let m = f.arrow_with("no-id.arrow", sample_columns(5));
                f.scan(&m, &f.sheet, &[])
            },
        },
        Case {
            name: "id column is numeric",
            code: BAD_INPUT,
            fragments: &[
                "num-id.arrow",
                "column 'feature'",
                "must hold strings",
                "Int64",
            ],
            args: |f| {
                let mut cols: Vec<(&str, ArrayRef)> =
                    vec![("feature", Arc::new(Int64Array::from(vec![1, 2, 3, 4, 5])))];
                cols.extend(sample_columns(5));
                let m = f.arrow_with("num-id.arrow", cols);
                f.scan(&m, &f.sheet, &[])
            },
        },
        Case {
            name: "duplicate sample columns in the matrix",
            code: BAD_INPUT,
            fragments: &[
                "dup-col.arrow",
                "column 's3'",
                "several columns of this name",
                "unique",
            ],
            args: |f| {
                let mut cols: Vec<(&str, ArrayRef)> = vec![("feature", ids(5))];
                cols.extend(sample_columns(5));
                cols.push(("s3", floats(5, 9.0)));
                let m = f.arrow_with("dup-col.arrow", cols);
                f.scan(&m, &f.sheet, &[])
            },
        },
        Case {
            name: "a sample column holds text",
            code: BAD_INPUT,
            fragments: &["text-col.arrow", "column 's2'", "must be numeric", "Utf8"],
            args: |f| {
                let mut cols: Vec<(&str, ArrayRef)> = vec![("feature", ids(5))];
                cols.extend(sample_columns(5));
                cols[2] = ("s2", ids(5));
                let m = f.arrow_with("text-col.arrow", cols);
                f.scan(&m, &f.sheet, &[])
            },
        },
        Case {
            name: "--id-column names a sample",
            code: BAD_INPUT,
            fragments: &["--id-column 's1'", "names a sample", "feature id column"],
            args: |f| f.good_scan(&["--id-column", "s1"]),
        },
        Case {
            name: "--id-column names no column",
            code: BAD_INPUT,
            fragments: &["good.arrow", "column list", "no feature id column 'gene'"],
            args: |f| f.good_scan(&["--id-column", "gene"]),
        },
        Case {
            name: "sheet names samples the matrix lacks",
            code: BAD_INPUT,
            fragments: &[
                "good.arrow",
                "column list",
                "2 of 10 samples named in the sample sheet",
                "'s9', 's10'",
                "no column",
            ],
            args: |f| {
                let text = format!("{GOOD_SHEET}s9\tctl\ns10\theat\n");
                let s = f.sheet_text("sheet-extra.tsv", &text);
                f.scan(&f.arrow, &s, &[])
            },
        },
        // ---- sample sheets ----
        Case {
            name: "empty sample sheet",
            code: BAD_INPUT,
            fragments: &["empty.tsv", "row 1", "empty", "header"],
            args: |f| {
                let s = f.sheet_text("empty.tsv", "");
                f.scan(&f.arrow, &s, &[])
            },
        },
        Case {
            name: "header-only sample sheet",
            code: BAD_INPUT,
            fragments: &["header-only.tsv", "row 2", "header but no samples"],
            args: |f| {
                let s = f.sheet_text("header-only.tsv", "sample\tcond\n");
                f.scan(&f.arrow, &s, &[])
            },
        },
        Case {
            name: "sample sheet does not exist",
            code: IO,
            fragments: &["absent.tsv", "No such file"],
            args: |f| f.scan(&f.arrow, &f.dir.join("absent.tsv"), &[]),
        },
        Case {
            name: "duplicated sample, both rows named",
            code: BAD_INPUT,
            fragments: &["dup.tsv", "rows 3 and 6", "sample 's2' is listed twice"],
            args: |f| {
                let s = f.sheet_text(
                    "dup.tsv",
                    "sample\tcond\ns1\tctl\ns2\tctl\ns3\tctl\ns5\theat\ns2\theat\ns6\theat\n",
                );
                f.scan(&f.arrow, &s, &[])
            },
        },
        Case {
            name: "group column with one level",
            code: BAD_INPUT,
            fragments: &[
                "one-level.tsv",
                "column 'cond'",
                "exactly two levels",
                "found 1",
                "'ctl' (4)",
            ],
            args: |f| {
                let s = f.sheet_text(
                    "one-level.tsv",
                    "sample\tcond\ns1\tctl\ns2\tctl\ns3\tctl\ns4\tctl\n",
                );
                f.scan(&f.arrow, &s, &[])
            },
        },
        Case {
            name: "a level with a single sample",
            code: BAD_INPUT,
            fragments: &[
                "single.tsv",
                "column 'cond'",
                "level 'heat' has 1 sample",
                "at least 2",
            ],
            args: |f| {
                let s = f.sheet_text(
                    "single.tsv",
                    "sample\tcond\ns1\tctl\ns2\tctl\ns3\tctl\ns5\theat\n",
                );
                f.scan(&f.arrow, &s, &[])
            },
        },
        Case {
            name: "blank group value",
            code: BAD_INPUT,
            fragments: &[
                "blank.tsv",
                "row 4, column 'cond'",
                "sample 's3' has no group",
            ],
            args: |f| {
                let s = f.sheet_text(
                    "blank.tsv",
                    "sample\tcond\ns1\tctl\ns2\tctl\ns3\t \ns5\theat\ns6\theat\n",
                );
                f.scan(&f.arrow, &s, &[])
            },
        },
        Case {
            name: "unknown group column",
            code: BAD_INPUT,
            fragments: &[
                "sheet.tsv",
                "row 1",
                "no column 'treatment'",
                "--group",
                "sample, cond",
            ],
            args: |f| {
                let mut a = f.good_scan(&[]);
                let g = a.iter().position(|x| x == "cond").unwrap();
                a[g] = "treatment".into();
                a
            },
        },
        Case {
            name: "unknown sample column",
            code: BAD_INPUT,
            fragments: &[
                "sheet.tsv",
                "row 1",
                "no sample column 'id'",
                "--sample-column",
            ],
            args: |f| f.good_scan(&["--sample-column", "id"]),
        },
        Case {
            name: "ragged sample sheet row",
            code: BAD_INPUT,
            fragments: &["ragged.csv", "row 3", "expected 3 cells", "found 2"],
            args: |f| {
                let s = f.sheet_text(
                    "ragged.csv",
                    "sample,cond,batch\ns1,ctl,x\ns2,ctl\ns3,ctl,x\n",
                );
                f.scan(&f.arrow, &s, &[])
            },
        },
        Case {
            name: "empty sample id",
            code: BAD_INPUT,
            fragments: &["no-id.tsv", "row 3, column 'sample'", "empty sample id"],
            args: |f| {
                let s = f.sheet_text("no-id.tsv", "sample\tcond\ns1\tctl\n\tctl\ns3\theat\n");
                f.scan(&f.arrow, &s, &[])
            },
        },
        Case {
            name: "sample sheet is not UTF-8",
            code: BAD_INPUT,
            fragments: &["latin1.tsv", "byte 16", "not UTF-8"],
            args: |f| {
                let s = f.file("latin1.tsv", b"sample\tcond\ns1\tt\xe9moin\n");
                f.scan(&f.arrow, &s, &[])
            },
        },
        Case {
            name: "sample sheet header names a column twice",
            code: BAD_INPUT,
            fragments: &[
                "twice.tsv",
                "row 1, columns 2 and 3",
                "'cond' appears twice",
            ],
            args: |f| {
                let s = f.sheet_text("twice.tsv", "sample\tcond\tcond\ns1\ta\tb\n");
                f.scan(&f.arrow, &s, &[])
            },
        },
        // ---- options ----
        Case {
            name: "--levels names the same level twice",
            code: BAD_INPUT,
            fragments: &["--levels", "'ctl' twice", "two different levels"],
            args: |f| f.good_scan(&["--levels", "ctl,ctl"]),
        },
        Case {
            name: "--levels with three values",
            code: BAD_INPUT,
            fragments: &["--levels", "exactly two levels", "found 3"],
            args: |f| f.good_scan(&["--levels", "ctl,heat,cold"]),
        },
        Case {
            name: "--levels naming a level that does not occur",
            code: BAD_INPUT,
            fragments: &[
                "sheet.tsv",
                "column 'cond'",
                "level 'cold' (from --levels) does not occur",
                "'heat' (4)",
            ],
            args: |f| f.good_scan(&["--levels", "ctl,cold"]),
        },
        Case {
            name: "--perms 0",
            code: BAD_INPUT,
            fragments: &["--perms 0", "at least one relabelling"],
            args: |f| f.good_scan(&["--perms", "0"]),
        },
        Case {
            name: "--threads 0",
            code: BAD_INPUT,
            fragments: &["--threads", "at least 1"],
            args: |f| f.good_scan(&["--threads", "0"]),
        },
        Case {
            name: "--memory 1K",
            code: BAD_INPUT,
            fragments: &["--memory", "at least 16M"],
            args: |f| f.good_scan(&["--memory", "1K"]),
        },
        Case {
            name: "--memory that is not a size",
            code: BAD_INPUT,
            fragments: &["--memory", "'lots'", "512M or 2G"],
            args: |f| f.good_scan(&["--memory", "lots"]),
        },
        Case {
            name: "--chunk-rows 0",
            code: BAD_INPUT,
            fragments: &["--chunk-rows", "at least 1"],
            args: |f| f.good_scan(&["--chunk-rows", "0"]),
        },
        Case {
            name: "--storey-lambda out of range",
            code: BAD_INPUT,
            fragments: &["--storey-lambda", "'1.5'", "[0, 1)"],
            args: |f| f.good_scan(&["--storey-lambda", "1.5"]),
        },
        Case {
            name: "required option missing",
            code: BAD_INPUT,
            fragments: &["required", "--group"],
            args: |f| {
                let mut a = f.good_scan(&[]);
                let g = a.iter().position(|x| x == "--group").unwrap();
                a.drain(g..g + 2);
                a
            },
        },
        // ---- output ----
        Case {
            name: "output folder under a regular file",
            code: IO,
            fragments: &["blocker", "Not a directory"],
            args: |f| {
                let blocker = f.file("blocker", b"a regular file");
                let mut a = f.good_scan(&[]);
                let o = a.iter().position(|x| x == "--out").unwrap();
                a[o + 1] = path_text(&blocker.join("run1"));
                a
            },
        },
        // ---- text matrices (`riffle import`) ----
        // Rows for ragged rows, duplicate ids, non-numeric cells and Inf in
        // text matrices go here once `riffle import` lands (another branch).
        // ---- strata / covariates ----
        Case {
            name: "covariate column not in the sheet",
            code: BAD_INPUT,
            fragments: &["sheet.tsv", "'age'", "--covariates"],
            args: |f| f.good_scan(&["--test", "student", "--covariates", "age"]),
        },
        Case {
            name: "covariates with a rank test",
            code: BAD_INPUT,
            fragments: &["--covariates", "kruskal", "anova"],
            args: |f| f.good_scan(&["--test", "kruskal", "--covariates", "age"]),
        },
        Case {
            name: "covariate that is constant",
            code: BAD_INPUT,
            fragments: &["with-age.tsv", "'age'", "constant"],
            args: |f| {
                let sheet = f.sheet_text(
                    "with-age.tsv",
                    &GOOD_SHEET
                        .lines()
                        .enumerate()
                        .map(|(i, l)| format!("{l}\t{}\n", if i == 0 { "age" } else { "40" }))
                        .collect::<String>(),
                );
                f.scan(
                    &f.arrow,
                    &sheet,
                    &["--test", "anova", "--covariates", "age"],
                )
            },
        },
    ]
}

#[test]
fn every_bad_input_fails_with_one_clear_line() {
    let dir = tempfile::tempdir().unwrap();
    let fixture = Fixture::new(dir.path());
    let cases = cases();
    assert!(cases.len() >= 30, "the corpus holds {} cases", cases.len());
    let mut failures = Vec::new();
    for case in &cases {
        let _ = std::fs::remove_dir_all(&fixture.out);
        let output = run(&(case.args)(&fixture));
        let stderr = String::from_utf8_lossy(&output.stderr).into_owned();
        let code = output.status.code();
        let line = stderr.trim_end();
        let mut problems = Vec::new();
        if code != Some(case.code) {
            problems.push(format!("exit code {code:?}, expected {}", case.code));
        }
        if line.contains('\n') || line.is_empty() {
            problems.push("stderr is not exactly one line".to_string());
        }
        if !line.starts_with("riffle: error: ") {
            problems.push("stderr does not start with 'riffle: error: '".to_string());
        }
        if line.contains("panicked") || line.contains("RUST_BACKTRACE") {
            problems.push("a panic reached the user".to_string());
        }
        for fragment in case.fragments {
            if !line.contains(fragment) {
                problems.push(format!("missing {fragment:?}"));
            }
        }
        if let Ok(entries) = std::fs::read_dir(&fixture.out) {
            for e in entries.flatten() {
                let name = e.file_name().to_string_lossy().into_owned();
                if name.starts_with("results") {
                    problems.push(format!("left {name} in the output folder"));
                }
            }
        }
        if !problems.is_empty() {
            failures.push(format!(
                "{}: {}\n    stderr: {}",
                case.name,
                problems.join("; "),
                stderr.trim_end().replace('\n', "\n            ")
            ));
        }
    }
    assert!(
        failures.is_empty(),
        "{} of {} cases failed:\n{}",
        failures.len(),
        cases.len(),
        failures.join("\n")
    );
}

/// Matrix columns that the sheet does not name, and sheet rows of a third
/// level left out by --levels, are ignored: the results equal those of the
/// clean inputs byte for byte.
#[test]
fn extra_columns_and_other_levels_are_ignored() {
    let dir = tempfile::tempdir().unwrap();
    let f = Fixture::new(dir.path());
    let results = |args: Vec<String>| {
        let o = run(&args);
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        std::fs::read(f.out.join("results.tsv")).unwrap()
    };
    let clean = results(f.good_scan(&["--format", "tsv", "--levels", "ctl,heat"]));

    let bytes = std::fs::read(&f.arrow).unwrap();
    let reader = arrow_ipc::reader::FileReader::try_new(std::io::Cursor::new(bytes), None).unwrap();
    let batches: Vec<RecordBatch> = reader.map(|b| b.unwrap()).collect();
    let merged = arrow_select_concat(&batches);
    let rows = merged.num_rows();
    let mut cols: Vec<(&str, ArrayRef)> = vec![("extra_note", ids(rows))];
    for (field, column) in merged.schema().fields().iter().zip(merged.columns()) {
        let name: &'static str = Box::leak(field.name().clone().into_boxed_str());
        cols.push((name, column.clone()));
    }
    cols.push(("s99", floats(rows, 3.0)));
    let wide = f.arrow_with("wide.arrow", cols);
    let sheet = f.sheet_text(
        "three-levels.tsv",
        &format!("{GOOD_SHEET}s99\tcold\nnot_in_matrix\tcold\n"),
    );
    let _ = std::fs::remove_dir_all(&f.out);
    let extra = results(f.scan(&wide, &sheet, &["--format", "tsv", "--levels", "ctl,heat"]));
    assert_eq!(clean, extra);
}

/// Concatenates record batches of one schema (column by column).
fn arrow_select_concat(batches: &[RecordBatch]) -> RecordBatch {
    let schema = batches[0].schema();
    let columns: Vec<ArrayRef> = (0..schema.fields().len())
        .map(|c| {
            let field = schema.field(c);
            match field.data_type() {
                DataType::Utf8 => {
                    let v: Vec<String> = batches
                        .iter()
                        .flat_map(|b| {
                            let a = b.column(c).as_any().downcast_ref::<StringArray>().unwrap();
                            (0..a.len())
                                .map(|i| a.value(i).to_string())
                                .collect::<Vec<_>>()
                        })
                        .collect();
                    Arc::new(StringArray::from(v)) as ArrayRef
                }
                _ => {
                    let v: Vec<f64> = batches
                        .iter()
                        .flat_map(|b| {
                            let a = b.column(c).as_any().downcast_ref::<Float64Array>().unwrap();
                            a.values().to_vec()
                        })
                        .collect();
                    Arc::new(Float64Array::from(v)) as ArrayRef
                }
            }
        })
        .collect();
    RecordBatch::try_new(schema, columns).unwrap()
}
