//! Command-line edge: parses arguments, drives the library, turns errors
//! into one line on stderr and an exit code.

use std::path::PathBuf;
use std::sync::atomic::AtomicBool;

use clap::{Args, Parser, Subcommand};

use crate::error::{exit_code, Result, RiffleError};
use crate::multitest::LambdaChoice;
use crate::output::TableFormat;
use crate::scan::{self, MaxtMode, ScanOptions};
use crate::stats::{Side, TestKind};

#[derive(Parser, Debug)]
#[command(
    name = "riffle",
    version,
    about = "Feature-wise permutation tests with FDR and FWER control for very large feature sets",
    after_help = "Results are statistical screening results: confirm them by independent \
validation and have them read by qualified people."
)]
pub struct Cli {
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Subcommand, Debug)]
pub enum Command {
    /// Test every feature of a matrix: two or more groups, a trait, pairs,
    /// strata, covariates.
    #[command(args_override_self = true)]
    Scan(Box<ScanArgs>),
    /// Combine shard folders (from `scan --shard`) into the whole scan's results.
    Merge(MergeArgs),
    /// Run the bundled demo end to end and print a short summary.
    Demo(DemoArgs),
    /// Write a synthetic matrix (and its sample sheet) of any size.
    Simulate(crate::simulate::SimulateArgs),
    /// Convert a text matrix (TSV/CSV, optionally gzipped) to Arrow IPC or Parquet.
    Import(crate::input::text::ImportArgs),
    /// Describe a matrix: shape, column types, missing values, summary figures.
    Inspect(crate::inspect::InspectArgs),
    /// Add multiple-testing adjusted columns to any table of p-values.
    Adjust(crate::adjust_table::AdjustArgs),
    /// Plots and one self-contained HTML page for a finished run.
    Report(ReportArgs),
}

#[derive(Args, Debug)]
pub struct ReportArgs {
    /// Output folder of a finished scan (holding run.json).
    #[arg(long)]
    pub run: PathBuf,
    /// Draw the permutation null of this feature (repeatable) [default:
    /// the 3 with the smallest p_perm].
    #[arg(long = "show-feature", value_name = "ID")]
    pub show_feature: Vec<String>,
    /// FDR level marked on the volcano plot (q_bh at or below it).
    #[arg(long, default_value_t = 0.05)]
    pub fdr: f64,
    /// Report folder [default: <RUN>/report].
    #[arg(long)]
    pub out: Option<PathBuf>,
}

