//! The `scan` job: sample sheet + matrix -> relabelings -> pipeline ->
//! spill -> multiple testing -> results table and run record. The CLI,
//! the demo and the tests all drive this one function.

use std::path::{Path, PathBuf};
use std::sync::atomic::AtomicBool;
use std::sync::Arc;
use std::time::Instant;

use crate::design::{DesignColumns, Relabelings, SampleSheet, StudyDesign};
use crate::error::{IoContext, Result, RiffleError};
use crate::input::{self, MatrixInfo};
use crate::kernel::{Kernel, NullHistogram, UpperTail};
use crate::multitest::{self, AdjustOptions, AdjustSummary, LambdaChoice, Method, PValueSource};
use crate::output::{create_table, Cell, ColumnKind, TableFormat};
use crate::pipeline::{self, ChunkSink, FinishedChunk, PipelineOptions, PipelineStats};
use crate::progress::ProgressReporter;
use crate::resume::{Checkpoint, Phase};
use crate::spill::{self, Record, SpillReader, SpillWriter};
use crate::stats::prepare::{Status, TestSpec};
use crate::stats::{DesignKind, Side, Sizes, TestKind};
use crate::stepdown::{rank_pass, reverse_and_scatter, RowSorter};

/// Everything that defines a scan. Serialized into `run.json`.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct ScanOptions {
    pub matrix: PathBuf,
    pub samples: PathBuf,
    pub sample_column: String,
    pub id_column: String,
    pub group: String,
    /// Levels of the group column to compare (two-group tests: A,B with
    /// effects B minus A; k-group tests: any number, default all).
    pub levels: Option<Vec<String>>,
    /// Numeric sample-sheet column for correlation tests.
    #[serde(default)]
    pub trait_column: Option<String>,
    /// Pair id column for paired tests.
    #[serde(default)]
    pub pair: Option<String>,
    /// Strata column: relabelings stay within strata.
    #[serde(default)]
    pub strata: Option<String>,
    /// Covariate columns: a linear model per feature, Freedman–Lane.
    #[serde(default)]
    pub covariates: Vec<String>,
    pub test: TestKind,
    pub side: Side,
    pub perms: usize,
    pub seed: u64,
    pub out: PathBuf,
    pub threads: usize,
    pub memory_bytes: u64,
    /// Features per chunk; derived from `memory_bytes` when absent.
    pub chunk_rows: Option<usize>,
    pub format: TableFormat,
    /// Also adjust the model-based p-values.
    pub also_param: bool,
    pub storey_lambda: LambdaChoice,
    /// Family-wise error: step-down maxT (adds a rank-order pass) or only
    /// single-step.
    pub maxt: MaxtMode,
    /// Pooled-null FDR (q_pooled): histogram of every relabelled statistic.
    pub pooled_null: bool,
    /// Fewest observed values per group for a feature with missing values
    /// to be tested (see `stats::masked`).
    #[serde(default = "default_min_observed")]
    pub min_observed: usize,
    pub quiet: bool,
    /// Write the run report (`<out>/report/`) after the results.
    #[serde(default)]
    pub report: bool,
    /// Only the K-th of N contiguous feature ranges, written as a shard
    /// folder for `merge` (no results table).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub shard: Option<crate::shard::ShardSpec>,
    /// Do nothing when `out` holds a finished run of the same inputs and
    /// result-defining options.
    #[serde(default)]
    pub skip_if_unchanged: bool,
    /// Seconds between checkpoints of the first pass (see `crate::resume`).
    #[serde(default = "default_checkpoint_seconds")]
    pub checkpoint_seconds: f64,
    /// Tail approximation: features reached by fewer than this many of
    /// the B sampled relabelings get a generalized Pareto p-value
    /// (`crate::tail`); off when absent.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub tail_fit: Option<u64>,
    /// Sequential stopping (Besag & Clifford 1991): a feature stops at this
    /// many exceedances with p = h / L. Leaves maxT out (it needs every
    /// relabelling of every feature).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub stop_after: Option<u64>,
    /// Phipson & Smyth (2010) exact p for relabelings drawn with
    /// replacement, instead of (b + 1) / (B + 1).
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub phipson_smyth: bool,
}

fn default_checkpoint_seconds() -> f64 {
    60.0
}

fn default_min_observed() -> usize {
    crate::stats::prepare::DEFAULT_MIN_OBSERVED
}

#[derive(
    Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize, clap::ValueEnum,
)]
#[serde(rename_all = "kebab-case")]
pub enum MaxtMode {
    StepDown,
    Single,
}

impl ScanOptions {
    /// The study design these options name, read from `sheet`.
    pub fn study_design(&self, sheet: &SampleSheet) -> Result<StudyDesign> {
        let columns = DesignColumns {
            group: (!self.group.is_empty()).then(|| self.group.clone()),
            levels: self.levels.clone(),
            trait_column: self.trait_column.clone(),
            pair: self.pair.clone(),
            strata: self.strata.clone(),
            covariates: self.covariates.clone(),
        };
        StudyDesign::from_sheet(sheet, self.test.design(), &columns)
    }

    /// Defaults for everything but the inputs, design and output.
    pub fn new(matrix: &Path, samples: &Path, group: &str, out: &Path) -> Self {
        ScanOptions {
            matrix: matrix.to_path_buf(),
            samples: samples.to_path_buf(),
            sample_column: "sample".into(),
            id_column: "feature".into(),
            group: group.into(),
            levels: None,
            trait_column: None,
            pair: None,
            strata: None,
            covariates: Vec::new(),
            test: TestKind::Welch,
            side: Side::Both,
            perms: 10_000,
            seed: 1,
            out: out.to_path_buf(),
            threads: default_threads(),
            memory_bytes: 1 << 30,
            chunk_rows: None,
            format: TableFormat::Parquet,
            also_param: false,
            storey_lambda: LambdaChoice::Fixed(0.5),
            maxt: MaxtMode::StepDown,
            pooled_null: false,
            min_observed: default_min_observed(),
            quiet: true,
            report: false,
            shard: None,
            skip_if_unchanged: false,
            checkpoint_seconds: default_checkpoint_seconds(),
            tail_fit: None,
            stop_after: None,
            phipson_smyth: false,
        }
    }

    /// The maxT mode actually run: none with sequential stopping, whose
    /// stopped features leave the per-relabelling maxima incomplete.
    pub fn maxt_computed(&self) -> Option<MaxtMode> {
        self.stop_after.is_none().then_some(self.maxt)
    }
}

pub fn default_threads() -> usize {
    std::thread::available_parallelism()
        .map(|n| n.get())
        .unwrap_or(1)
}

