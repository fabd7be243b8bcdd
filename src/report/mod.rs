//! The run report: SVG plots and one self-contained HTML page built from a
//! finished run folder (`run.json` and the results table), out of core.
//!
//! The results table is streamed once into bounded summaries (see
//! `collect`); the null plots re-read only the shown features' rows of the
//! input matrix and redraw the relabelings from the recorded seed.

pub mod collect;
pub mod plots;
pub mod svg;

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use serde_json::Value;

use crate::design::{Relabelings, SampleSheet};
use crate::error::{IoContext, Result, RiffleError};
use crate::input::{self, FeatureBlock};
use crate::output::TableFormat;
use crate::stats::prepare::{PrepScratch, Status, TestSpec};
use crate::stats::relabelled::{model_reference, relabelled_statistics};
use crate::stats::{Side, TestKind};
use collect::{Collected, ResultRow};
use svg::{escape, Svg};

/// Report folder inside a run folder, by default.
pub const REPORT_DIR: &str = "report";
pub const REPORT_HTML: &str = "report.html";

#[derive(Debug, Clone)]
pub struct ReportOptions {
    pub run_dir: PathBuf,
    /// Features whose permutation null is drawn; empty: the few with the
    /// smallest p_perm.
    pub show_features: Vec<String>,
    /// FDR level marking features on the volcano plot (q_bh <= fdr).
    pub fdr: f64,
    /// Output folder; `<run_dir>/report` when absent.
    pub out: Option<PathBuf>,
}

impl ReportOptions {
    pub fn for_run(run_dir: &Path) -> Self {
        ReportOptions {
            run_dir: run_dir.to_path_buf(),
            show_features: Vec::new(),
            fdr: 0.05,
            out: None,
        }
    }
}

/// What was written.
#[derive(Debug, Clone)]
pub struct ReportOutput {
    pub dir: PathBuf,
    pub html: PathBuf,
    pub svgs: Vec<PathBuf>,
    pub html_bytes: u64,
}

/// The parts of `run.json` the report needs.
struct RunRecord {
    path: PathBuf,
    json: Value,
    matrix: PathBuf,
    samples: PathBuf,
    sample_column: String,
    id_column: String,
    group: String,
    test: TestKind,
    side: Side,
    perms: usize,
    seed: u64,
    format: TableFormat,
    relabelings: usize,
    exact: bool,
    pi0: f64,
    pi0_param: Option<f64>,
}

impl RunRecord {
    fn read(run_dir: &Path) -> Result<Self> {
        let path = run_dir.join(crate::scan::RUN_RECORD);
        let text = std::fs::read_to_string(&path).at(&path)?;
        let json: Value = serde_json::from_str(&text).map_err(|e| {
            RiffleError::bad_input(
                &path,
                format!("line {}, column {}", e.line(), e.column()),
                format!("not valid JSON: {e}"),
            )
        })?;
        let field = |pointer: &str| -> Result<&Value> {
            json.pointer(pointer)
                .filter(|v| !v.is_null())
                .ok_or_else(|| {
                    RiffleError::bad_input(
                        &path,
                        format!("field '{pointer}'"),
                        "missing; is this the run.json of a riffle scan?",
                    )
                })
        };
        let typed = |pointer: &str, expected: &str| -> Result<Value> {
            let v = field(pointer)?;
            if v.is_null() {
                return Err(RiffleError::bad_input(
                    &path,
                    format!("field '{pointer}'"),
                    format!("expected {expected}"),
                ));
            }
            Ok(v.clone())
        };
        let text_of = |pointer: &str| -> Result<String> {
            typed(pointer, "a string")?
                .as_str()
                .map(String::from)
                .ok_or_else(|| {
                    RiffleError::bad_input(&path, format!("field '{pointer}'"), "expected a string")
                })
        };
        let number_of = |pointer: &str| -> Result<f64> {
            typed(pointer, "a number")?.as_f64().ok_or_else(|| {
                RiffleError::bad_input(&path, format!("field '{pointer}'"), "expected a number")
            })
        };
        let integer_of = |pointer: &str| -> Result<u64> {
            typed(pointer, "a whole number")?.as_u64().ok_or_else(|| {
                RiffleError::bad_input(
                    &path,
                    format!("field '{pointer}'"),
                    "expected a whole number",
                )
            })
        };
        fn parse<T: serde::de::DeserializeOwned>(
            path: &Path,
            pointer: &str,
            v: Value,
        ) -> Result<T> {
            serde_json::from_value(v.clone()).map_err(|_| {
                RiffleError::bad_input(
                    path,
                    format!("field '{pointer}'"),
                    format!("unexpected value {v}"),
                )
            })
        }
        Ok(RunRecord {
            matrix: PathBuf::from(text_of("/options/matrix")?),
            samples: PathBuf::from(text_of("/options/samples")?),
            sample_column: text_of("/options/sample_column")?,
            id_column: text_of("/options/id_column")?,
            group: text_of("/options/group")?,
            test: parse(&path, "/options/test", typed("/options/test", "a test")?)?,
            side: parse(&path, "/options/side", typed("/options/side", "a side")?)?,
            perms: integer_of("/options/perms")? as usize,
            seed: integer_of("/options/seed")?,
            format: parse(
                &path,
                "/options/format",
                typed("/options/format", "a format")?,
            )?,
            relabelings: integer_of("/relabelings/count")? as usize,
            exact: typed("/relabelings/exact", "true or false")?
                .as_bool()
                .unwrap_or(false),
            pi0: number_of("/multiple_testing/p_perm/pi0")?,
            pi0_param: json
                .pointer("/multiple_testing/p_param/pi0")
                .and_then(Value::as_f64),
            path,
            json,
        })
    }
}

