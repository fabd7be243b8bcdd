//! `riffle import` and `riffle inspect` driven through the binary, checked
//! against the numbers written into invented text matrices.

mod common;

use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::Output;

use common::riffle;
use common::TestRng;
use riffle::input::{open_matrix, FeatureBlock};

const N_FEATURES: usize = 37;
const N_SAMPLES: usize = 6;

struct Invented {
    ids: Vec<String>,
    samples: Vec<String>,
    /// Row-major, one row per feature; NaN for missing.
    values: Vec<f64>,
}

/// Invented abundances with a few missing cells, the values spread over
/// many magnitudes so that f32 rounding is visible.
fn invented() -> Invented {
    let mut rng = TestRng::new(20_240_611);
    let ids = (0..N_FEATURES).map(|i| format!("tx{i:03}")).collect();
    let samples = (0..N_SAMPLES).map(|i| format!("leaf_{i}")).collect();
    let values = (0..N_FEATURES * N_SAMPLES)
        .map(|k| {
            if k % 11 == 3 {
                f64::NAN
            } else {
                (rng.normal() * 3.0).exp() * if k.is_multiple_of(5) { -1.0 } else { 1.0 }
            }
        })
        .collect();
    Invented {
        ids,
        samples,
        values,
    }
}

/// Missing cells are written in each of the accepted spellings in turn.
fn cell(value: f64, k: usize) -> String {
    if value.is_nan() {
        ["NA", "", "NaN", "nan"][k % 4].to_string()
    } else {
        // Display of f64 prints the shortest text that parses back to the
        // same value (Rust standard library documentation of f64's Display).
        format!("{value}")
    }
}

fn text_matrix(data: &Invented, delimiter: char, features_in_columns: bool) -> String {
    let d = delimiter.to_string();
    let mut text = String::new();
    if features_in_columns {
        text.push_str(&format!("sample{d}{}\n", data.ids.join(&d)));
        for (s, sample) in data.samples.iter().enumerate() {
            let cells: Vec<String> = (0..N_FEATURES)
                .map(|f| cell(data.values[f * N_SAMPLES + s], f * N_SAMPLES + s))
                .collect();
            text.push_str(&format!("{sample}{d}{}\r\n", cells.join(&d)));
        }
    } else {
        text.push_str(&format!("gene{d}{}\n", data.samples.join(&d)));
        for (f, id) in data.ids.iter().enumerate() {
            let cells: Vec<String> = (0..N_SAMPLES)
                .map(|s| cell(data.values[f * N_SAMPLES + s], f * N_SAMPLES + s))
                .collect();
            text.push_str(&format!("{id}{d}{}\n", cells.join(&d)));
        }
    }
    text
}

fn write_text(path: &Path, text: &str, gzip: bool) {
    let file = std::fs::File::create(path).unwrap();
    if gzip {
        let mut encoder = flate2::write::GzEncoder::new(file, flate2::Compression::default());
        encoder.write_all(text.as_bytes()).unwrap();
        encoder.finish().unwrap();
    } else {
        let mut file = file;
        file.write_all(text.as_bytes()).unwrap();
    }
}

fn stderr(output: &Output) -> String {
    String::from_utf8_lossy(&output.stderr).into_owned()
}

fn import(args: &[&str]) -> Output {
    let mut all = vec!["import"];
    all.extend_from_slice(args);
    riffle(&all)
}

fn read_back(path: &Path, samples: &[String]) -> (Vec<String>, Vec<f64>) {
    let mut source = open_matrix(path, "feature", samples).unwrap();
    let mut block = FeatureBlock::default();
    let (mut ids, mut values) = (Vec::new(), Vec::new());
    while source.next_block(10, &mut block).unwrap() > 0 {
        ids.extend_from_slice(&block.ids);
        values.extend_from_slice(&block.values);
    }
    (ids, values)
}

fn same(a: f64, b: f64) -> bool {
    a == b || (a.is_nan() && b.is_nan())
}

fn s(path: &Path) -> &str {
    path.to_str().unwrap()
}