/// What a finished scan reports back (also written to `run.json`).
#[derive(Debug, Clone, serde::Serialize)]
pub struct ScanSummary {
    pub features: u64,
    pub tested: u64,
    pub untested: Vec<(String, u64)>,
    pub relabelings: usize,
    pub exact: bool,
    pub n_a: usize,
    pub n_b: usize,
    pub level_a: String,
    pub level_b: String,
    pub pi0: f64,
    /// Features at q_bh <= 0.01, 0.05, 0.1.
    pub bh_hits: [u64; 3],
    pub fwer_hits_05: u64,
    pub results_path: PathBuf,
    pub seconds: f64,
    pub feature_relabelings_per_second: f64,
    /// Relabelings summed over tested features: tested x B, or fewer with
    /// sequential stopping.
    pub relabelings_used: u64,
    /// Whether maxT (p_maxt_single, FWER hits) was computed.
    pub maxt_computed: bool,
}

/// Spill folder inside an output folder.
pub const SPILL_DIR: &str = "spill";
pub const RESULTS_STEM: &str = "results";
pub const RUN_RECORD: &str = "run.json";

/// How a scan ended.
#[derive(Debug)]
pub enum ScanOutcome {
    Finished(ScanSummary),
    /// A shard folder was written (see `crate::shard`).
    Shard(Box<crate::shard::ShardRecord>),
    /// `skip_if_unchanged` and a finished run of the same inputs and
    /// options is in `out`: nothing was done.
    Unchanged {
        fingerprint: String,
    },
}

/// The whole scan; a shard run must use [`run`] instead.
pub fn run_scan(options: &ScanOptions, stop: &AtomicBool) -> Result<ScanSummary> {
    match run(options, stop)? {
        ScanOutcome::Finished(summary) => Ok(summary),
        _ => Err(RiffleError::options(
            "this scan wrote a shard or was skipped; call scan::run to see which",
        )),
    }
}

/// A scan, a shard of one, or nothing when `skip_if_unchanged` finds the
/// same finished run in `out`.
pub fn run(options: &ScanOptions, stop: &AtomicBool) -> Result<ScanOutcome> {
    validate(options)?;
    let sheet = SampleSheet::read(&options.samples, &options.sample_column)?;
    check_design_options(options)?;
    let design = options.study_design(&sheet)?;
    let matrix = import_if_text(options, stop)?;
    let source = input::open_matrix(&matrix, &options.id_column, &design.samples).map_err(|e| {
        // Name the user's file, not the scratch copy imported from it.
        match e {
            RiffleError::BadInput {
                path,
                place,
                message,
            } if path != options.matrix => RiffleError::BadInput {
                path: options.matrix.clone(),
                place: format!("{place} (imported)"),
                message,
            },
            other => other,
        }
    })?;
    run_on(source, &design, options, stop)
}

/// Text matrices (TSV/CSV, gzipped or not, one row per feature) are
/// imported to an Arrow file in the output folder first.
fn import_if_text(options: &ScanOptions, stop: &AtomicBool) -> Result<PathBuf> {
    let path = &options.matrix;
    let mut head = [0u8; 512];
    let read = {
        let mut file = std::fs::File::open(path).at(path)?;
        input::read_up_to(&mut file, &mut head).at(path)?
    };
    let head = &head[..read];
    let gzip = head.starts_with(&[0x1f, 0x8b]);
    let text = !head.is_empty()
        && !head.starts_with(b"ARROW1")
        && !head.starts_with(b"PAR1")
        && std::str::from_utf8(head).is_ok_and(|t| {
            let first = t.lines().next().unwrap_or("");
            first.contains('\t') || first.contains(',') || first.contains(';')
        });
    if !(gzip || text) {
        return Ok(path.clone());
    }
    prepare_out_dir(&options.out)?;
    let imported = options.out.join(SPILL_DIR).join("imported-matrix.arrow");
    std::fs::create_dir_all(options.out.join(SPILL_DIR)).at(&options.out)?;
    let mut import = input::text::ImportOptions::new(path, &imported);
    import.format = Some(input::MatrixFormat::ArrowIpc);
    import.id_column = options.id_column.clone();
    import.value_type = input::ValueType::F64;
    import.memory_bytes = options.memory_bytes / 2;
    if !options.quiet {
        eprintln!("importing text matrix {} first", path.display());
    }
    input::text::import_text_until(&import, stop)?;
    Ok(imported)
}

/// The scan of an already opened source whose columns follow
/// `design.samples`; `options.matrix` and `options.samples` are only recorded.
pub fn run_scan_on(
    source: Box<dyn input::FeatureSource>,
    design: &StudyDesign,
    options: &ScanOptions,
    stop: &AtomicBool,
) -> Result<ScanSummary> {
    match run_on(source, design, options, stop)? {
        ScanOutcome::Finished(summary) => Ok(summary),
        _ => Err(RiffleError::options(
            "this scan wrote a shard or was skipped; call scan::run_on to see which",
        )),
    }
}

/// [`run_scan_on`] for every kind of scan (whole, shard, skipped).
pub fn run_on(
    source: Box<dyn input::FeatureSource>,
    design: &StudyDesign,
    options: &ScanOptions,
    stop: &AtomicBool,
) -> Result<ScanOutcome> {
    let outcome = scan_into_out_dir(source, design, options, stop);
    if let Err(e) = &outcome {
        remove_partial_outputs(options, matches!(e, RiffleError::Interrupted));
    }
    outcome
}

/// After a failed or interrupted run no half-written table or run record
/// may remain. The spill goes too (incomplete, possibly large on a full
/// disk), except after an interrupt, when its checkpoint lets the same
/// command continue. Finished outputs of earlier runs are left alone.
fn remove_partial_outputs(options: &ScanOptions, interrupted: bool) {
    for format in [TableFormat::Parquet, TableFormat::Tsv] {
        let table = options.out.join(format.file_name(RESULTS_STEM));
        let _ = std::fs::remove_file(spill::temp_name(&table));
    }
    let _ = std::fs::remove_file(spill::temp_name(&options.out.join(RUN_RECORD)));
    if !interrupted {
        let _ = std::fs::remove_dir_all(options.out.join(SPILL_DIR));
        Checkpoint::remove(&options.out);
    }
}

