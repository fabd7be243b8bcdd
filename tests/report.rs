//! The run report end to end through the binary: every SVG parses and draws
//! the expected number of items for a known input, the HTML embeds every
//! plot with no outside reference, and the report is byte-stable.

mod common;

use std::path::{Path, PathBuf};
use std::process::Output;

use common::riffle;
use common::{Table, TestRng};
use riffle::input::{create_matrix_writer, MatrixFormat, ValueType};

const FEATURES: usize = 300;
const PLANTED: usize = 30;

fn ok(o: &Output) {
    assert!(
        o.status.success(),
        "exit {:?}: {}",
        o.status.code(),
        String::from_utf8_lossy(&o.stderr)
    );
}

/// 8 vs 8 samples; the first `PLANTED` features shifted by 2 SD in group B,
/// feature 5 constant (untested).
fn write_inputs(dir: &Path, format: MatrixFormat) -> (PathBuf, PathBuf) {
    let samples: Vec<String> = (0..16).map(|i| format!("s{i:02}")).collect();
    let matrix = dir.join(match format {
        MatrixFormat::ArrowIpc => "m.arrow",
        MatrixFormat::Parquet => "m.parquet",
    });
    let mut w =
        create_matrix_writer(&matrix, format, "feature", &samples, ValueType::F64, 64).unwrap();
    let mut rng = TestRng::new(42);
    let ids: Vec<String> = (0..FEATURES).map(|i| format!("f{i:05}")).collect();
    let mut values = Vec::with_capacity(FEATURES * 16);
    for f in 0..FEATURES {
        for s in 0..16 {
            let shift = if f < PLANTED && s >= 8 { 2.0 } else { 0.0 };
            values.push(if f == 5 { 1.0 } else { rng.normal() + shift });
        }
    }
    w.write_block(&ids, &values).unwrap();
    w.finish().unwrap();
    let sheet = dir.join("sheet.tsv");
    let mut text = String::from("sample\tcondition\n");
    for (i, s) in samples.iter().enumerate() {
        text.push_str(&format!("{s}\t{}\n", if i < 8 { "ctl" } else { "trt" }));
    }
    std::fs::write(&sheet, text).unwrap();
    (matrix, sheet)
}

fn scan(dir: &Path, format: MatrixFormat, extra: &[&str]) -> PathBuf {
    let (matrix, sheet) = write_inputs(dir, format);
    let out = dir.join("run");
    let mut args = vec![
        "scan",
        "--matrix",
        matrix.to_str().unwrap(),
        "--samples",
        sheet.to_str().unwrap(),
        "--group",
        "condition",
        "--seed",
        "3",
        "--threads",
        "2",
        "--quiet",
        "--out",
        out.to_str().unwrap(),
    ];
    args.extend_from_slice(extra);
    ok(&riffle(&args));
    out
}

fn parse(path: &Path) -> String {
    let text = std::fs::read_to_string(path).unwrap();
    roxmltree::Document::parse(&text).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    text
}

/// Elements whose class list has `class`, optionally under the element with `id`.
fn count(text: &str, class: &str, under: Option<&str>) -> Vec<(String, Option<String>)> {
    let doc = roxmltree::Document::parse(text).unwrap();
    let root = match under {
        Some(id) => doc
            .descendants()
            .find(|n| n.attribute("id") == Some(id))
            .unwrap_or_else(|| panic!("no element with id {id}")),
        None => doc.root(),
    };
    root.descendants()
        .filter(|n| {
            n.attribute("class")
                .is_some_and(|c| c.split(' ').any(|k| k == class))
        })
        .map(|n| {
            (
                n.tag_name().name().to_string(),
                n.attribute("data-count").map(String::from),
            )
        })
        .collect()
}

fn data_count_sum(items: &[(String, Option<String>)]) -> u64 {
    items
        .iter()
        .map(|(_, c)| c.as_ref().unwrap().parse::<u64>().unwrap())
        .sum()
}