#[test]
fn round_trips_in_both_orientations_formats_and_compressions() {
    let dir = tempfile::tempdir().unwrap();
    let data = invented();
    let mut case = 0;
    for features_in_columns in [false, true] {
        for gzip in [false, true] {
            for delimiter in ['\t', ','] {
                for extension in ["arrow", "parquet"] {
                    for wide_values in [false, true] {
                        case += 1;
                        let input = dir
                            .path()
                            .join(format!("m{case}.{}", if gzip { "txt.gz" } else { "txt" }));
                        write_text(
                            &input,
                            &text_matrix(&data, delimiter, features_in_columns),
                            gzip,
                        );
                        let out = dir.path().join(format!("m{case}.{extension}"));
                        let mut args = vec!["--input", s(&input), "--out", s(&out)];
                        if features_in_columns {
                            args.push("--features-in-columns");
                        }
                        if wide_values {
                            args.push("--f64");
                        }
                        let run = import(&args);
                        assert!(run.status.success(), "case {case}: {}", stderr(&run));
                        let (ids, values) = read_back(&out, &data.samples);
                        assert_eq!(ids, data.ids, "case {case}");
                        for (k, (&got, &want)) in values.iter().zip(&data.values).enumerate() {
                            // f32 storage is IEEE 754 round-to-nearest of the
                            // f64 value (Rust reference, numeric casts).
                            let want = if wide_values {
                                want
                            } else {
                                want as f32 as f64
                            };
                            assert!(same(got, want), "case {case}, cell {k}: {got} vs {want}");
                        }
                    }
                }
            }
        }
    }
}

#[test]
fn semicolons_quotes_and_byte_order_mark() {
    let dir = tempfile::tempdir().unwrap();
    let input = dir.path().join("euro.csv");
    std::fs::write(
        &input,
        "\u{feff}\"gene\";\"S 1\";S2\n\"g;1\";1.25;-3\ng2;NA;0.5\n",
    )
    .unwrap();
    let out = dir.path().join("euro.arrow");
    let run = import(&["--input", s(&input), "--out", s(&out), "--f64"]);
    assert!(run.status.success(), "{}", stderr(&run));
    let (ids, values) = read_back(&out, &["S 1".to_string(), "S2".to_string()]);
    assert_eq!(ids, ["g;1", "g2"]);
    assert!(same(values[0], 1.25) && same(values[1], -3.0) && values[2].is_nan());
}

#[test]
fn many_passes_give_the_bytes_of_the_in_memory_transpose() {
    let dir = tempfile::tempdir().unwrap();
    let data = invented();
    for extension in ["arrow", "parquet"] {
        let wide = dir.path().join("wide.tsv.gz");
        write_text(&wide, &text_matrix(&data, '\t', true), true);
        let tall = dir.path().join("tall.tsv");
        write_text(&tall, &text_matrix(&data, '\t', false), false);
        let outputs: Vec<PathBuf> = ["small", "large", "rows"]
            .iter()
            .map(|name| dir.path().join(format!("{name}.{extension}")))
            .collect();
        // 1K of budget holds about 10 features of 6 samples: 4 or more passes.
        let small = import(&[
            "--input",
            s(&wide),
            "--out",
            s(&outputs[0]),
            "--features-in-columns",
            "--memory",
            "1K",
        ]);
        assert!(small.status.success(), "{}", stderr(&small));
        let passes_line = stderr(&small);
        let passes: usize = passes_line
            .split(", ")
            .find_map(|part| part.strip_suffix(" pass(es) over the input\n"))
            .and_then(|n| n.parse().ok())
            .unwrap_or_else(|| panic!("no pass count in {passes_line}"));
        assert!(passes >= 4, "{passes_line}");
        let large = import(&[
            "--input",
            s(&wide),
            "--out",
            s(&outputs[1]),
            "--features-in-columns",
        ]);
        assert!(large.status.success(), "{}", stderr(&large));
        assert!(stderr(&large).contains(" 1 pass(es)"), "{}", stderr(&large));
        let rows = import(&["--input", s(&tall), "--out", s(&outputs[2])]);
        assert!(rows.status.success(), "{}", stderr(&rows));
        let bytes: Vec<Vec<u8>> = outputs.iter().map(|p| std::fs::read(p).unwrap()).collect();
        assert!(bytes[0] == bytes[1], "{extension}: band passes differ");
        assert!(bytes[0] == bytes[2], "{extension}: transpose differs");
    }
}