fn scan_into_out_dir(
    source: Box<dyn input::FeatureSource>,
    design: &StudyDesign,
    options: &ScanOptions,
    stop: &AtomicBool,
) -> Result<ScanOutcome> {
    let started = Instant::now();
    validate(options)?;
    let provenance = crate::provenance::Provenance::of(options)?;
    if options.skip_if_unchanged && options.shard.is_none() {
        if let Some(previous) = crate::provenance::finished_run(&options.out) {
            if previous.differences(&provenance).is_empty() {
                return Ok(ScanOutcome::Unchanged {
                    fingerprint: provenance.fingerprint,
                });
            }
        }
    }
    let info = source.info().clone();
    let shard_range = options.shard.map(|s| s.range(info.n_features));
    let mut source: Box<dyn input::FeatureSource> = match shard_range {
        Some(range) => Box::new(crate::shard::RangeSource::new(source, range)?),
        None => source,
    };

    let spec = test_spec(options, design)?;
    let trait_classes = design.trait_classes();
    let relabel =
        Relabelings::generate(&design.scheme(&trait_classes), options.perms, options.seed);
    let b_total = relabel.count;
    let exact = relabel.exact;
    let p_rule = crate::perm_p::PermPRule::for_scan(options, design, b_total, exact);
    let kernel = Arc::new(
        Kernel::new(spec.clone(), design.classes.clone(), relabel)
            .with_pooled_null(options.pooled_null)
            .with_stop_after(p_rule.stop_after()),
    );

    prepare_out_dir(&options.out)?;
    // A stale shard record must not vouch for the spill this run rewrites.
    let _ = std::fs::remove_file(options.out.join(crate::shard::SHARD_RECORD));
    let spill_dir = options.out.join(SPILL_DIR);
    let runs_dir = spill_dir.join("rank-runs");
    // A sixteenth: small enough that even ~100,000 features fill the
    // sorter, so that peak memory is the same for any larger number of
    // features.
    let sorter_memory = options.memory_bytes / 16;
    let step_down = options.maxt_computed() == Some(MaxtMode::StepDown);
    let mut pipeline_options = pipeline_options(options, design.samples.len(), b_total);
    pipeline_options.prepare_only = step_down;
    if step_down {
        // The first pass only screens and standardizes, and its slow
        // consumer is the sorter: deeper queues would only hold more
        // chunks (in long runs they run full: ~10 MiB at 10,000,000
        // features, --memory 256M), not keep the workers busier.
        pipeline_options.queue_depth = 1;
    }

    let resumed = Checkpoint::load_matching(
        &options.out,
        &provenance.fingerprint,
        options.shard,
        options.quiet,
    );
    let mut checkpoint = resumed.clone().unwrap_or_else(|| Checkpoint {
        fingerprint: provenance.fingerprint.clone(),
        shard: options.shard,
        phase: Phase::Scanning,
        features_done: shard_range.map_or(0, |r| r.0),
        records_count: 0,
        records_len: 0,
        ids_len: 0,
        sorter_runs: 0,
        tested: 0,
        untested: Default::default(),
        null_max_bits: vec![f64::NEG_INFINITY.to_bits(); b_total],
        histogram: None,
    });
    let mut stats = PipelineStats::default();
    if checkpoint.phase == Phase::Scanning {
        let (writer, sorter) = if resumed.is_some() {
            source.seek(checkpoint.features_done)?;
            let writer = SpillWriter::resume(
                &spill_dir,
                checkpoint.records_len,
                checkpoint.ids_len,
                checkpoint.records_count,
            )?;
            let sorter = step_down
                .then(|| {
                    RowSorter::resume(
                        &runs_dir,
                        design.units(),
                        sorter_memory,
                        checkpoint.sorter_runs,
                    )
                })
                .transpose()?;
            (writer, sorter)
        } else {
            let writer = SpillWriter::create_resumable(&spill_dir)?;
            let sorter = step_down
                .then(|| RowSorter::new(&runs_dir, design.units(), sorter_memory))
                .transpose()?;
            (writer, sorter)
        };
        let null_hist = match checkpoint.null_histogram() {
            Some(h) => Some(h),
            None => options.pooled_null.then(NullHistogram::empty),
        };
        let mut sink = SpillSink {
            writer,
            null_max: checkpoint.null_max(),
            p_rule: p_rule.clone(),
            b_total,
            sizes: spec.sizes,
            tested: checkpoint.tested,
            untested: checkpoint.untested.clone(),
            sorter,
            n: design.units(),
            null_hist,
            checkpoint: checkpoint.clone(),
            schedule: crate::resume::Schedule::new(options.checkpoint_seconds),
            out: options.out.clone(),
        };
        let total = shard_range.map_or(info.n_features, |(a, b)| b - a);
        let done_before = checkpoint.records_count;
        let mut reporter = ProgressReporter::new(
            total,
            options.quiet,
            if step_down { "standardize" } else { "scan" },
        );
        stats = pipeline::run_with(
            &mut *source,
            kernel.clone(),
            &pipeline_options,
            stop,
            &mut sink,
            &mut |done| reporter.update(done_before + done),
        )?;
        reporter.finish();
        // Saved before the spill files are renamed into place, so that a
        // restart finds them under one name or the other.
        checkpoint = sink.commit(Phase::Sorted, shard_range.map_or(info.n_features, |r| r.1))?;
        checkpoint.save(&options.out)?;
        sink.writer.finish()?;
    }
    SpillWriter::finish_committed(
        &spill_dir,
        checkpoint.records_len,
        checkpoint.ids_len,
        checkpoint.records_count,
    )?;
    stats.features = checkpoint.records_count;
    let tested = checkpoint.tested;
    let untested: Vec<(String, u64)> = checkpoint
        .untested
        .iter()
        .map(|(s, n)| (s.clone(), *n))
        .collect();
    let sorted_runs = |checkpoint: &Checkpoint| -> Result<Option<RowSorter>> {
        step_down
            .then(|| {
                RowSorter::resume(
                    &runs_dir,
                    design.units(),
                    sorter_memory,
                    checkpoint.sorter_runs,
                )
            })
            .transpose()
    };
    if let Some(range) = shard_range {
        let record = crate::shard::ShardRecord {
            shard: options
                .shard
                .unwrap_or(crate::shard::ShardSpec { index: 1, count: 1 }),
            range,
            n_features: info.n_features,
            tested,
            untested,
            relabelings: b_total,
            exact,
            design: design.clone(),
            matrix_format: info.format,
            sample_columns: info.sample_columns.clone(),
            options: options.clone(),
            provenance,
            seconds: 0.0,
            pipeline: crate::shard::ShardTiming {
                chunks: stats.chunks,
                read_seconds: stats.read_seconds,
                kernel_seconds: stats.kernel_seconds,
                wall_seconds: stats.wall_seconds,
            },
        };
        let record = finish_shard(
            kernel,
            sorted_runs(&checkpoint)?,
            &pipeline_options,
            &spill_dir,
            checkpoint.null_max(),
            checkpoint.null_histogram(),
            record,
            started,
            stop,
        )?;
        Checkpoint::remove(&options.out);
        let _ = std::fs::remove_dir_all(&runs_dir);
        return Ok(ScanOutcome::Shard(Box::new(record)));
    }
    let rank_file = spill_dir.join("rank.bin");
    crate::heap::hand_back_free_heap();
    let mut runs_removal = BackgroundRemoval::default();
    if step_down {
        let rank_started = Instant::now();
        if checkpoint.phase == Phase::Sorted {
            let sorter = sorted_runs(&checkpoint)?
                .ok_or_else(|| RiffleError::Internal("no sorter in step-down mode".into()))?;
            let mut reporter = ProgressReporter::new(tested, options.quiet, "relabel");
            let (null_max, histogram) = rank_pass(
                kernel.clone(),
                sorter.finish()?,
                pipeline_options.threads,
                pipeline_options.chunk_rows,
                &rank_file,
                stop,
                &mut |done| reporter.update(done),
            )?;
            reporter.finish();
            checkpoint.phase = Phase::Ranked;
            checkpoint.set_null_max(&null_max);
            checkpoint.set_histogram(histogram.as_ref());
            checkpoint.save(&options.out)?;
            runs_removal.start(runs_dir.clone());
        }
        // An interrupted rewrite is redone (it is idempotent); a finished
        // one removed the rank file last.
        if rank_file.is_file() {
            apply_step_down(
                &rank_file,
                &spill_dir,
                b_total,
                stats.features,
                options.memory_bytes,
                &mut p_rule.clone(),
            )?;
        }
        stats.wall_seconds += rank_started.elapsed().as_secs_f64();
    }
    let null_max = checkpoint.null_max();
    let null_hist = checkpoint.null_histogram();
    crate::maxt::write_null_max(&spill_dir, &null_max)?;
    if let Some(hist) = &null_hist {
        crate::maxt::write_null_histogram(&spill_dir, hist)?;
    }
    let pooled = null_hist.map(|h| h.into_upper_tail());
    if stop.load(std::sync::atomic::Ordering::Relaxed) {
        return Err(RiffleError::Interrupted);
    }

    let tail = match options.tail_fit {
        Some(below) => Some(crate::tail::tail_pass(
            &kernel,
            &mut *source,
            &spill_dir,
            &crate::tail::TailSettings {
                below,
                options: crate::tail::TailOptions::for_reference_scale(),
            },
            pipeline_options.threads,
            stop,
        )?),
        None => None,
    };

    crate::heap::hand_back_free_heap();
    let mut finalized = finalize(options, &spill_dir, &null_max, pooled.as_ref())?;
    finalized.tail = tail;
    let seconds = started.elapsed().as_secs_f64();
    let summary = ScanSummary {
        features: stats.features,
        tested,
        untested,
        relabelings: b_total,
        exact,
        n_a: spec.sizes.n_a,
        n_b: spec.sizes.n_b,
        level_a: design.levels.first().cloned().unwrap_or_default(),
        level_b: design.levels.get(1).cloned().unwrap_or_default(),
        pi0: finalized.perm.pi0,
        bh_hits: hits(&finalized.perm, Method::Bh),
        fwer_hits_05: finalized.fwer_hits_05,
        results_path: finalized.results_path.clone(),
        seconds,
        feature_relabelings_per_second: finalized.relabelings_used as f64
            / stats.wall_seconds.max(1e-9),
        relabelings_used: finalized.relabelings_used,
        maxt_computed: options.maxt_computed().is_some(),
    };
    write_run_record(
        options,
        &info,
        design,
        &stats,
        &finalized,
        &summary,
        &provenance,
        serde_json::Value::Null,
    )?;
    Checkpoint::remove(&options.out);
    if options.report {
        // The results are complete and in place: a report that cannot be
        // drawn is worth a warning, not a failed run.
        if let Err(e) =
            crate::report::write_report(&crate::report::ReportOptions::for_run(&options.out))
        {
            eprintln!("riffle: warning: the report was not written: {e}");
        }
    }
    Ok(ScanOutcome::Finished(summary))
}