#[test]
fn scan_writes_a_report_whose_plots_draw_every_feature() {
    let dir = tempfile::tempdir().unwrap();
    let run = scan(
        dir.path(),
        MatrixFormat::ArrowIpc,
        &["--perms", "999", "--format", "tsv"],
    );
    let report = run.join("report");
    let table = Table::read(&run.join("results.tsv"));
    let p_perm = table.f64s("p_perm");
    let p_param = table.f64s("p_param");
    let q_bh = table.f64s("q_bh");
    let tested = p_perm.iter().filter(|p| !p.is_nan()).count() as u64;
    assert_eq!(tested, FEATURES as u64 - 1);

    let p_values = parse(&report.join("p_values.svg"));
    let perm_bars = count(&p_values, "bar", Some("p-perm-panel"));
    let param_bars = count(&p_values, "bar", Some("p-param-panel"));
    assert_eq!(perm_bars.len(), riffle::report::collect::P_BINS);
    assert_eq!(param_bars.len(), riffle::report::collect::P_BINS);
    assert_eq!(data_count_sum(&perm_bars), tested);
    assert_eq!(data_count_sum(&param_bars), tested);
    assert_eq!(count(&p_values, "pi0", None).len(), 2);

    // Fewer features than are kept exactly: one QQ point per feature.
    let qq = parse(&report.join("qq.svg"));
    assert_eq!(
        count(&qq, "qq-perm", Some("qq-perm-points")).len() as u64,
        tested
    );
    assert_eq!(
        count(&qq, "qq-param", Some("qq-param-points")).len() as u64,
        tested
    );
    assert_eq!(count(&qq, "band", None).len(), 2, "band and its legend box");

    let volcano = parse(&report.join("volcano.svg"));
    let hits = q_bh.iter().filter(|q| **q <= 0.05).count();
    assert!(hits >= PLANTED / 2, "{hits} hits");
    assert_eq!(
        count(&volcano, "volcano-hit", Some("volcano-hits")).len(),
        hits
    );
    assert_eq!(
        count(&volcano, "volcano-other", Some("volcano-others")).len() as u64,
        tested - hits as u64
    );

    // Default null plots: the 3 smallest p_perm, ties by p_param.
    let mut order: Vec<usize> = (0..FEATURES).filter(|&i| !p_perm[i].is_nan()).collect();
    order.sort_by(|&a, &b| {
        (p_perm[a], p_param[a], a)
            .partial_cmp(&(p_perm[b], p_param[b], b))
            .unwrap()
    });
    for (k, &feature) in order.iter().take(3).enumerate() {
        let null = parse(&report.join(format!("null_{}.svg", k + 1)));
        let id = &table.text("feature")[feature];
        assert!(null.contains(&format!("{id}: Welch t under 999")), "{id}");
        let bars = count(&null, "bar", Some("null-bars"));
        assert_eq!(bars.len(), riffle::report::plots::NULL_BINS);
        assert_eq!(data_count_sum(&bars), 999);
        assert_eq!(count(&null, "observed", None).len(), 2, "line and legend");
        assert_eq!(
            count(&null, "ref-density", None).len(),
            2,
            "curve and legend"
        );
    }
    assert!(!report.join("null_4.svg").exists());

    let html = std::fs::read_to_string(report.join("report.html")).unwrap();
    assert_eq!(html.matches("<svg").count(), 6);
    for name in ["p_values", "qq", "volcano", "null_1", "null_2", "null_3"] {
        assert!(
            html.contains(&format!("<figure id=\"fig-{name}\">")),
            "{name}"
        );
    }
    let caution = riffle::CAUTION.replace('\'', "&#39;");
    assert!(html.contains(&caution));
    assert!(html.contains("recomputed deterministically"));
    for forbidden in ["http://", "https://", "<link", "<script", "src=", "url("] {
        assert!(
            !html.contains(forbidden),
            "report.html contains {forbidden}"
        );
    }
    assert!(html.len() < 3 << 20);

    // Same run, same report bytes.
    let again = dir.path().join("again");
    ok(&riffle(&[
        "report",
        "--run",
        run.to_str().unwrap(),
        "--out",
        again.to_str().unwrap(),
    ]));
    for name in [
        "report.html",
        "p_values.svg",
        "qq.svg",
        "volcano.svg",
        "null_1.svg",
    ] {
        assert_eq!(
            std::fs::read(report.join(name)).unwrap(),
            std::fs::read(again.join(name)).unwrap(),
            "{name}"
        );
    }
}