/// Writes the report of the run in `options.run_dir`.
pub fn write_report(options: &ReportOptions) -> Result<ReportOutput> {
    if !(options.fdr > 0.0 && options.fdr <= 1.0) {
        return Err(RiffleError::options(format!(
            "--fdr {}: give a level in (0, 1], such as 0.05",
            options.fdr
        )));
    }
    let run = RunRecord::read(&options.run_dir)?;
    let results = options
        .run_dir
        .join(run.format.file_name(crate::scan::RESULTS_STEM));
    let collected = collect::collect(&results, run.format, options.fdr, &options.show_features)?;

    let explicit = !options.show_features.is_empty();
    let nulls = match null_panels(&run, &collected.shown) {
        Ok(panels) => panels,
        Err(e) if !explicit => vec![Err(format!("null distributions not drawn: {e}"))],
        Err(e) => return Err(e),
    };

    let mut plots: Vec<(String, String, Svg)> = vec![
        (
            "p_values.svg".into(),
            "Histograms of p_perm and p_param".into(),
            plots::p_histograms(&collected, run.pi0, run.pi0_param),
        ),
        (
            "qq.svg".into(),
            "QQ plot of -log10 p".into(),
            plots::qq(&collected, run.relabelings),
        ),
        (
            "volcano.svg".into(),
            "Effect against -log10 p_perm".into(),
            plots::volcano(&collected, options.fdr),
        ),
    ];
    let mut null_notes = Vec::new();
    for (k, outcome) in nulls.into_iter().enumerate() {
        match outcome {
            Ok((feature, svg)) => plots.push((
                format!("null_{}.svg", k + 1),
                format!("Permutation null of {feature}"),
                svg,
            )),
            Err(note) => null_notes.push(note),
        }
    }

    let out_dir = options
        .out
        .clone()
        .unwrap_or_else(|| options.run_dir.join(REPORT_DIR));
    std::fs::create_dir_all(&out_dir).at(&out_dir)?;
    let mut svgs = Vec::new();
    for (name, label, svg) in &plots {
        let path = out_dir.join(name);
        write_atomically(&path, svg.to_file(label).as_bytes())?;
        svgs.push(path);
    }
    let html = html_page(options, &run, &collected, &plots, &null_notes);
    let html_path = out_dir.join(REPORT_HTML);
    write_atomically(&html_path, html.as_bytes())?;
    Ok(ReportOutput {
        dir: out_dir,
        html: html_path,
        svgs,
        html_bytes: html.len() as u64,
    })
}

fn write_atomically(path: &Path, bytes: &[u8]) -> Result<()> {
    let temp = crate::spill::temp_name(path);
    std::fs::write(&temp, bytes).at(&temp)?;
    std::fs::rename(&temp, path).at(path)
}

type NullOutcome = std::result::Result<(String, Svg), String>;