/// Deletes a directory on its own thread. The sorted runs of step-down
/// (some 400 bytes per feature) took the final pass's main thread a few
/// hundredths of a second to unlink while the other cores sat idle. Dropping
/// the guard waits for the deletion, so that neither a finished run nor the
/// clean-up after an error returns with the deletion still under way.
#[derive(Default)]
struct BackgroundRemoval(Option<std::thread::JoinHandle<()>>);

impl BackgroundRemoval {
    /// Waits for an earlier deletion first, if any.
    fn start(&mut self, dir: PathBuf) {
        drop(std::mem::take(self));
        let spawned = std::thread::Builder::new().name("riffle-rm".into()).spawn({
            let dir = dir.clone();
            move || {
                let _ = std::fs::remove_dir_all(dir);
            }
        });
        match spawned {
            Ok(handle) => self.0 = Some(handle),
            // No thread to be had: delete here, as before.
            Err(_) => {
                let _ = std::fs::remove_dir_all(dir);
            }
        }
    }
}

impl Drop for BackgroundRemoval {
    fn drop(&mut self) {
        if let Some(handle) = self.0.take() {
            let _ = handle.join();
        }
    }
}

/// A shard's end: in step-down mode the rank pass over the shard's own
/// features, keeping what the merge needs; then the per-relabelling maxima,
/// the histogram and, last, `shard.json`.
#[allow(clippy::too_many_arguments)]
fn finish_shard(
    kernel: Arc<Kernel>,
    sorter: Option<RowSorter>,
    pipeline_options: &PipelineOptions,
    spill_dir: &Path,
    mut null_max: Vec<f64>,
    mut null_hist: Option<NullHistogram>,
    mut record: crate::shard::ShardRecord,
    started: Instant,
    stop: &AtomicBool,
) -> Result<crate::shard::ShardRecord> {
    if let Some(sorter) = sorter {
        let rank_started = Instant::now();
        let rank_file = spill_dir.join("rank.bin");
        let keys_file = spill_dir.join(crate::shard::RANK_KEYS_FILE);
        let keys_temp = spill::temp_name(&keys_file);
        let mut reporter = ProgressReporter::new(record.tested, record.options.quiet, "relabel");
        let output = crate::stepdown::rank_pass_with(
            kernel,
            sorter.finish()?,
            pipeline_options.threads,
            pipeline_options.chunk_rows,
            &rank_file,
            Some(&keys_temp),
            stop,
            &mut |done| reporter.update(done),
        )?;
        reporter.finish();
        let _ = std::fs::remove_file(&rank_file);
        std::fs::rename(&keys_temp, &keys_file).at(&keys_file)?;
        crate::shard::write_step_functions(
            &spill_dir.join(crate::shard::STEP_FUNCTIONS_FILE),
            &output.step_functions.unwrap_or_default(),
        )?;
        null_max = output.null_max;
        null_hist = output.histogram;
        record.pipeline.wall_seconds += rank_started.elapsed().as_secs_f64();
    }
    crate::maxt::write_null_max(spill_dir, &null_max)?;
    if let Some(hist) = &null_hist {
        crate::maxt::write_null_histogram(spill_dir, hist)?;
    }
    record.seconds = started.elapsed().as_secs_f64();
    let out_dir = spill_dir.parent().unwrap_or(spill_dir);
    record.write(out_dir)?;
    Ok(record)
}