#[derive(Args, Debug)]
pub struct ScanArgs {
    /// Feature matrix: Arrow IPC file or Parquet, one row per feature.
    #[arg(long)]
    pub matrix: PathBuf,
    /// Sample sheet: CSV or TSV with a header.
    #[arg(long)]
    pub samples: PathBuf,
    /// Sample-sheet column holding the group (or condition) of each sample.
    #[arg(long, default_value = "")]
    pub group: String,
    /// Levels of the group column to compare: A,B for two-group and paired
    /// tests (effects are B minus A); any number for anova/kruskal.
    #[arg(long, value_delimiter = ',')]
    pub levels: Option<Vec<String>>,
    /// Numeric sample-sheet column to correlate with (pearson, spearman).
    #[arg(long = "trait")]
    pub trait_column: Option<String>,
    /// Sample-sheet column with the pair id (paired-t, signed-rank).
    #[arg(long)]
    pub pair: Option<String>,
    /// Sample-sheet column of strata (batch, site, plate): relabelings
    /// only exchange samples within a stratum.
    #[arg(long)]
    pub strata: Option<String>,
    /// Sample-sheet columns to adjust for (numeric as is, text one-hot with
    /// the first level as reference; an intercept is always in): the test
    /// becomes a linear model's t (student, pearson) or F (anova), permuted
    /// by Freedman–Lane.
    #[arg(long, value_delimiter = ',')]
    pub covariates: Vec<String>,
    #[arg(long, value_enum, default_value_t = TestKind::Welch)]
    pub test: TestKind,
    #[arg(long, value_enum, default_value_t = Side::Both)]
    pub side: Side,
    /// Number of relabelings (all of them, exactly, when fewer exist;
    /// otherwise independent random draws, i.e. with replacement).
    #[arg(long, default_value_t = 10_000)]
    pub perms: usize,
    /// Sequential stopping (Besag & Clifford 1991): a feature stops at its
    /// H-th relabelling at least as extreme as the observed one, with
    /// p_perm = H / L after L relabelings (p_source "sequential",
    /// n_relabel L); the others run all --perms. 10 is usual. No maxT then
    /// (p_maxt, p_maxt_single empty); not with --pooled-null.
    #[arg(long, value_name = "H")]
    pub stop_after: Option<u64>,
    /// Phipson & Smyth (2010) exact p_perm for relabelings drawn with
    /// replacement, instead of (b+1)/(B+1): it matters when the distinct
    /// relabelings are few enough to repeat (p_source "phipson-smyth").
    /// Ignored when every relabelling is listed (p_source "exact").
    #[arg(long)]
    pub phipson_smyth: bool,
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
    /// Output folder (created if needed).
    #[arg(long)]
    pub out: PathBuf,
    /// Worker threads [default: all cores].
    #[arg(long)]
    pub threads: Option<usize>,
    /// Memory budget, e.g. 512M or 2G; chunk sizes and sort buffers derive from it.
    #[arg(long, default_value = "1G", value_parser = parse_size)]
    pub memory: u64,
    /// Features per chunk (overrides the size derived from --memory).
    #[arg(long)]
    pub chunk_rows: Option<usize>,
    /// Sample-sheet column with the sample ids.
    #[arg(long, default_value = "sample")]
    pub sample_column: String,
    /// Matrix column with the feature ids.
    #[arg(long, default_value = "feature")]
    pub id_column: String,
    /// Results table format.
    #[arg(long, value_enum, default_value_t = TableFormat::Parquet)]
    pub format: TableFormat,
    /// Also adjust the model-based p-values (columns ending in _param).
    #[arg(long)]
    pub also_param: bool,
    /// Storey's lambda: a number in [0, 1), or "bootstrap".
    #[arg(long, default_value = "0.5", value_parser = parse_lambda)]
    pub storey_lambda: LambdaChoice,
    /// Family-wise error by maxT: step-down (p_maxt and p_maxt_single; adds
    /// a rank-order pass) or single-step only (p_maxt_single).
    #[arg(long, value_enum, default_value_t = MaxtMode::StepDown)]
    pub maxt: MaxtMode,
    /// Also estimate the FDR from the null pooled over all features and
    /// relabelings (columns p_pooled, q_pooled).
    #[arg(long)]
    pub pooled_null: bool,
    /// Tail approximation: features reached by fewer than EXCEED relabelings
    /// (10 when given without a value) get a p-value extrapolated from a
    /// generalized Pareto fit to their largest relabelled statistics
    /// (p_source = tail in the results).
    #[arg(long, value_name = "EXCEED", num_args = 0..=1, default_missing_value = "10")]
    pub tail_fit: Option<u64>,
    /// Features with missing values (NaN, NA, empty cells) are tested on
    /// their observed samples when each group keeps at least this many
    /// (at least 2; for paired tests observed pairs, for trait tests
    /// observed samples, never fewer than 3 there; with covariates also two
    /// residual degrees of freedom in the model refitted on them). Three
    /// keeps two degrees of freedom in each group's variance and more than
    /// one relabelling of the observed values; fewer are reported untested
    /// ("too few observed values").
    #[arg(long, default_value_t = crate::stats::prepare::DEFAULT_MIN_OBSERVED)]
    pub min_observed: usize,
    /// No progress output.
    #[arg(long)]
    pub quiet: bool,
    /// Do not write the run report (<OUT>/report/).
    #[arg(long)]
    pub no_report: bool,
    /// Only shard K of N contiguous feature ranges (K from 1), written as a
    /// shard folder for `riffle merge` [default: from SLURM_ARRAY_TASK_ID
    /// and SLURM_ARRAY_TASK_COUNT inside a Slurm array job].
    #[arg(long, value_parser = crate::shard::ShardSpec::parse)]
    pub shard: Option<crate::shard::ShardSpec>,
    /// Exit at once (status 0) when --out holds a finished run of the same
    /// input contents and result-defining options.
    #[arg(long)]
    pub skip_if_unchanged: bool,
    /// TOML job file holding any of these options (keys: the option names
    /// with dashes); options on the command line override it.
    #[arg(long)]
    pub job: Option<PathBuf>,
    /// Seconds between checkpoints; a killed scan rerun with the same
    /// command continues from the last one.
    #[arg(long, default_value_t = 60.0)]
    pub checkpoint_seconds: f64,
}