/// One null plot per shown feature (or the reason it cannot be drawn).
fn null_panels(run: &RunRecord, shown: &[ResultRow]) -> Result<Vec<NullOutcome>> {
    if shown.is_empty() {
        return Ok(Vec::new());
    }
    let options: crate::scan::ScanOptions =
        serde_json::from_value(run.json.pointer("/options").cloned().unwrap_or_default()).map_err(
            |e| RiffleError::bad_input(&run.path, "field '/options'", format!("unreadable: {e}")),
        )?;
    let sheet = SampleSheet::read(&run.samples, &run.sample_column)?;
    let design = options.study_design(&sheet)?;
    let recorded_samples = run.json.pointer("/design/samples").cloned();
    let recorded_classes = run.json.pointer("/design/classes").cloned();
    if recorded_samples != Some(serde_json::json!(design.samples))
        || recorded_classes != Some(serde_json::json!(design.classes))
    {
        return Err(RiffleError::bad_input(
            &run.samples,
            format!("column '{}'", run.group),
            format!(
                "the samples or their groups differ from those recorded in {}; \
                 the sheet changed after the run",
                run.path.display()
            ),
        ));
    }
    let mut source = input::open_matrix(&run.matrix, &run.id_column, &design.samples)?;
    let trait_classes = design.trait_classes();
    let relabelings = Relabelings::generate(&design.scheme(&trait_classes), run.perms, run.seed);
    if relabelings.count != run.relabelings {
        return Err(RiffleError::bad_input(
            &run.path,
            "field '/relabelings/count'",
            format!(
                "records {} relabelings but {} are drawn from the recorded options",
                run.relabelings, relabelings.count
            ),
        ));
    }
    let spec = crate::scan::test_spec(&options, &design)?;
    // The difference in means is drawn on the t scale, where the model
    // reference lives; for one feature the two are monotone in each other.
    let plot_spec = TestSpec {
        test: if run.test == TestKind::MeanDiff {
            TestKind::Student
        } else {
            run.test
        },
        ..spec.clone()
    };
    let mut block = FeatureBlock::default();
    let mut z = vec![0.0; design.units()];
    let mut scratch = PrepScratch::default();
    let mut outcomes = Vec::with_capacity(shown.len());
    for row in shown {
        if row.p_perm.is_nan() {
            outcomes.push(Err(format!(
                "{}: not tested ({}), so it has no permutation null",
                row.feature, row.note
            )));
            continue;
        }
        source.seek(row.index)?;
        if source.next_block(1, &mut block)? != 1 || block.ids[0] != row.feature {
            return Err(RiffleError::bad_input(
                &run.matrix,
                format!("feature row {}", row.index + 1),
                format!(
                    "expected feature '{}' as in the results table; the matrix changed after the run",
                    row.feature
                ),
            ));
        }
        let raw = block.row(0).to_vec();
        let observed = spec.prepare(&raw, &design.classes, &mut z, &mut scratch);
        let same = observed.status == Status::Tested
            && (observed.statistic - row.statistic).abs() <= 1e-9 * row.statistic.abs().max(1.0);
        if !same {
            return Err(RiffleError::bad_input(
                &run.matrix,
                format!("feature '{}'", row.feature),
                format!(
                    "its statistic is now {} but {} in the results table; the matrix changed after the run",
                    observed.statistic, row.statistic
                ),
            ));
        }
        let plotted = plot_spec.prepare(&raw, &design.classes, &mut z, &mut scratch);
        let statistics = relabelled_statistics(&plot_spec, &raw, &relabelings);
        let panel = plots::NullPanel {
            feature: &row.feature,
            test: run.test,
            statistics: &statistics,
            observed: plotted.statistic,
            reference: model_reference(&spec, &raw, &design.classes),
            mirror: run.side == Side::Both && !run.test.is_k_group(),
            exact: relabelings.exact,
            p_perm: row.p_perm,
            p_param: row.p_param,
            q_bh: row.q_bh,
        };
        outcomes.push(Ok((row.feature.clone(), plots::null_plot(&panel))));
    }
    Ok(outcomes)
}

const PAGE_STYLE: &str = "\
body{font-family:sans-serif;max-width:1000px;margin:24px auto;padding:0 16px;color:#222;background:#fff}\
h1{font-size:24px;margin-bottom:4px}h2{font-size:18px;margin-top:32px;border-bottom:2px solid #2e4a3f}\
.caution{border:3px solid #8c1c13;background:#fbeeee;padding:12px 16px;font-size:15px;margin:16px 0}\
table.summary{border-collapse:collapse;width:100%}\
table.summary th{text-align:left;vertical-align:top;width:30%;padding:4px 8px;background:#eef3f0}\
table.summary td{padding:4px 8px;border-bottom:1px solid #ddd}\
figure{margin:16px 0}figcaption{font-size:13px;color:#444}\
.notes li{color:#6a3b00}svg{max-width:100%;height:auto}";