/// Options that name design columns the chosen test does not use.
fn check_design_options(options: &ScanOptions) -> Result<()> {
    let test = options.test.name();
    if !options.covariates.is_empty()
        && !matches!(
            options.test,
            TestKind::Student | TestKind::Pearson | TestKind::Anova
        )
    {
        return Err(RiffleError::options(format!(
            "--covariates makes the test a linear model's t or F: use --test student (two \
             groups), anova (k groups) or pearson (a trait), not --test {test}"
        )));
    }
    match options.test.design() {
        DesignKind::Trait => {
            if options.pair.is_some() {
                return Err(RiffleError::options(format!(
                    "--pair does not go with --test {test}: pairs are for paired-t or signed-rank"
                )));
            }
        }
        DesignKind::Groups => {
            if options.trait_column.is_some() {
                return Err(RiffleError::options(format!(
                    "--trait does not go with --test {test}: use --test pearson or spearman"
                )));
            }
            if options.pair.is_some() {
                return Err(RiffleError::options(format!(
                    "--pair does not go with --test {test}: use --test paired-t or signed-rank"
                )));
            }
        }
        DesignKind::Paired => {
            if options.trait_column.is_some() {
                return Err(RiffleError::options(format!(
                    "--trait does not go with --test {test}"
                )));
            }
            if options.strata.is_some() {
                return Err(RiffleError::options(
                    "--strata with paired tests: sign flips already stay within each pair; \
                     leave --strata out",
                ));
            }
        }
    }
    Ok(())
}

/// The test's fixed parts from the design.
pub(crate) fn test_spec(options: &ScanOptions, design: &StudyDesign) -> Result<TestSpec> {
    let test = options.test;
    let n = design.units();
    Ok(match test.design() {
        DesignKind::Groups if test.is_k_group() => {
            if options.side != Side::Both {
                return Err(RiffleError::options(format!(
                    "--test {} has no direction (F and H grow with any difference); use --side both",
                    test.name()
                )));
            }
            TestSpec {
                test,
                side: Side::Both,
                sizes: Sizes { n_a: n, n_b: 0 },
                group_sizes: design.group_sizes.clone(),
                trait_weights: Vec::new(),
                model: design.model.clone(),
                min_observed: options.min_observed,
            }
        }
        DesignKind::Groups => {
            if design.levels.len() != 2 {
                return Err(RiffleError::bad_input(
                    &options.samples,
                    format!("column '{}'", options.group),
                    format!(
                        "expected exactly two levels for --test {}, found {} ({}); pick two with \
                         --levels A,B, or compare all with --test anova or kruskal",
                        test.name(),
                        design.levels.len(),
                        design.levels.join(", ")
                    ),
                ));
            }
            let mut spec = TestSpec::two_group(
                test,
                options.side,
                Sizes {
                    n_a: design.group_sizes[0],
                    n_b: design.group_sizes[1],
                },
            );
            spec.model = design.model.clone();
            spec.min_observed = options.min_observed;
            spec
        }
        DesignKind::Trait => TestSpec {
            test,
            side: options.side,
            sizes: Sizes { n_a: n, n_b: 0 },
            group_sizes: Vec::new(),
            trait_weights: design.trait_weights(test == TestKind::Spearman),
            model: design.model.clone(),
            min_observed: options.min_observed,
        },
        DesignKind::Paired => TestSpec {
            test,
            side: options.side,
            sizes: Sizes { n_a: n, n_b: n },
            group_sizes: Vec::new(),
            trait_weights: Vec::new(),
            model: None,
            min_observed: options.min_observed,
        },
    })
}

fn validate(options: &ScanOptions) -> Result<()> {
    if options.perms == 0 {
        return Err(RiffleError::options(
            "--perms 0: at least one relabelling is needed (1,000 or more is usual)",
        ));
    }
    if options.threads == 0 {
        return Err(RiffleError::options("--threads must be at least 1"));
    }
    if options.chunk_rows == Some(0) {
        return Err(RiffleError::options("--chunk-rows must be at least 1"));
    }
    if options.min_observed < 2 {
        return Err(RiffleError::options(format!(
            "--min-observed {}: a group needs at least 2 observed values for a variance",
            options.min_observed
        )));
    }
    if !(options.checkpoint_seconds.is_finite() && options.checkpoint_seconds >= 0.0) {
        return Err(RiffleError::options(
            "--checkpoint-seconds must be a number of seconds, 0 or more",
        ));
    }
    if options.tail_fit == Some(0) {
        return Err(RiffleError::options(
            "--tail-fit 0: the number of relabelings below which a tail is fitted must be at least 1 (10 is usual)",
        ));
    }
    if options.tail_fit.is_some() && options.shard.is_some() {
        return Err(RiffleError::options(
            "--tail-fit cannot be combined with --shard yet: run the tail fit on a whole scan",
        ));
    }
    if options.stop_after == Some(0) {
        return Err(RiffleError::options(
            "--stop-after must be at least 1 (10 is usual: Besag & Clifford 1991)",
        ));
    }
    if options.stop_after.is_some() && options.pooled_null {
        return Err(RiffleError::options(
            "--stop-after does not go with --pooled-null: the pooled null needs every \
             relabelling of every feature; leave one of them out",
        ));
    }
    if options.memory_bytes < 16 << 20 {
        return Err(RiffleError::options("--memory must be at least 16M"));
    }
    Ok(())
}

fn prepare_out_dir(out: &Path) -> Result<()> {
    std::fs::create_dir_all(out).at(out)?;
    let probe = out.join(format!(".riffle-write-test-{}", std::process::id()));
    std::fs::write(&probe, b"").at(out)?;
    std::fs::remove_file(&probe).at(out)?;
    Ok(())
}

/// Chunk size and queue depth from the memory budget: an eighth of it for
/// the chunks in flight (raw f64, standardized f64 and f32 copies per
/// value). The queues run full only in long runs (the writer, sorting
/// rows for step-down, is the slow consumer), so this share is the part
/// of peak memory that grows from 100,000 to millions of features: with a
/// quarter, 66-70 -> 81-86 MiB at --memory 256M (100,000 -> 2,000,000
/// features, Welch, step-down, B = 1,000); with an eighth 60-62 -> 66-68
/// MiB at the same speed (chunks of ~2,000 rows keep the GEMM tiles full).
fn pipeline_options(options: &ScanOptions, n: usize, b_total: usize) -> PipelineOptions {
    let threads = options.threads.max(1);
    let per_row = (n * 28 + 160) as u64;
    let fixed = (n * b_total * 5) as u64;
    let budget = (options.memory_bytes / 8).saturating_sub(fixed);
    let rows_at = |depth: usize| budget / ((2 * depth + 2 * threads) as u64 * per_row);
    // A tight budget shortens the queue before it makes chunks small (small
    // chunks cost per-chunk overhead, a short queue only some overlap).
    let mut queue_depth = threads + 1;
    while queue_depth > 1 && rows_at(queue_depth) < 1024 {
        queue_depth -= 1;
    }
    let derived = rows_at(queue_depth).clamp(64, 65_536) as usize;
    // At large B a chunk is a long stretch of multiply, and the last chunk
    // of a pass runs on one worker while the others wait (B = 10,000: 8,700
    // rows, ~40 ms, 8% of a 200,000-feature scan on 2 threads). Chunks of
    // at most 2^25 feature-relabelings (~16 ms on one core) cut that tail.
    let derived = derived.min(((1usize << 25) / b_total.max(1)).max(1024));
    PipelineOptions {
        threads,
        chunk_rows: options.chunk_rows.unwrap_or(derived),
        queue_depth,
        prepare_only: false,
    }
}