#[derive(Args, Debug)]
pub struct MergeArgs {
    /// Shard folders (the --out of each `scan --shard K/N`), in any order.
    #[arg(required = true)]
    pub shards: Vec<PathBuf>,
    /// Output folder for the merged results.
    #[arg(long)]
    pub out: PathBuf,
    #[arg(long, default_value = "1G", value_parser = parse_size)]
    pub memory: u64,
    #[arg(long)]
    pub quiet: bool,
}

#[derive(Args, Debug)]
pub struct DemoArgs {
    /// Output folder for the demo run.
    #[arg(long, default_value = "riffle-demo")]
    pub out: PathBuf,
    #[arg(long)]
    pub threads: Option<usize>,
}

pub fn parse_size(text: &str) -> std::result::Result<u64, String> {
    let t = text.trim();
    let split = t
        .find(|c: char| !(c.is_ascii_digit() || c == '.'))
        .unwrap_or(t.len());
    let (number, unit) = t.split_at(split);
    let value: f64 = number
        .parse()
        .map_err(|_| format!("'{text}' is not a size such as 512M or 2G"))?;
    let factor: f64 = match unit.trim().to_ascii_uppercase().as_str() {
        "" | "B" => 1.0,
        "K" | "KB" | "KIB" => 1024.0,
        "M" | "MB" | "MIB" => 1024.0 * 1024.0,
        "G" | "GB" | "GIB" => 1024.0 * 1024.0 * 1024.0,
        "T" | "TB" | "TIB" => 1024.0f64.powi(4),
        _ => return Err(format!("unknown unit in '{text}'; use K, M, G or T")),
    };
    Ok((value * factor) as u64)
}

pub fn parse_lambda(text: &str) -> std::result::Result<LambdaChoice, String> {
    if text.eq_ignore_ascii_case("bootstrap") {
        return Ok(LambdaChoice::Bootstrap);
    }
    match text.parse::<f64>() {
        Ok(v) if (0.0..1.0).contains(&v) => Ok(LambdaChoice::Fixed(v)),
        _ => Err(format!(
            "'{text}' is neither a number in [0, 1) nor 'bootstrap'"
        )),
    }
}

impl ScanArgs {
    pub fn to_options(&self) -> ScanOptions {
        ScanOptions {
            matrix: self.matrix.clone(),
            samples: self.samples.clone(),
            sample_column: self.sample_column.clone(),
            id_column: self.id_column.clone(),
            group: self.group.clone(),
            levels: self.levels.clone(),
            trait_column: self.trait_column.clone(),
            pair: self.pair.clone(),
            strata: self.strata.clone(),
            covariates: self.covariates.clone(),
            test: self.test,
            side: self.side,
            perms: self.perms,
            seed: self.seed,
            out: self.out.clone(),
            threads: self.threads.unwrap_or_else(scan::default_threads),
            memory_bytes: self.memory,
            chunk_rows: self.chunk_rows,
            format: self.format,
            also_param: self.also_param,
            storey_lambda: self.storey_lambda,
            maxt: self.maxt,
            pooled_null: self.pooled_null,
            min_observed: self.min_observed,
            quiet: self.quiet,
            report: !self.no_report,
            shard: self.shard,
            skip_if_unchanged: self.skip_if_unchanged,
            checkpoint_seconds: self.checkpoint_seconds,
            tail_fit: self.tail_fit,
            stop_after: self.stop_after,
            phipson_smyth: self.phipson_smyth,
        }
    }
}

/// Set by SIGINT/SIGTERM; the pipeline stops at the next chunk.
pub static STOP: AtomicBool = AtomicBool::new(false);

pub fn main_with_args(args: impl IntoIterator<Item = std::ffi::OsString>) -> i32 {
    // A second signal while stopping is ignored; the pipeline checks STOP
    // between chunks and the outputs are only renamed into place when whole.
    let _ = ctrlc::set_handler(|| STOP.store(true, std::sync::atomic::Ordering::Relaxed));
    let args = match crate::job::expand_job_args(args.into_iter().collect()) {
        Ok(args) => args,
        Err(e) => {
            eprintln!("riffle: error: {e}");
            return e.exit_code();
        }
    };
    let cli = match Cli::try_parse_from(args) {
        Ok(cli) => cli,
        Err(e) if e.use_stderr() => {
            eprintln!("riffle: error: {}", clap_error_line(&e));
            return exit_code::BAD_INPUT;
        }
        Err(e) => {
            // --help and --version: clap's own multi-line text on stdout.
            let _ = e.print();
            return exit_code::OK;
        }
    };
    match dispatch(cli) {
        Ok(()) => exit_code::OK,
        Err(e) => {
            eprintln!("riffle: error: {}", error_line(&e));
            e.exit_code()
        }
    }
}