#[test]
fn report_of_a_parquet_rank_sum_run_with_named_features_and_errors() {
    let dir = tempfile::tempdir().unwrap();
    let run = scan(
        dir.path(),
        MatrixFormat::Parquet,
        &["--perms", "500", "--test", "rank-sum", "--no-report"],
    );
    assert!(!run.join("report").exists(), "--no-report");
    let out = dir.path().join("named");
    let o = riffle(&[
        "report",
        "--run",
        run.to_str().unwrap(),
        "--show-feature",
        "f00007",
        "--show-feature",
        "f00005",
        "--fdr",
        "0.1",
        "--out",
        out.to_str().unwrap(),
    ]);
    ok(&o);
    let null = parse(&out.join("null_1.svg"));
    assert!(null.contains("f00007: Mann–Whitney U of group B under 500"));
    let bars = count(&null, "bar", Some("null-bars"));
    assert_eq!(data_count_sum(&bars), 500);
    // Feature 5 is constant: no null plot, a note instead.
    assert!(!out.join("null_2.svg").exists());
    let html = std::fs::read_to_string(out.join("report.html")).unwrap();
    assert!(html.contains("f00005: not tested (constant)"), "{html}");
    assert!(html.contains("q_bh ≤ 0.1"));

    let o = riffle(&[
        "report",
        "--run",
        run.to_str().unwrap(),
        "--show-feature",
        "nope",
    ]);
    assert_eq!(o.status.code(), Some(2));
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("--show-feature 'nope'") && err.contains("results.parquet"),
        "{err}"
    );

    let o = riffle(&["report", "--run", dir.path().to_str().unwrap()]);
    assert_eq!(o.status.code(), Some(3));
    assert!(String::from_utf8_lossy(&o.stderr).contains("run.json"));
}

#[test]
fn exact_mean_difference_nulls_are_on_the_t_scale() {
    // 3 vs 3 samples have 20 splits: 19 relabelings, listed exactly.
    let dir = tempfile::tempdir().unwrap();
    let samples: Vec<String> = (0..6).map(|i| format!("s{i}")).collect();
    let matrix = dir.path().join("m.arrow");
    let mut w = create_matrix_writer(
        &matrix,
        MatrixFormat::ArrowIpc,
        "feature",
        &samples,
        ValueType::F64,
        8,
    )
    .unwrap();
    // Student (1908) sleep data, first three patients of each drug
    // (DESIGN.md §8): A = 0.7 -1.6 -0.2, B = 1.9 0.8 1.1.
    w.write_block(&["g1".to_string()], &[0.7, -1.6, -0.2, 1.9, 0.8, 1.1])
        .unwrap();
    w.finish().unwrap();
    let sheet = dir.path().join("sheet.csv");
    std::fs::write(&sheet, "sample,drug\ns0,A\ns1,A\ns2,A\ns3,B\ns4,B\ns5,B\n").unwrap();
    let out = dir.path().join("run");
    ok(&riffle(&[
        "scan",
        "--matrix",
        matrix.to_str().unwrap(),
        "--samples",
        sheet.to_str().unwrap(),
        "--group",
        "drug",
        "--test",
        "mean-diff",
        "--quiet",
        "--out",
        out.to_str().unwrap(),
    ]));
    let null = parse(&out.join("report/null_1.svg"));
    assert!(null.contains("the difference in means on the t scale"));
    assert!(null.contains("19 relabelings (all of them)"));
    // Pooled-variance t of B minus A for these six values:
    // scipy.stats.ttest_ind([1.9, 0.8, 1.1], [0.7, -1.6, -0.2]) gives
    // t = 2.1913466 (df 4); by hand, 1.63333 / sqrt(3.33333 / 4 * 2 / 3).
    assert!(null.contains("observed 2.1913"), "{null}");
}

/// k groups: the null of the one-way F is drawn against the F(k-1, n-k)
/// density (the reference of scipy.stats.f_oneway), with every relabelling.
#[test]
fn k_group_nulls_are_drawn_against_the_f_density() {
    let dir = tempfile::tempdir().unwrap();
    let (matrix, samples) = shifted_matrix(dir.path(), "k.arrow", 9, 20, 3.0, 9);
    let sheet = dir.path().join("k.tsv");
    let mut text = String::from("sample\tdose\n");
    for (i, s) in samples.iter().enumerate() {
        text.push_str(&format!("{s}\td{}\n", i / 3));
    }
    std::fs::write(&sheet, text).unwrap();
    let out = dir.path().join("run");
    ok(&riffle(&[
        "scan",
        "--matrix",
        matrix.to_str().unwrap(),
        "--samples",
        sheet.to_str().unwrap(),
        "--group",
        "dose",
        "--test",
        "anova",
        "--perms",
        "300",
        "--out",
        out.to_str().unwrap(),
        "--format",
        "tsv",
        "--quiet",
    ]));
    let null = std::fs::read_to_string(out.join("report/null_1.svg")).unwrap();
    assert!(null.contains("model: F(2, 6)"), "{null}");
    let bars = count(
        &parse(&out.join("report/null_1.svg")),
        "bar",
        Some("null-bars"),
    );
    assert_eq!(data_count_sum(&bars), 300);
}