struct SpillSink {
    writer: SpillWriter,
    null_hist: Option<NullHistogram>,
    /// Step-down mode: standardized rows go here for the rank pass.
    sorter: Option<RowSorter>,
    n: usize,
    null_max: Vec<f64>,
    p_rule: crate::perm_p::PermPRule,
    b_total: usize,
    sizes: Sizes,
    tested: u64,
    untested: std::collections::BTreeMap<String, u64>,
    /// The last checkpoint written, updated at each commit.
    checkpoint: Checkpoint,
    schedule: crate::resume::Schedule,
    out: PathBuf,
}

impl SpillSink {
    /// Makes the spill and the sorted runs durable and returns the
    /// checkpoint describing them (not yet saved).
    fn commit(&mut self, phase: Phase, features_done: u64) -> Result<Checkpoint> {
        let (records_len, ids_len, count) = self.writer.commit()?;
        let runs = match self.sorter.as_mut() {
            Some(sorter) => sorter.commit()?,
            None => 0,
        };
        let c = &mut self.checkpoint;
        c.phase = phase;
        c.features_done = features_done;
        c.records_count = count;
        c.records_len = records_len;
        c.ids_len = ids_len;
        c.sorter_runs = runs;
        c.tested = self.tested;
        c.untested = self.untested.clone();
        c.set_null_max(&self.null_max);
        c.set_histogram(self.null_hist.as_ref());
        Ok(c.clone())
    }
}

impl ChunkSink for SpillSink {
    fn accept(&mut self, chunk: &FinishedChunk) -> Result<()> {
        for (m, v) in self.null_max.iter_mut().zip(&chunk.outcome.null_max) {
            *m = m.max(*v);
        }
        if let Some(hist) = self.null_hist.as_mut() {
            hist.add(&chunk.outcome.null_hist);
        }
        let mut tested_rows = chunk.outcome.standardized.chunks_exact(self.n.max(1));
        for (k, (id, f)) in chunk.ids.iter().zip(&chunk.outcome.features).enumerate() {
            let p = f.prepared;
            let tested = p.status == Status::Tested;
            if tested {
                self.tested += 1;
                if let Some(sorter) = self.sorter.as_mut() {
                    let row = tested_rows
                        .next()
                        .ok_or_else(|| RiffleError::Internal("standardized row missing".into()))?;
                    sorter.push(p.kernel_obs, chunk.first_index + k as u64, row)?;
                }
            } else {
                *self
                    .untested
                    .entry(p.status.reason().to_string())
                    .or_default() += 1;
            }
            // In step-down mode the counts come from the rank pass; until
            // then p_perm is unknown but the rule already names its source.
            let (p_perm, source) = if tested && self.sorter.is_none() {
                self.p_rule.p(f.exceed, f.relabelings)
            } else {
                (f64::NAN, self.p_rule.p(0, self.b_total as u64).1)
            };
            let record = Record {
                effect: p.effect,
                statistic: p.statistic,
                p_param: p.p_param,
                p_perm,
                kernel_obs: p.kernel_obs,
                p_maxt: f64::NAN,
                exceed: f.exceed,
                n_relabel: match (tested, self.sorter.is_some()) {
                    (false, _) => 0,
                    (true, true) => self.b_total as u64,
                    (true, false) => f.relabelings,
                },
                n_a: p.observed.map_or(self.sizes.n_a, |o| o.n_a) as u32,
                n_b: p.observed.map_or(self.sizes.n_b, |o| o.n_b) as u32,
                status: p.status,
                source,
            };
            self.writer.push(id, &record)?;
        }
        if self.schedule.due() {
            let next = chunk.first_index + chunk.ids.len() as u64;
            self.commit(Phase::Scanning, next)?.save(&self.out)?;
        }
        Ok(())
    }
}

/// The reverse pass over a rank file of (index, exceed, reached) records in
/// ascending rank order, and the spill rewrite that puts each tested
/// feature's exceedance count, p_perm and p_maxt into its record. Removes
/// the rank file.
pub(crate) fn apply_step_down(
    rank_file: &Path,
    spill_dir: &Path,
    b_total: usize,
    features: u64,
    memory_bytes: u64,
    p_rule: &mut crate::perm_p::PermPRule,
) -> Result<()> {
    let dense = spill_dir.join("stepdown.bin");
    let mut writer = crate::columns::ColumnFileWriter::create(&dense, 2)?;
    reverse_and_scatter(
        rank_file,
        spill_dir,
        b_total,
        features,
        // Scatter buckets: a small share, so that memory stays flat in F
        // (a bucket is read whole, with one result slot per feature).
        memory_bytes / 64,
        &mut |_, result| match result {
            Some(r) => writer.push(&[r.exceed as f64, r.p_maxt]),
            None => writer.push(&[0.0, f64::NAN]),
        },
    )?;
    writer.finish()?;
    let mut reader = crate::columns::ColumnFileReader::open(&dense, 2)?;
    let mut row = [0.0f64; 2];
    spill::rewrite_records(spill_dir, &mut |_, record| {
        reader.next_row(&mut row)?;
        if record.status == Status::Tested {
            record.exceed = row[0] as u64;
            (record.p_perm, record.source) = p_rule.p(record.exceed, b_total as u64);
            record.p_maxt = row[1];
        }
        Ok(())
    })?;
    let _ = std::fs::remove_file(&dense);
    let _ = std::fs::remove_file(rank_file);
    Ok(())
}

/// Which p-value of a spill record to adjust.
#[derive(Clone, Copy)]
enum PColumn<'a> {
    Perm,
    Param,
    Pooled(&'a UpperTail),
}

struct SpillPValues<'a> {
    dir: &'a Path,
    column: PColumn<'a>,
}