fn show(v: Option<&Value>) -> String {
    match v {
        None | Some(Value::Null) => "—".into(),
        Some(Value::String(s)) => s.clone(),
        Some(Value::Number(n)) => match (n.as_u64(), n.as_f64()) {
            (Some(u), _) => plots::thousands(u),
            (None, Some(f)) => format!("{f:.4}"),
            _ => n.to_string(),
        },
        Some(other) => other.to_string(),
    }
}

fn bytes_text(v: Option<&Value>) -> String {
    match v.and_then(Value::as_u64) {
        Some(b) if b >= 1 << 30 => format!("{:.2} GiB", b as f64 / (1u64 << 30) as f64),
        Some(b) if b >= 1 << 20 => format!("{:.2} MiB", b as f64 / (1u64 << 20) as f64),
        Some(b) if b >= 1 << 10 => format!("{:.1} KiB", b as f64 / 1024.0),
        Some(b) => format!("{b} bytes"),
        None => "—".into(),
    }
}

fn summary_rows(run: &RunRecord) -> Vec<(&'static str, String)> {
    let j = |p: &str| run.json.pointer(p);
    let hits = |p: &str| -> String {
        match j(p).and_then(Value::as_array) {
            Some(a) if a.len() == 3 => format!(
                "{} / {} / {}",
                show(a.first()),
                show(a.get(1)),
                show(a.get(2))
            ),
            _ => "—".into(),
        }
    };
    let untested = match j("/features/untested").and_then(Value::as_object) {
        Some(map) if !map.is_empty() => map
            .iter()
            .map(|(k, v)| format!("{} ({k})", show(Some(v))))
            .collect::<Vec<_>>()
            .join(", "),
        _ => "none".into(),
    };
    let step_down = j("/options/maxt").and_then(Value::as_str) != Some("single");
    vec![
        (
            "Matrix",
            format!(
                "{} ({}, {}): {} features, {} sample columns",
                show(j("/inputs/matrix/path")),
                show(j("/inputs/matrix/format")),
                bytes_text(j("/inputs/matrix/bytes")),
                show(j("/inputs/matrix/features")),
                show(j("/inputs/matrix/sample_columns"))
            ),
        ),
        (
            "Sample sheet",
            format!(
                "{} ({})",
                show(j("/inputs/samples/path")),
                bytes_text(j("/inputs/samples/bytes"))
            ),
        ),
        (
            "Design",
            format!(
                "column '{}': A = '{}' ({} samples), B = '{}' ({} samples); effects are B minus A",
                show(j("/design/group_column")),
                show(j("/design/level_a")),
                show(j("/design/n_a")),
                show(j("/design/level_b")),
                show(j("/design/n_b"))
            ),
        ),
        (
            "Test",
            format!("{}, side {}", run.test.name(), run.side.name()),
        ),
        (
            "Relabelings",
            format!(
                "{} ({}), seed {}, generator {}",
                plots::thousands(run.relabelings as u64),
                if run.exact {
                    "all distinct relabelings: exact p-values"
                } else {
                    "sampled"
                },
                run.seed,
                show(j("/relabelings/generator"))
            ),
        ),
        (
            "Features",
            format!(
                "{} in total, {} tested; untested: {untested}",
                show(j("/features/total")),
                show(j("/features/tested"))
            ),
        ),
        (
            "q_bh ≤ 0.01 / 0.05 / 0.1",
            hits("/multiple_testing/p_perm/hits_at_0.01_0.05_0.1/q_bh"),
        ),
        (
            if step_down {
                "FWER: p_maxt (step-down) ≤ 0.05"
            } else {
                "FWER: p_maxt_single ≤ 0.05"
            },
            show(j("/multiple_testing/fwer_p_maxt_single_at_0.05")),
        ),
        (
            "π0 (Storey, from p_perm)",
            format!(
                "{:.4} (λ = {})",
                run.pi0,
                show(j("/multiple_testing/p_perm/lambda"))
            ),
        ),
        (
            "Runtime",
            format!(
                "{:.1} s on {} threads; {} feature-relabelings per second",
                j("/timing/seconds")
                    .and_then(Value::as_f64)
                    .unwrap_or(f64::NAN),
                show(j("/timing/threads")),
                j("/timing/feature_relabelings_per_second")
                    .and_then(Value::as_f64)
                    .map_or("—".into(), |v| format!("{v:.3e}"))
            ),
        ),
        (
            "riffle",
            format!(
                "version {}; command: {}",
                show(j("/riffle_version")),
                j("/command")
                    .and_then(Value::as_array)
                    .map(|a| a
                        .iter()
                        .map(|v| show(Some(v)))
                        .collect::<Vec<_>>()
                        .join(" "))
                    .unwrap_or_else(|| "—".into())
            ),
        ),
    ]
}