/// Pairs, a trait, strata and covariates: every design gets its null plot
/// (paired t against t(pairs - 1), r against its normal-theory null density,
/// the covariate model's t against t(residual df)), one bar per relabelling.
#[test]
fn every_design_gets_its_null_plot() {
    let dir = tempfile::tempdir().unwrap();
    let (matrix, samples) = shifted_matrix(dir.path(), "d.arrow", 12, 15, 2.5, 19);
    let sheet = dir.path().join("d.tsv");
    let mut text = String::from("sample\ttime\tsubject\tage\tsite\n");
    for (i, s) in samples.iter().enumerate() {
        let time = if i < 6 { "pre" } else { "post" };
        let site = if i % 3 == 0 { "x" } else { "y" };
        text.push_str(&format!(
            "{s}\t{time}\tp{}\t{}\t{site}\n",
            i % 6,
            30 + (i * 7) % 23
        ));
    }
    std::fs::write(&sheet, text).unwrap();
    let cases: [(&str, &[&str], &str); 4] = [
        (
            "paired",
            &[
                "--test", "paired-t", "--group", "time", "--levels", "pre,post", "--pair",
                "subject",
            ],
            "model: Student t, df 5.00",
        ),
        (
            "trait",
            &["--test", "pearson", "--trait", "age"],
            "model: null density of r, n = 12",
        ),
        (
            "strata",
            &[
                "--test", "welch", "--group", "time", "--levels", "pre,post", "--strata", "site",
            ],
            "model: Student t",
        ),
        (
            "covariates",
            &[
                "--test",
                "student",
                "--group",
                "time",
                "--levels",
                "pre,post",
                "--covariates",
                "age,site",
            ],
            "model: Student t, df 8.00",
        ),
    ];
    for (name, args, label) in cases {
        let out = dir.path().join(name);
        let mut full = vec![
            "scan",
            "--matrix",
            matrix.to_str().unwrap(),
            "--samples",
            sheet.to_str().unwrap(),
            "--perms",
            "200",
            "--out",
            out.to_str().unwrap(),
            "--format",
            "tsv",
            "--quiet",
        ];
        full.extend_from_slice(args);
        ok(&riffle(&full));
        let path = out.join("report/null_1.svg");
        let null = std::fs::read_to_string(&path).unwrap_or_else(|e| {
            panic!(
                "{name}: {e}: {}",
                std::fs::read_to_string(out.join("report/report.html")).unwrap_or_default()
            )
        });
        assert!(
            null.contains(label),
            "{name}: no '{label}' in the null plot"
        );
        let bars = count(&parse(&path), "bar", Some("null-bars"));
        let drawn = data_count_sum(&bars);
        // Paired: 2^6 = 64 sign flips, all listed (63 besides the observed).
        let expected = if name == "paired" { 63 } else { 200 };
        assert_eq!(drawn, expected, "{name}");
    }
}

/// Normal values, `features` x `n_samples`; the first 3 features shifted by
/// `shift` in the second half of the samples (the last third for 9).
fn shifted_matrix(
    dir: &Path,
    name: &str,
    n_samples: usize,
    features: usize,
    shift: f64,
    seed: u64,
) -> (PathBuf, Vec<String>) {
    let samples: Vec<String> = (0..n_samples).map(|i| format!("s{i}")).collect();
    let matrix = dir.join(name);
    let mut w = create_matrix_writer(
        &matrix,
        MatrixFormat::ArrowIpc,
        "feature",
        &samples,
        ValueType::F64,
        64,
    )
    .unwrap();
    let mut rng = TestRng::new(seed);
    let ids: Vec<String> = (0..features).map(|i| format!("g{i}")).collect();
    let values: Vec<f64> = (0..features * n_samples)
        .map(|k| {
            rng.normal()
                + if k % n_samples >= 6 && k / n_samples < 3 {
                    shift
                } else {
                    0.0
                }
        })
        .collect();
    w.write_block(&ids, &values).unwrap();
    w.finish().unwrap();
    (matrix, samples)
}