impl PValueSource for SpillPValues<'_> {
    fn for_each(&mut self, f: &mut dyn FnMut(f64) -> Result<()>) -> Result<()> {
        let mut reader = SpillReader::open_unchecked(self.dir)?;
        while let Some(r) = reader.next_record()? {
            let p = if r.status != Status::Tested {
                f64::NAN
            } else {
                match self.column {
                    PColumn::Perm => r.p_perm,
                    PColumn::Param => r.p_param,
                    PColumn::Pooled(tail) => tail.p_value(r.kernel_obs),
                }
            };
            f(p)?;
        }
        Ok(())
    }
}

/// Every adjustment the results table carries, in column order.
pub const METHODS: [Method; 6] = Method::ALL;

pub(crate) struct Finalized {
    pub(crate) perm: AdjustSummary,
    param: Option<AdjustSummary>,
    pooled: Option<AdjustSummary>,
    pub(crate) fwer_hits_05: u64,
    pub(crate) results_path: PathBuf,
    /// What the tail pass did (scans with `tail_fit`).
    pub(crate) tail: Option<crate::tail::TailPassCounts>,
    /// Sum of n_relabel over tested features.
    pub(crate) relabelings_used: u64,
    /// Features that sequential stopping ended before B.
    pub(crate) stopped_early: u64,
    /// Wall seconds of the adjustments and the results table.
    pub(crate) seconds: f64,
}

pub(crate) fn hits(summary: &AdjustSummary, method: Method) -> [u64; 3] {
    summary
        .rejections
        .iter()
        .find(|(m, _)| *m == method)
        .map(|(_, h)| *h)
        .unwrap_or([0; 3])
}

/// Columns of the widest results table (with pooled-null and parameter
/// adjustments), with room to spare.
const MAX_RESULT_COLUMNS: usize = 40;

/// Multiple testing over the spill and the results table, in feature order
/// and bounded memory.
pub(crate) fn finalize(
    options: &ScanOptions,
    spill_dir: &Path,
    null_max: &[f64],
    pooled: Option<&UpperTail>,
) -> Result<Finalized> {
    let started = Instant::now();
    SpillReader::open(spill_dir)?;
    let adjust_options = AdjustOptions {
        methods: METHODS.to_vec(),
        lambda: options.storey_lambda,
        memory_bytes: (options.memory_bytes / 4) as usize,
        scratch_dir: spill_dir.to_path_buf(),
        bootstrap_seed: options.seed,
    };
    // With --also-param, the model-based adjustments go to a scratch column
    // file first, read back beside the permutation ones.
    let mut param_columns = None;
    let param_summary = if options.also_param {
        let path = spill_dir.join("param-adjusted.bin");
        let mut file = crate::columns::ColumnFileWriter::create(&path, METHODS.len())?;
        let summary = multitest::adjust(
            &mut SpillPValues {
                dir: spill_dir,
                column: PColumn::Param,
            },
            &adjust_options,
            &mut |_, adjusted| file.push(adjusted),
        )?;
        file.finish()?;
        param_columns = Some(crate::columns::ColumnFileReader::open(
            &path,
            METHODS.len(),
        )?);
        Some(summary)
    } else {
        None
    };
    // With --pooled-null: the pooled p-value and its Storey q-value.
    let mut pooled_columns = None;
    let pooled_summary = if let Some(tail) = pooled {
        let path = spill_dir.join("pooled-adjusted.bin");
        let mut file = crate::columns::ColumnFileWriter::create(&path, 2)?;
        let mut source = SpillPValues {
            dir: spill_dir,
            column: PColumn::Pooled(tail),
        };
        let mut p_values = SpillReader::open_unchecked(spill_dir)?;
        let summary = multitest::adjust(
            &mut source,
            &AdjustOptions {
                methods: vec![Method::Storey],
                ..adjust_options.clone()
            },
            &mut |_, adjusted| {
                let record = p_values
                    .next_record()?
                    .ok_or_else(|| RiffleError::Internal("spill ended early".into()))?;
                let p = if record.status == Status::Tested {
                    tail.p_value(record.kernel_obs)
                } else {
                    f64::NAN
                };
                file.push(&[p, adjusted[0]])
            },
        )?;
        file.finish()?;
        pooled_columns = Some(crate::columns::ColumnFileReader::open(&path, 2)?);
        Some(summary)
    } else {
        None
    };

    let mut columns: Vec<(String, ColumnKind)> = vec![
        ("feature".into(), ColumnKind::Text),
        ("n_a".into(), ColumnKind::Count),
        ("n_b".into(), ColumnKind::Count),
        ("effect".into(), ColumnKind::Float),
        ("statistic".into(), ColumnKind::Float),
        ("p_param".into(), ColumnKind::Float),
        ("p_perm".into(), ColumnKind::Float),
        ("p_source".into(), ColumnKind::Text),
        ("n_exceed".into(), ColumnKind::Count),
        ("n_relabel".into(), ColumnKind::Count),
    ];
    columns.extend(
        METHODS
            .iter()
            .map(|m| (m.name().to_string(), ColumnKind::Float)),
    );
    columns.push(("p_maxt".into(), ColumnKind::Float));
    columns.push(("p_maxt_single".into(), ColumnKind::Float));
    if pooled.is_some() {
        columns.push(("p_pooled".into(), ColumnKind::Float));
        columns.push(("q_pooled".into(), ColumnKind::Float));
    }
    if options.also_param {
        columns.extend(
            METHODS
                .iter()
                .map(|m| (format!("{}_param", m.name()), ColumnKind::Float)),
        );
    }
    columns.push(("note".into(), ColumnKind::Text));

    if columns.len() > MAX_RESULT_COLUMNS {
        return Err(RiffleError::Internal(format!(
            "{} results columns, room for {MAX_RESULT_COLUMNS}",
            columns.len()
        )));
    }
    let results_path = options.out.join(options.format.file_name(RESULTS_STEM));
    let mut table = create_table(&results_path, options.format, &columns, options.threads)?;
    let maxt = options
        .maxt_computed()
        .map(|_| crate::maxt::SingleStep::new(null_max));
    let mut relabelings_used = 0u64;
    let mut stopped_early = 0u64;
    let mut rows = crate::spill_ahead::SpillRows::open(spill_dir, options.threads > 1)?;
    let mut param_row = vec![f64::NAN; METHODS.len()];
    let mut pooled_row = [f64::NAN; 2];
    let mut fwer_hits_05 = 0u64;
    let perm_summary = multitest::adjust(
        &mut SpillPValues {
            dir: spill_dir,
            column: PColumn::Perm,
        },
        &adjust_options,
        &mut |_, adjusted| {
            let (record, id) = rows
                .next_row()?
                .ok_or_else(|| RiffleError::Internal("spill ended early".into()))?;
            if let Some(cols) = param_columns.as_mut() {
                cols.next_row(&mut param_row)?;
            }
            let tested = record.status == Status::Tested;
            let p_maxt_single = match &maxt {
                Some(maxt) if tested => maxt.adjusted(record.kernel_obs),
                _ => f64::NAN,
            };
            if tested {
                relabelings_used += record.n_relabel;
                stopped_early += u64::from(record.source == spill::PSource::Sequential);
            }
            let fwer = if record.p_maxt.is_nan() {
                p_maxt_single
            } else {
                record.p_maxt
            };
            if fwer <= 0.05 {
                fwer_hits_05 += 1;
            }
            // A row's cells on the stack: one allocation per feature showed
            // in the profile of the final pass at B = 100.
            let mut cells = [Cell::Text(id); MAX_RESULT_COLUMNS];
            let mut n = 1;
            for cell in [
                Cell::Count(record.n_a as u64),
                Cell::Count(record.n_b as u64),
                Cell::Float(record.effect),
                Cell::Float(record.statistic),
                Cell::Float(record.p_param),
                Cell::Float(record.p_perm),
                Cell::Text(if tested {
                    record.source.name()
                } else {
                    "untested"
                }),
                Cell::Count(record.exceed),
                Cell::Count(record.n_relabel),
            ]
            .into_iter()
            .chain(adjusted.iter().map(|&v| Cell::Float(v)))
            .chain([Cell::Float(record.p_maxt), Cell::Float(p_maxt_single)])
            {
                cells[n] = cell;
                n += 1;
            }
            if let Some(cols) = pooled_columns.as_mut() {
                cols.next_row(&mut pooled_row)?;
                for &v in &pooled_row {
                    cells[n] = Cell::Float(v);
                    n += 1;
                }
            }
            if options.also_param {
                for &v in &param_row {
                    cells[n] = Cell::Float(v);
                    n += 1;
                }
            }
            cells[n] = Cell::Text(record.status.reason());
            table.write_row(&cells[..=n])
        },
    )?;
    table.finish()?;
    let _ = std::fs::remove_file(spill_dir.join("param-adjusted.bin"));
    let _ = std::fs::remove_file(spill_dir.join("pooled-adjusted.bin"));
    Ok(Finalized {
        perm: perm_summary,
        param: param_summary,
        pooled: pooled_summary,
        fwer_hits_05,
        results_path,
        tail: None,
        relabelings_used,
        stopped_early,
        seconds: started.elapsed().as_secs_f64(),
    })
}