struct BadCase {
    name: &'static str,
    text: &'static str,
    features_in_columns: bool,
    /// Texts the error line must hold besides the file name.
    expected: &'static [&'static str],
}

#[test]
fn bad_text_is_refused_with_file_line_and_column() {
    let cases = [
        BadCase {
            name: "ragged",
            text: "gene\tA\tB\tC\ng1\t1\t2\t3\ng2\t1\t2\n",
            features_in_columns: false,
            expected: &["line 3, column 4", "expected 4 cells", "found 3", "'C'"],
        },
        BadCase {
            name: "ragged_long",
            text: "gene,A,B\ng1,1,2\ng2,1,2,3\n",
            features_in_columns: false,
            expected: &["line 3, column 4", "expected 3 cells", "found 4"],
        },
        BadCase {
            name: "duplicate_feature",
            text: "gene\tA\tB\ng1\t1\t2\ng2\t1\t2\ng1\t3\t4\n",
            features_in_columns: false,
            expected: &["lines 2 and 4, column 1 ('gene')", "'g1' appears twice"],
        },
        BadCase {
            name: "duplicate_sample",
            text: "gene\tA\tB\tA\ng1\t1\t2\t3\n",
            features_in_columns: false,
            expected: &["line 1, columns 2 and 4", "sample 'A' appears twice"],
        },
        BadCase {
            name: "not_a_number",
            text: "gene,A,B\ng1,1,2\ng2,3,4.5.6\n",
            features_in_columns: false,
            expected: &["line 3, column 3 ('B')", "'4.5.6' is not a number"],
        },
        BadCase {
            name: "infinite",
            text: "gene\tA\tB\ng1\tInf\t2\n",
            features_in_columns: false,
            expected: &["line 2, column 2 ('A')", "'Inf' is infinite"],
        },
        BadCase {
            name: "minus_infinite",
            text: "gene\tA\tB\ng1\t1\t-inf\n",
            features_in_columns: false,
            expected: &["line 2, column 3 ('B')", "infinite"],
        },
        BadCase {
            name: "f32_overflow",
            text: "gene\tA\tB\ng1\t1\t2\ng2\t5e38\t2\n",
            features_in_columns: false,
            expected: &["line 3, column 2 ('A')", "32-bit", "--f64"],
        },
        BadCase {
            name: "empty",
            text: "",
            features_in_columns: false,
            expected: &["line 1, column 1", "empty"],
        },
        BadCase {
            name: "header_only",
            text: "gene\tA\tB\n",
            features_in_columns: false,
            expected: &["line 2, column 1", "no data rows"],
        },
        BadCase {
            name: "empty_id",
            text: "gene\tA\tB\ng1\t1\t2\n \t1\t2\n",
            features_in_columns: false,
            expected: &["line 3, column 1 ('gene')", "empty id"],
        },
        BadCase {
            name: "wide_duplicate_feature",
            text: "sample\tg1\tg2\tg1\nA\t1\t2\t3\n",
            features_in_columns: true,
            expected: &["line 1, columns 2 and 4", "feature 'g1' appears twice"],
        },
        BadCase {
            name: "wide_duplicate_sample",
            text: "sample\tg1\tg2\nA\t1\t2\nB\t1\t2\nA\t1\t2\n",
            features_in_columns: true,
            expected: &[
                "lines 2 and 4, column 1 ('sample')",
                "sample 'A' appears twice",
            ],
        },
        BadCase {
            name: "wide_not_a_number",
            text: "sample,g1,g2\nA,1,2\nB,1,x7\n",
            features_in_columns: true,
            expected: &["line 3, column 3 ('g2')", "'x7' is not a number"],
        },
        BadCase {
            name: "wide_header_only",
            text: "sample,g1,g2\n",
            features_in_columns: true,
            expected: &["line 2, column 1", "no data rows"],
        },
    ];
    let dir = tempfile::tempdir().unwrap();
    for case in &cases {
        for gzip in [false, true] {
            let input =
                dir.path()
                    .join(format!("{}.{}", case.name, if gzip { "gz" } else { "tsv" }));
            write_text(&input, case.text, gzip);
            let out = dir.path().join(format!("{}.parquet", case.name));
            let mut args = vec!["--input", s(&input), "--out", s(&out)];
            if case.features_in_columns {
                args.push("--features-in-columns");
            }
            let run = import(&args);
            let message = stderr(&run);
            assert_eq!(run.status.code(), Some(2), "{}: {message}", case.name);
            assert!(message.contains(s(&input)), "{}: {message}", case.name);
            for part in case.expected {
                assert!(message.contains(part), "{}: {message}", case.name);
            }
            assert_eq!(message.lines().count(), 1, "{}: {message}", case.name);
            assert!(!out.exists(), "{}: output left behind", case.name);
        }
    }
    let leftovers: Vec<_> = std::fs::read_dir(dir.path())
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|name| name.starts_with('.'))
        .collect();
    assert!(leftovers.is_empty(), "temporary files left: {leftovers:?}");
}