fn html_page(
    options: &ReportOptions,
    run: &RunRecord,
    collected: &Collected,
    plots: &[(String, String, Svg)],
    null_notes: &[String],
) -> String {
    let mut h = String::with_capacity(1 << 20);
    let _ = write!(
        h,
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n\
         <meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n\
         <title>riffle report: {}</title>\n<style>{PAGE_STYLE}</style>\n</head>\n<body>\n\
         <h1>riffle run report</h1>\n<p>Run folder: {}</p>\n",
        escape(&options.run_dir.display().to_string()),
        escape(&options.run_dir.display().to_string()),
    );
    let _ = writeln!(
        h,
        "<div class=\"caution\" id=\"caution\" role=\"note\"><strong>Caution.</strong> {}</div>",
        escape(crate::CAUTION)
    );
    h.push_str("<section id=\"summary\">\n<h2>Summary</h2>\n<table class=\"summary\">\n");
    for (label, value) in summary_rows(run) {
        let _ = writeln!(
            h,
            "<tr><th>{}</th><td>{}</td></tr>",
            escape(label),
            escape(&value)
        );
    }
    let _ = writeln!(
        h,
        "<tr><th>Results table</th><td>{} rows read for this report</td></tr>",
        plots::thousands(collected.rows)
    );
    h.push_str("</table>\n</section>\n");
    let section = |h: &mut String, id: &str, title: &str, text: &str, names: &[&str]| {
        let _ = write!(
            h,
            "<section id=\"{id}\">\n<h2>{}</h2>\n<p>{}</p>\n",
            escape(title),
            escape(text)
        );
        for (name, label, svg) in plots.iter().filter(|p| names.contains(&p.0.as_str())) {
            let _ = write!(
                h,
                "<figure id=\"fig-{}\">\n{}<figcaption>{} ({})</figcaption>\n</figure>\n",
                escape(name.trim_end_matches(".svg")),
                svg.to_inline(label),
                escape(label),
                escape(name)
            );
        }
        h.push_str("</section>\n");
    };
    section(
        &mut h,
        "p-values",
        "Distribution of p-values",
        "A flat histogram at height π0 with a peak near zero is what a mixture of null and \
         affected features gives. A dip near zero or a hump elsewhere points at a problem \
         with the design or the data (for example dependent samples or batch effects).",
        &["p_values.svg"],
    );
    section(
        &mut h,
        "qq",
        "QQ plot",
        "Points inside the grey band agree with uniform p-values; the band is pointwise: the \
         i-th smallest of m uniform p-values follows Beta(i, m - i + 1), and the band joins its \
         2.5% and 97.5% quantiles. A lift over the whole range, not just at the top, suggests \
         inflation rather than signal.",
        &["qq.svg"],
    );
    section(
        &mut h,
        "volcano",
        "Effect and significance",
        &format!(
            "Features with q_bh ≤ {} are drawn as triangles (hover for their ids).",
            options.fdr
        ),
        &["volcano.svg"],
    );
    let null_names: Vec<&str> = plots
        .iter()
        .map(|p| p.0.as_str())
        .filter(|n| n.starts_with("null_"))
        .collect();
    section(
        &mut h,
        "nulls",
        "Permutation null of chosen features",
        &format!(
            "{} The relabelled statistics are recomputed deterministically from the inputs \
             recorded in run.json: the same relabelings are drawn again from seed {} ({} \
             relabelings), so they are the ones the scan used. The dashed curve is the model \
             reference the p_param column uses{}.",
            if options.show_features.is_empty() {
                "Shown: the features with the smallest p_perm (ties by p_param)."
            } else {
                "Shown: the features named with --show-feature."
            },
            run.seed,
            plots::thousands(run.relabelings as u64),
            if run.test == TestKind::MeanDiff {
                "; for the difference in means the statistics are drawn on the pooled-variance t \
                 scale, which orders relabelings the same way for a given feature"
            } else {
                ""
            }
        ),
        &null_names,
    );
    if !null_notes.is_empty() {
        h.push_str("<ul class=\"notes\">\n");
        for note in null_notes {
            let _ = writeln!(h, "<li>{}</li>", escape(note));
        }
        h.push_str("</ul>\n");
    }
    let _ = write!(
        h,
        "<footer><p class=\"caution\">{}</p></footer>\n</body>\n</html>\n",
        escape(crate::CAUTION)
    );
    h
}