/// How p_perm was computed, for `run.json`.
fn p_perm_rule(options: &ScanOptions, exact: bool) -> serde_json::Value {
    if exact {
        return serde_json::json!({"rule": "exact: (b + 1) / (B + 1) over the listed space",
                                  "maxt": options.maxt_computed()});
    }
    serde_json::json!({
        "stop_after": options.stop_after,
        "rule": match (options.stop_after, options.phipson_smyth) {
            (Some(_), true) => "h / L when stopped (Besag-Clifford), else Phipson-Smyth exact",
            (Some(_), false) => "h / L when stopped (Besag-Clifford), else (b + 1) / (B + 1)",
            (None, true) => "Phipson-Smyth exact",
            (None, false) => "(b + 1) / (B + 1)",
        },
        "maxt": options.maxt_computed(),
    })
}

/// `run.json`; `extra` (when not null) goes in as `shards` (a merge's).
#[allow(clippy::too_many_arguments)]
pub(crate) fn write_run_record(
    options: &ScanOptions,
    info: &MatrixInfo,
    design: &StudyDesign,
    stats: &PipelineStats,
    finalized: &Finalized,
    summary: &ScanSummary,
    provenance: &crate::provenance::Provenance,
    extra: serde_json::Value,
) -> Result<()> {
    let file_size = |p: &Path| std::fs::metadata(p).map(|m| m.len()).unwrap_or(0);
    let summary_json = |s: &AdjustSummary| {
        serde_json::json!({
            "m": s.m,
            "missing": s.n_missing,
            "pi0": s.pi0,
            "lambda": s.lambda,
            "hits_at_0.01_0.05_0.1": s.rejections.iter()
                .map(|(m, h)| (m.name().to_string(), serde_json::json!(h)))
                .collect::<serde_json::Map<_, _>>(),
        })
    };
    let mut record = serde_json::json!({
        "complete": true,
        "riffle_version": env!("CARGO_PKG_VERSION"),
        "command": std::env::args().collect::<Vec<_>>(),
        "options": options,
        "inputs": {
            "matrix": {"path": info.path, "format": info.format, "bytes": file_size(&info.path),
                       "features": info.n_features, "sample_columns": info.sample_columns.len()},
            "samples": {"path": options.samples, "bytes": file_size(&options.samples)},
        },
        "design": design,
        "relabelings": {"count": summary.relabelings, "exact": summary.exact,
                        "generator": crate::design::relabel::GENERATOR, "seed": options.seed,
                        "drawn": if summary.exact { "every distinct relabelling listed once" }
                                 else { "independent uniform draws, with replacement" },
                        "used": summary.relabelings_used,
                        "stopped_early": finalized.stopped_early,
                        "fixed_b_equivalent": summary.tested * summary.relabelings as u64,
                        "p_perm_rule": p_perm_rule(options, summary.exact)},
        "features": {"total": summary.features, "tested": summary.tested,
                     "untested": summary.untested.iter().cloned().collect::<std::collections::BTreeMap<_, _>>()},
        "multiple_testing": {
            "p_perm": summary_json(&finalized.perm),
            "p_param": finalized.param.as_ref().map(summary_json),
            "pooled_null": finalized.pooled.as_ref().map(|s| serde_json::json!({
                "pi0": s.pi0, "lambda": s.lambda,
                "q_pooled_hits_at_0.01_0.05_0.1": s.rejections.first().map(|r| r.1),
            })),
            "fwer_p_maxt_single_at_0.05": finalized.fwer_hits_05,
        },
        "timing": {"seconds": summary.seconds, "pipeline_seconds": stats.wall_seconds,
                   "final_seconds": finalized.seconds,
                   "read_seconds": stats.read_seconds, "kernel_seconds": stats.kernel_seconds,
                   "threads": options.threads, "cores": default_threads(), "chunks": stats.chunks,
                   "feature_relabelings_per_second": summary.feature_relabelings_per_second},
        "caution": crate::CAUTION,
        "provenance": provenance,
        "results": crate::provenance::results_entry(&finalized.results_path)?,
    });
    if let Some(tail) = &finalized.tail {
        record["tail_fit"] = serde_json::json!({
            "below": options.tail_fit,
            "counts": tail,
            "p_perm": "tail estimate where p_source is tail; n_exceed keeps the count",
        });
    }
    if !extra.is_null() {
        record["shards"] = extra;
    }
    let path = options.out.join(RUN_RECORD);
    let temp = spill::temp_name(&path);
    let text = serde_json::to_string_pretty(&record)
        .map_err(|e| RiffleError::Internal(format!("run record: {e}")))?;
    std::fs::write(&temp, text + "\n").at(&temp)?;
    std::fs::rename(&temp, &path).at(&path)
}