/// One line per error, so that logs of nightly jobs stay greppable: decoder
/// messages from arrow/parquet may span lines.
fn error_line(e: &RiffleError) -> String {
    let mut text = one_line(&e.to_string());
    if let RiffleError::Io { source, .. } = e {
        use std::io::ErrorKind;
        match source.kind() {
            ErrorKind::StorageFull | ErrorKind::FileTooLarge | ErrorKind::QuotaExceeded => text
                .push_str(
                " (the disk, a quota or a file-size limit is full: free space or raise the limit, then rerun)",
            ),
            _ => {}
        }
    }
    text
}

fn one_line(text: &str) -> String {
    text.split_whitespace().collect::<Vec<_>>().join(" ")
}

/// clap's message without its "error: " prefix, usage block and help hint:
/// the lines before the first blank line, joined.
fn clap_error_line(e: &clap::Error) -> String {
    let rendered = e.render().to_string();
    let head: Vec<&str> = rendered
        .lines()
        .take_while(|l| !l.trim().is_empty())
        .collect();
    let text = one_line(&head.join(" "));
    let text = text.strip_prefix("error: ").unwrap_or(&text).to_string();
    format!("{text} (see riffle scan --help)")
}

fn dispatch(cli: Cli) -> Result<()> {
    match cli.command {
        Command::Scan(args) => {
            let two_levels = !args.test.is_k_group();
            if let Some(levels) = args.levels.as_ref().filter(|l| two_levels && l.len() != 2) {
                return Err(RiffleError::options(format!(
                    "--levels takes exactly two levels, A,B, for --test {} (effects are B minus A); found {}: {}",
                    args.test.name(),
                    levels.len(),
                    levels.join(",")
                )));
            }
            let mut options = args.to_options();
            if options.shard.is_none() {
                options.shard = crate::shard::ShardSpec::from_slurm_env()?;
            }
            match scan::run(&options, &STOP)? {
                scan::ScanOutcome::Finished(summary) => {
                    if !options.quiet {
                        eprintln!("{}", crate::demo::summary_text(&summary));
                    }
                }
                scan::ScanOutcome::Shard(record) => {
                    if !options.quiet {
                        eprintln!(
                            "riffle: shard {} (features {}..{} of {}) written to {}; \
                             combine all shards with `riffle merge`",
                            record.shard,
                            record.range.0,
                            record.range.1,
                            record.n_features,
                            options.out.display()
                        );
                    }
                }
                scan::ScanOutcome::Unchanged { fingerprint } => eprintln!(
                    "riffle: {} already holds a finished run of the same inputs and options \
                     (fingerprint {fingerprint}); nothing to do",
                    options.out.display()
                ),
            }
            Ok(())
        }
        Command::Merge(args) => {
            let summary = crate::merge::run_merge(
                &crate::merge::MergeOptions {
                    shards: args.shards,
                    out: args.out,
                    memory_bytes: args.memory,
                    quiet: args.quiet,
                },
                &STOP,
            )?;
            if !args.quiet {
                eprintln!("{}", crate::demo::summary_text(&summary));
            }
            Ok(())
        }
        Command::Demo(args) => crate::demo::run_demo(&args.out, args.threads, &STOP),
        Command::Simulate(args) => crate::simulate::run_simulate(&args),
        Command::Import(args) => crate::input::text::run_import(&args),
        Command::Inspect(args) => crate::inspect::run_inspect(&args),
        Command::Adjust(args) => crate::adjust_table::run_adjust(&args, &STOP),
        Command::Report(args) => {
            let written = crate::report::write_report(&crate::report::ReportOptions {
                run_dir: args.run,
                show_features: args.show_feature,
                fdr: args.fdr,
                out: args.out,
            })?;
            println!("{}", written.html.display());
            Ok(())
        }
    }
}

impl From<clap::Error> for RiffleError {
    fn from(e: clap::Error) -> Self {
        RiffleError::options(e.to_string())
    }
}