#[test]
fn corrupt_gzip_and_binary_input_are_bad_input() {
    let dir = tempfile::tempdir().unwrap();
    let data = invented();
    let whole = dir.path().join("whole.gz");
    write_text(&whole, &text_matrix(&data, '\t', false), true);
    let bytes = std::fs::read(&whole).unwrap();
    let cut = dir.path().join("cut.gz");
    std::fs::write(&cut, &bytes[..bytes.len() * 2 / 3]).unwrap();
    let out = dir.path().join("cut.arrow");
    let run = import(&["--input", s(&cut), "--out", s(&out)]);
    assert_eq!(run.status.code(), Some(2), "{}", stderr(&run));
    assert!(stderr(&run).contains("gzip stream is corrupt or truncated"));
    assert!(!out.exists());

    let matrix = dir.path().join("ok.arrow");
    assert!(import(&["--input", s(&whole), "--out", s(&matrix)])
        .status
        .success());
    let again = import(&["--input", s(&matrix), "--out", s(&out)]);
    assert_eq!(again.status.code(), Some(2));
    assert!(
        stderr(&again).contains("not a text table"),
        "{}",
        stderr(&again)
    );
}

#[test]
fn inspect_prints_shape_and_flags_missing_samples() {
    let dir = tempfile::tempdir().unwrap();
    let input = dir.path().join("small.csv");
    // Feature means: g1 2, g2 5 (one value missing), g3 constant 7, g4 all
    // missing: computed by hand.
    std::fs::write(
        &input,
        "id,S1,S2,S3\ng1,1,2,3\ng2,4,NA,6\ng3,7,7,7\ng4,NA,,NaN\n",
    )
    .unwrap();
    let matrix = dir.path().join("small.parquet");
    let run = import(&["--input", s(&input), "--out", s(&matrix)]);
    assert!(run.status.success(), "{}", stderr(&run));
    let sheet = dir.path().join("sheet.tsv");
    std::fs::write(&sheet, "sample\tgroup\nS1\tA\nS2\tB\nghost\tB\n").unwrap();
    let run = riffle(&["inspect", s(&matrix), "--samples", s(&sheet)]);
    assert!(run.status.success(), "{}", stderr(&run));
    let report = String::from_utf8(run.stdout).unwrap();
    for expected in [
        "format: Parquet",
        "features: 4",
        "sample columns: 3 (S1, S2, S3)",
        "samples Float32 x 3",
        "missing values: 4 of 12 (33.33%)",
        "all missing: 1",
        "per-feature mean: min 2.0000, median 5.0000, max 7.0000",
        "constant features: 1 (25.00%)",
        "1 sheet sample(s) missing from the matrix: ghost",
        "matrix sample columns not in the sheet: 1 (S3)",
    ] {
        assert!(report.contains(expected), "{expected:?} not in\n{report}");
    }
}
