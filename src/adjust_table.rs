//! `riffle adjust`: multiple-testing adjustment of a p-value column of any
//! table (Parquet, Arrow IPC file, CSV or TSV), whatever tool wrote it.
//!
//! Memory stays bounded whatever the number of rows: the p column is read
//! again from the file on every pass of [`multitest::adjust`], whose
//! adjusted rows go, in original order, to a scratch file of fixed-width
//! rows; a last pass streams the input once more and writes every original
//! column unchanged plus the adjusted columns, under a temporary name that
//! is renamed when complete.

use std::borrow::Cow;
use std::fs::File;
use std::io::{BufRead, BufReader, BufWriter, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;

use arrow_array::builder::{Float64Builder, StringBuilder};
use arrow_array::cast::AsArray;
use arrow_array::types::{
    Float16Type, Float32Type, Float64Type, Int16Type, Int32Type, Int64Type, Int8Type, UInt16Type,
    UInt32Type, UInt64Type, UInt8Type,
};
use arrow_array::{Array, ArrayRef, RecordBatch};
use arrow_schema::{ArrowError, DataType, Field, Schema, SchemaRef};
use parquet::arrow::arrow_reader::{
    ArrowReaderMetadata, ArrowReaderOptions, ParquetRecordBatchReaderBuilder,
};
use parquet::arrow::{ArrowWriter, ProjectionMask};
use parquet::basic::{Compression, ZstdLevel};
use parquet::file::properties::WriterProperties;

use crate::columns::{ColumnFileReader, ColumnFileWriter};
use crate::error::{IoContext, Result, RiffleError};
use crate::multitest::{
    self, AdjustOptions, AdjustSummary, LambdaChoice, Method, PValueSource, REJECTION_LEVELS,
};
use crate::spill::temp_name;

/// Rows per batch when riffle chooses the batch size (Parquet input, text
/// to Parquet/Arrow). Fixed, not derived from the memory budget, so that
/// the output bytes do not depend on `--memory`.
const BATCH_ROWS: usize = 8192;

/// Encoded size at which a Parquet output row group is closed; the writer
/// holds one row group in memory. Fixed for the same reason as
/// [`BATCH_ROWS`].
const PARQUET_ROW_GROUP_BYTES: usize = 64 << 20;

/// A record longer than this is almost surely a quote that never closes;
/// without a limit it would pull the rest of the file into memory.
const MAX_RECORD_BYTES: usize = 64 << 20;

/// How often (in rows) long loops look at the stop flag.
const STOP_CHECK_ROWS: u64 = 1 << 16;

/// Table formats `adjust` reads and writes.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum TableKind {
    Parquet,
    /// Arrow IPC file format (.arrow, Feather v2).
    Arrow,
    Tsv,
    Csv,
}

impl TableKind {
    pub fn name(self) -> &'static str {
        match self {
            TableKind::Parquet => "Parquet",
            TableKind::Arrow => "Arrow IPC",
            TableKind::Tsv => "TSV",
            TableKind::Csv => "CSV",
        }
    }

    fn delimiter(self) -> Option<u8> {
        match self {
            TableKind::Tsv => Some(b'\t'),
            TableKind::Csv => Some(b','),
            TableKind::Parquet | TableKind::Arrow => None,
        }
    }
}

#[derive(Debug, Clone)]
pub struct AdjustTableOptions {
    pub input: PathBuf,
    /// Name of the column holding the p-values.
    pub p_column: String,
    pub output: PathBuf,
    /// Output format; the input's when absent.
    pub format: Option<TableKind>,
    /// New columns, in this order.
    pub methods: Vec<Method>,
    pub lambda: LambdaChoice,
    pub memory_bytes: u64,
    /// Scratch files go here; the output's folder when absent.
    pub scratch_dir: Option<PathBuf>,
    pub bootstrap_seed: u64,
}

impl AdjustTableOptions {
    pub fn new(input: &Path, p_column: &str, output: &Path) -> Self {
        let defaults = AdjustOptions::default();
        AdjustTableOptions {
            input: input.to_path_buf(),
            p_column: p_column.to_string(),
            output: output.to_path_buf(),
            format: None,
            methods: defaults.methods,
            lambda: defaults.lambda,
            memory_bytes: 1 << 30,
            scratch_dir: None,
            bootstrap_seed: defaults.bootstrap_seed,
        }
    }
}

#[derive(Debug, Clone)]
pub struct AdjustTableReport {
    pub summary: AdjustSummary,
    pub methods: Vec<Method>,
    pub input: PathBuf,
    pub output: PathBuf,
    pub p_column: String,
    pub input_kind: TableKind,
    pub output_kind: TableKind,
}

/// `riffle adjust` command-line arguments.
#[derive(clap::Args, Debug)]
pub struct AdjustArgs {
    /// Table holding a p-value column: Parquet, Arrow IPC file, CSV or TSV.
    #[arg(long)]
    pub input: PathBuf,
    /// Name of the p-value column.
    #[arg(long)]
    pub pcol: String,
    /// Output table: the input's columns and rows plus one column per method.
    #[arg(long)]
    pub out: PathBuf,
    /// Methods, in output column order: bh, by, storey, holm, hochberg, bonferroni.
    #[arg(
        long,
        value_delimiter = ',',
        value_parser = parse_method,
        default_value = "bh,by,storey,holm,hochberg,bonferroni"
    )]
    pub methods: Vec<Method>,
    /// Storey's lambda: a number in [0, 1), or "bootstrap".
    #[arg(long, default_value = "0.5", value_parser = crate::cli::parse_lambda)]
    pub storey_lambda: LambdaChoice,
    /// Seed of the bootstrap choice of lambda.
    #[arg(long)]
    pub seed: Option<u64>,
    /// Memory budget, e.g. 512M or 2G (the sort of the p-values spills beyond it).
    #[arg(long, default_value = "1G", value_parser = crate::cli::parse_size)]
    pub memory: u64,
    /// Output format [default: the input's].
    #[arg(long, value_enum)]
    pub format: Option<TableKind>,
    /// Folder for scratch files [default: the output's folder].
    #[arg(long)]
    pub scratch_dir: Option<PathBuf>,
    /// No summary on stderr.
    #[arg(long)]
    pub quiet: bool,
}

/// Accepts a method's short name (bh) or its column name (q_bh).
pub fn parse_method(text: &str) -> std::result::Result<Method, String> {
    let wanted = text.trim().to_ascii_lowercase();
    Method::ALL
        .into_iter()
        .find(|m| short_name(*m) == wanted || m.name() == wanted)
        .ok_or_else(|| {
            format!(
                "unknown method '{text}'; choose from bh, by, storey, holm, hochberg, bonferroni"
            )
        })
}

fn short_name(method: Method) -> &'static str {
    match method {
        Method::Bh => "bh",
        Method::By => "by",
        Method::Storey => "storey",
        Method::Holm => "holm",
        Method::Hochberg => "hochberg",
        Method::Bonferroni => "bonferroni",
    }
}

impl AdjustArgs {
    pub fn to_options(&self) -> AdjustTableOptions {
        let mut options = AdjustTableOptions::new(&self.input, &self.pcol, &self.out);
        options.format = self.format;
        options.methods = self.methods.clone();
        options.lambda = self.storey_lambda;
        options.memory_bytes = self.memory;
        options.scratch_dir = self.scratch_dir.clone();
        if let Some(seed) = self.seed {
            options.bootstrap_seed = seed;
        }
        options
    }
}

/// The CLI entry: runs the job and prints the summary unless `--quiet`.
pub fn run_adjust(args: &AdjustArgs, stop: &AtomicBool) -> Result<()> {
    let report = adjust_table(&args.to_options(), stop)?;
    if !args.quiet {
        eprintln!("{}", summary_text(&report));
    }
    Ok(())
}

/// One paragraph for the terminal.
pub fn summary_text(report: &AdjustTableReport) -> String {
    let s = &report.summary;
    let mut text = format!(
        "riffle adjust: column '{}' of {} ({}): m = {} p-values, {} missing (left out of m, \
         adjusted values missing). Output: {} ({}).",
        report.p_column,
        report.input.display(),
        report.input_kind.name(),
        s.m,
        s.n_missing,
        report.output.display(),
        report.output_kind.name(),
    );
    if report.methods.contains(&Method::Storey) && s.m > 0 {
        text.push_str(&format!(
            " Storey pi0 = {:.4} at lambda = {:.2}.",
            s.pi0, s.lambda
        ));
        if s.pi0 == 0.0 {
            text.push_str(" No p-value lies above lambda, so q_storey is left missing.");
        }
    }
    let levels: Vec<String> = REJECTION_LEVELS.iter().map(|l| l.to_string()).collect();
    let counts: Vec<String> = s
        .rejections
        .iter()
        .map(|(method, hits)| {
            let hits: Vec<String> = hits.iter().map(|h| h.to_string()).collect();
            format!("{} {}", method.name(), hits.join(" / "))
        })
        .collect();
    text.push_str(&format!(
        " Adjusted values at or below {}: {}.",
        levels.join(" / "),
        counts.join("; ")
    ));
    if s.used_external_sort {
        text.push_str(
            " The distinct p-values exceeded the memory budget, \
             so they were sorted on scratch files.",
        );
    }
    text.push(' ');
    text.push_str(crate::CAUTION);
    text
}

/// Adjusts the p-value column of `options.input` and writes the table with
/// the new columns to `options.output`.
pub fn adjust_table(options: &AdjustTableOptions, stop: &AtomicBool) -> Result<AdjustTableReport> {
    check_options(options)?;
    let input = InputTable::open(&options.input)?;
    let names = input.column_names();
    let p_index = names
        .iter()
        .position(|n| *n == options.p_column)
        .ok_or_else(|| {
            RiffleError::bad_input(
                &options.input,
                "header",
                format!(
                    "no column named '{}'; the columns are: {}",
                    options.p_column,
                    quoted_list(&names)
                ),
            )
        })?;
    for method in &options.methods {
        if names.iter().any(|n| n == method.name()) {
            return Err(RiffleError::bad_input(
                &options.input,
                "header",
                format!(
                    "a column named '{}' already exists and would be written twice; rename it \
                     in the input or leave out that method with --methods",
                    method.name()
                ),
            ));
        }
    }
    let output_kind = options.format.unwrap_or(input.kind());
    if output_kind.delimiter().is_none() {
        check_column_names_unique(&options.input, &names)?;
    }

    let scratch_dir = match &options.scratch_dir {
        Some(dir) => dir.clone(),
        None => match options.output.parent() {
            Some(parent) if !parent.as_os_str().is_empty() => parent.to_path_buf(),
            _ => PathBuf::from("."),
        },
    };
    let width = options.methods.len();
    let adjusted_path = scratch_dir.join(format!(
        ".riffle-adjusted-{}-{}.bin",
        std::process::id(),
        options
            .output
            .file_name()
            .unwrap_or_default()
            .to_string_lossy()
    ));
    let _adjusted_guard = RemoveOnDrop(adjusted_path.clone());

    // The final pass runs after the adjustment, so the sort may use most of
    // the budget; the rest covers read buffers and the p column's batches.
    let adjust_options = AdjustOptions {
        methods: options.methods.clone(),
        lambda: options.lambda,
        memory_bytes: (options.memory_bytes / 4 * 3) as usize,
        scratch_dir: scratch_dir.clone(),
        bootstrap_seed: options.bootstrap_seed,
    };
    let mut source = input.p_values(p_index, &options.p_column, stop)?;
    let mut adjusted_file = ColumnFileWriter::create(&adjusted_path, width)?;
    let summary = multitest::adjust(source.as_mut(), &adjust_options, &mut |_, row| {
        adjusted_file.push(row)
    })?;
    adjusted_file.finish()?;
    drop(source);

    let mut adjusted = AdjustedRows {
        reader: ColumnFileReader::open(&adjusted_path, width)?,
        width,
        remaining: summary.m + summary.n_missing,
    };
    let new_columns: Vec<String> = options
        .methods
        .iter()
        .map(|m| m.name().to_string())
        .collect();
    let mut output = OutputFile::create(&options.output)?;
    match (&input, output_kind.delimiter()) {
        (InputTable::Text(layout), Some(delimiter)) => text_to_text(
            layout,
            delimiter,
            &new_columns,
            &mut adjusted,
            &mut output,
            stop,
        )?,
        (InputTable::Text(layout), None) => {
            let mut sink =
                BatchSink::create(output_kind, &mut output, layout.schema(&new_columns))?;
            text_to_batches(layout, &mut adjusted, &mut sink, stop)?;
            sink.finish(&mut output)?;
        }
        (_, Some(delimiter)) => batches_to_text(
            &input,
            delimiter,
            &new_columns,
            &mut adjusted,
            &mut output,
            stop,
        )?,
        (_, None) => {
            let schema = with_new_columns(&input.schema(), &new_columns);
            let mut sink = BatchSink::create(output_kind, &mut output, schema)?;
            batches_to_batches(&input, &mut adjusted, &mut sink, stop)?;
            sink.finish(&mut output)?;
        }
    }
    if adjusted.remaining != 0 {
        return Err(changed_while_reading(&options.input));
    }
    output.commit()?;
    Ok(AdjustTableReport {
        summary,
        methods: options.methods.clone(),
        input: options.input.clone(),
        output: options.output.clone(),
        p_column: options.p_column.clone(),
        input_kind: input.kind(),
        output_kind,
    })
}

fn check_options(options: &AdjustTableOptions) -> Result<()> {
    if options.methods.is_empty() {
        return Err(RiffleError::options("no multiple-testing method selected"));
    }
    for (i, method) in options.methods.iter().enumerate() {
        if options.methods[..i].contains(method) {
            return Err(RiffleError::options(format!(
                "method '{}' is asked for twice",
                short_name(*method)
            )));
        }
    }
    let same_file = match (
        std::fs::canonicalize(&options.input),
        std::fs::canonicalize(&options.output),
    ) {
        (Ok(a), Ok(b)) => a == b,
        _ => false,
    };
    if same_file {
        return Err(RiffleError::options(format!(
            "--out {} is the input file; write the output to another file",
            options.output.display()
        )));
    }
    Ok(())
}

fn check_column_names_unique(path: &Path, names: &[String]) -> Result<()> {
    for (i, name) in names.iter().enumerate() {
        if let Some(j) = names[..i].iter().position(|n| n == name) {
            return Err(RiffleError::bad_input(
                path,
                "header",
                format!(
                    "columns {} and {} are both named '{name}', which Parquet and Arrow \
                     outputs cannot hold; rename one",
                    j + 1,
                    i + 1
                ),
            ));
        }
    }
    Ok(())
}

fn quoted_list(names: &[String]) -> String {
    const SHOWN: usize = 40;
    let mut list: Vec<String> = names.iter().take(SHOWN).map(|n| format!("'{n}'")).collect();
    if names.len() > SHOWN {
        list.push(format!("... ({} in all)", names.len()));
    }
    list.join(", ")
}

fn changed_while_reading(path: &Path) -> RiffleError {
    RiffleError::bad_input(
        path,
        "whole file",
        "the number of rows changed between two readings; was the file modified during the run?",
    )
}

fn check_stop(stop: &AtomicBool) -> Result<()> {
    if stop.load(Ordering::Relaxed) {
        Err(RiffleError::Interrupted)
    } else {
        Ok(())
    }
}

struct RemoveOnDrop(PathBuf);

impl Drop for RemoveOnDrop {
    fn drop(&mut self) {
        // A scratch file that cannot be removed is harmless and its name
        // says what it was; the job's own outcome matters more.
        let _ = std::fs::remove_file(&self.0);
    }
}

/// The adjusted rows read back in original order.
struct AdjustedRows {
    reader: ColumnFileReader,
    width: usize,
    remaining: u64,
}

impl AdjustedRows {
    fn next_row(&mut self, row: &mut [f64], input: &Path) -> Result<()> {
        if self.remaining == 0 {
            return Err(changed_while_reading(input));
        }
        self.remaining -= 1;
        self.reader.next_row(row)
    }

    /// `rows` rows, row-major, into `out`.
    fn next_rows(&mut self, rows: usize, out: &mut Vec<f64>, input: &Path) -> Result<()> {
        out.clear();
        out.resize(rows * self.width, f64::NAN);
        for row in out.chunks_exact_mut(self.width.max(1)) {
            self.next_row(row, input)?;
        }
        Ok(())
    }
}

// ---------------------------------------------------------------------------
// Input

enum InputTable {
    Text(TextLayout),
    Parquet {
        path: PathBuf,
        metadata: ArrowReaderMetadata,
    },
    Arrow {
        path: PathBuf,
        schema: SchemaRef,
    },
}

type BatchIter = Box<dyn Iterator<Item = std::result::Result<RecordBatch, ArrowError>>>;

impl InputTable {
    fn open(path: &Path) -> Result<InputTable> {
        let mut file = File::open(path).at(path)?;
        let mut head = [0u8; 8];
        let head_len = crate::input::read_up_to(&mut file, &mut head).at(path)?;
        let head = &head[..head_len];
        if head.starts_with(b"PAR1") || head.starts_with(b"ARROW1") {
            // Also checks the trailer, with its own clear messages.
            return match crate::input::detect_format(path)? {
                crate::input::MatrixFormat::Parquet => {
                    let metadata = guarded(path, "footer", || {
                        ArrowReaderMetadata::load(&file, ArrowReaderOptions::new())
                            .map_err(|e| corrupt(path, "footer", "Parquet", e))
                    })?;
                    Ok(InputTable::Parquet {
                        path: path.to_path_buf(),
                        metadata,
                    })
                }
                crate::input::MatrixFormat::ArrowIpc => {
                    let reader = guarded(path, "footer", || {
                        arrow_ipc::reader::FileReader::try_new_buffered(file, None)
                            .map_err(|e| corrupt(path, "footer", "Arrow IPC", e))
                    })?;
                    Ok(InputTable::Arrow {
                        path: path.to_path_buf(),
                        schema: reader.schema(),
                    })
                }
            };
        }
        if head.starts_with(&[0x1f, 0x8b]) {
            return Err(RiffleError::bad_input(
                path,
                "start of file",
                "the file is gzip-compressed; decompress it first (e.g. gunzip -k)",
            ));
        }
        if head_len == 0 {
            return Err(RiffleError::bad_input(
                path,
                "start of file",
                "the file is empty; expected a table with a header line",
            ));
        }
        TextLayout::open(path).map(InputTable::Text)
    }

    fn kind(&self) -> TableKind {
        match self {
            InputTable::Text(layout) => layout.kind,
            InputTable::Parquet { .. } => TableKind::Parquet,
            InputTable::Arrow { .. } => TableKind::Arrow,
        }
    }

    fn path(&self) -> &Path {
        match self {
            InputTable::Text(layout) => &layout.path,
            InputTable::Parquet { path, .. } | InputTable::Arrow { path, .. } => path,
        }
    }

    fn schema(&self) -> SchemaRef {
        match self {
            InputTable::Text(layout) => layout.schema(&[]),
            InputTable::Parquet { metadata, .. } => metadata.schema().clone(),
            InputTable::Arrow { schema, .. } => schema.clone(),
        }
    }

    fn column_names(&self) -> Vec<String> {
        match self {
            InputTable::Text(layout) => layout.names.clone(),
            _ => self
                .schema()
                .fields()
                .iter()
                .map(|f| f.name().clone())
                .collect(),
        }
    }

    /// Record batches of the whole file, or of one column.
    fn batches(&self, column: Option<usize>) -> Result<BatchIter> {
        match self {
            InputTable::Text(_) => Err(RiffleError::Internal(
                "record batches asked of a text table".into(),
            )),
            InputTable::Parquet { path, metadata } => {
                let file = File::open(path).at(path)?;
                let mut builder =
                    ParquetRecordBatchReaderBuilder::new_with_metadata(file, metadata.clone())
                        .with_batch_size(BATCH_ROWS);
                if let Some(column) = column {
                    builder = builder.with_projection(ProjectionMask::roots(
                        metadata.parquet_schema(),
                        [column],
                    ));
                }
                let reader = guarded(path, "first row group", || {
                    builder
                        .build()
                        .map_err(|e| corrupt(path, "first row group", "Parquet", e))
                })?;
                Ok(Box::new(reader))
            }
            InputTable::Arrow { path, .. } => {
                let file = File::open(path).at(path)?;
                let reader = guarded(path, "footer", || {
                    arrow_ipc::reader::FileReader::try_new_buffered(file, column.map(|c| vec![c]))
                        .map_err(|e| corrupt(path, "footer", "Arrow IPC", e))
                })?;
                Ok(Box::new(reader))
            }
        }
    }

    fn p_values<'a>(
        &'a self,
        column: usize,
        name: &str,
        stop: &'a AtomicBool,
    ) -> Result<Box<dyn PValueSource + 'a>> {
        Ok(match self {
            InputTable::Text(layout) => Box::new(TextPValues {
                layout,
                column,
                name: name.to_string(),
                stop,
                last_line: (u64::MAX, 0),
            }),
            _ => Box::new(BatchPValues {
                table: self,
                column,
                name: name.to_string(),
                stop,
                values: Vec::new(),
            }),
        })
    }
}

fn corrupt(path: &Path, place: &str, format: &str, detail: impl std::fmt::Display) -> RiffleError {
    RiffleError::bad_input(
        path,
        place,
        format!("the {format} file is corrupt or truncated ({detail})"),
    )
}

/// The arrow and parquet decoders can panic on malformed files that their
/// own checks let through; that must reach the user as a bad-input error.
fn guarded<T>(path: &Path, place: &str, work: impl FnOnce() -> Result<T>) -> Result<T> {
    match std::panic::catch_unwind(std::panic::AssertUnwindSafe(work)) {
        Ok(result) => result,
        Err(_) => Err(RiffleError::bad_input(
            path,
            place,
            "the file is corrupt; its decoder failed",
        )),
    }
}

fn next_batch(
    batches: &mut BatchIter,
    path: &Path,
    kind: TableKind,
    first_row: u64,
) -> Result<Option<RecordBatch>> {
    let place = format!("batch from row {}", first_row + 1);
    match guarded(path, &place, || Ok(batches.next()))? {
        None => Ok(None),
        Some(Ok(batch)) => Ok(Some(batch)),
        Some(Err(e)) => Err(corrupt(path, &place, kind.name(), e)),
    }
}

/// Missing markers of text cells: empty, NA, NaN, null (any case).
fn parse_p_text(text: &str) -> Option<f64> {
    let text = text.trim();
    if text.is_empty()
        || text.eq_ignore_ascii_case("na")
        || text.eq_ignore_ascii_case("nan")
        || text.eq_ignore_ascii_case("null")
    {
        return Some(f64::NAN);
    }
    text.parse::<f64>().ok()
}

fn unparseable_p(path: &Path, place: String, text: &str) -> RiffleError {
    RiffleError::bad_input(
        path,
        place,
        format!(
            "expected a p-value in [0, 1] or a missing marker (empty, NA, NaN, null), found '{}'",
            text.trim()
        ),
    )
}

/// Reads the p column of a Parquet or Arrow file, one batch at a time.
struct BatchPValues<'a> {
    table: &'a InputTable,
    column: usize,
    name: String,
    stop: &'a AtomicBool,
    values: Vec<f64>,
}

impl PValueSource for BatchPValues<'_> {
    fn for_each(&mut self, f: &mut dyn FnMut(f64) -> Result<()>) -> Result<()> {
        let path = self.table.path();
        let mut batches = self.table.batches(Some(self.column))?;
        let mut first_row = 0u64;
        while let Some(batch) = next_batch(&mut batches, path, self.table.kind(), first_row)? {
            check_stop(self.stop)?;
            if batch.num_columns() != 1 {
                return Err(RiffleError::Internal(
                    "the p column's projection has several columns".into(),
                ));
            }
            batch_p_values(
                batch.column(0).as_ref(),
                path,
                &self.name,
                first_row,
                &mut self.values,
            )?;
            for &p in &self.values {
                f(p)?;
            }
            first_row += batch.num_rows() as u64;
        }
        Ok(())
    }

    fn location(&self, index: u64) -> (PathBuf, String) {
        (
            self.table.path().to_path_buf(),
            format!("row {}, column '{}'", index + 1, self.name),
        )
    }
}

/// Values of a p column as f64, NaN for null.
fn batch_p_values(
    array: &dyn Array,
    path: &Path,
    name: &str,
    first_row: u64,
    out: &mut Vec<f64>,
) -> Result<()> {
    out.clear();
    macro_rules! numbers {
        ($t:ty) => {{
            let values = array.as_primitive::<$t>();
            out.extend((0..values.len()).map(|i| {
                if values.is_null(i) {
                    f64::NAN
                } else {
                    values.value(i) as f64
                }
            }))
        }};
    }
    macro_rules! texts {
        ($iter:expr) => {{
            for (i, text) in $iter.enumerate() {
                out.push(match text {
                    None => f64::NAN,
                    Some(text) => parse_p_text(text).ok_or_else(|| {
                        unparseable_p(
                            path,
                            format!("row {}, column '{name}'", first_row + i as u64 + 1),
                            text,
                        )
                    })?,
                });
            }
        }};
    }
    match array.data_type() {
        DataType::Float64 => numbers!(Float64Type),
        DataType::Float32 => numbers!(Float32Type),
        DataType::Float16 => {
            let values = array.as_primitive::<Float16Type>();
            out.extend((0..values.len()).map(|i| {
                if values.is_null(i) {
                    f64::NAN
                } else {
                    values.value(i).to_f64()
                }
            }))
        }
        DataType::Int8 => numbers!(Int8Type),
        DataType::Int16 => numbers!(Int16Type),
        DataType::Int32 => numbers!(Int32Type),
        DataType::Int64 => numbers!(Int64Type),
        DataType::UInt8 => numbers!(UInt8Type),
        DataType::UInt16 => numbers!(UInt16Type),
        DataType::UInt32 => numbers!(UInt32Type),
        DataType::UInt64 => numbers!(UInt64Type),
        DataType::Utf8 => texts!(array.as_string::<i32>().iter()),
        DataType::LargeUtf8 => texts!(array.as_string::<i64>().iter()),
        DataType::Utf8View => texts!(array.as_string_view().iter()),
        DataType::Null => out.extend(std::iter::repeat_n(f64::NAN, array.len())),
        other => {
            return Err(RiffleError::bad_input(
                path,
                format!("column '{name}'"),
                format!(
                    "has type {other}; expected floating-point numbers \
                     (or integers, or text holding numbers)"
                ),
            ))
        }
    }
    Ok(())
}

// ---------------------------------------------------------------------------
// Text tables

struct TextLayout {
    path: PathBuf,
    kind: TableKind,
    delimiter: u8,
    names: Vec<String>,
    /// The header record as in the file, with its line ending.
    header: Vec<u8>,
    /// Physical lines the header takes (more than 1 with quoted newlines).
    header_lines: u64,
}

impl TextLayout {
    fn open(path: &Path) -> Result<TextLayout> {
        let file = File::open(path).at(path)?;
        let mut first_line = Vec::new();
        BufReader::new(file)
            .read_until(b'\n', &mut first_line)
            .at(path)?;
        let (kind, delimiter) = if first_line.contains(&b'\t') {
            (TableKind::Tsv, b'\t')
        } else {
            (TableKind::Csv, b',')
        };
        let mut records = RecordReader::open_at(path, delimiter, 0, 0)?;
        if !records.next()? {
            return Err(RiffleError::bad_input(
                path,
                "line 1",
                "the file is empty; expected a header line",
            ));
        }
        let mut names = Vec::with_capacity(records.spans.len());
        for i in 0..records.spans.len() {
            let name = records.field(i);
            let name = std::str::from_utf8(&name).map_err(|_| {
                RiffleError::bad_input(
                    path,
                    format!("line 1, column {}", i + 1),
                    "the header is not valid UTF-8 text",
                )
            })?;
            let name = if i == 0 {
                name.trim_start_matches('\u{feff}')
            } else {
                name
            };
            names.push(name.trim().to_string());
        }
        Ok(TextLayout {
            path: path.to_path_buf(),
            kind,
            delimiter,
            names,
            header: records.record.clone(),
            header_lines: records.line,
        })
    }

    /// Data records, after the header.
    fn records(&self) -> Result<RecordReader> {
        RecordReader::open_at(
            &self.path,
            self.delimiter,
            self.header.len() as u64,
            self.header_lines,
        )
    }

    /// Every text column as a string, then the new float columns.
    fn schema(&self, new_columns: &[String]) -> SchemaRef {
        let mut fields: Vec<Field> = self
            .names
            .iter()
            .map(|n| Field::new(n, DataType::Utf8, false))
            .collect();
        fields.extend(
            new_columns
                .iter()
                .map(|n| Field::new(n, DataType::Float64, true)),
        );
        Arc::new(Schema::new(fields))
    }

    fn place(&self, row: u64, line: u64) -> String {
        format!("row {row} (line {line})")
    }

    /// Checks a data record's field count against the header.
    fn check_fields(&self, records: &RecordReader, row: u64) -> Result<()> {
        if records.spans.len() != self.names.len() {
            return Err(RiffleError::bad_input(
                &self.path,
                self.place(row, records.first_line),
                format!(
                    "expected {} fields as in the header, found {}",
                    self.names.len(),
                    records.spans.len()
                ),
            ));
        }
        Ok(())
    }
}

/// A field of a record: byte range of its content, quotes excluded.
#[derive(Debug, Clone, Copy)]
struct Span {
    start: usize,
    end: usize,
    quoted: bool,
}

/// Reads records: one line each, or several when a quoted field holds
/// line breaks. Fields may be quoted with `"` (a doubled `""` inside is
/// one quote), as in RFC 4180 and as some tools also do in TSV.
struct RecordReader {
    path: PathBuf,
    input: BufReader<File>,
    delimiter: u8,
    /// Physical line number of the last line read.
    line: u64,
    /// First line of the current record.
    first_line: u64,
    /// The current record as in the file, line ending included.
    record: Vec<u8>,
    spans: Vec<Span>,
}

impl RecordReader {
    fn open_at(path: &Path, delimiter: u8, offset: u64, lines_before: u64) -> Result<Self> {
        let mut file = File::open(path).at(path)?;
        file.seek(SeekFrom::Start(offset)).at(path)?;
        Ok(RecordReader {
            path: path.to_path_buf(),
            input: BufReader::with_capacity(1 << 20, file),
            delimiter,
            line: lines_before,
            first_line: lines_before,
            record: Vec::new(),
            spans: Vec::new(),
        })
    }

    /// Reads the next record; false at the end of the file.
    fn next(&mut self) -> Result<bool> {
        self.record.clear();
        if self
            .input
            .read_until(b'\n', &mut self.record)
            .at(&self.path)?
            == 0
        {
            return Ok(false);
        }
        self.line += 1;
        self.first_line = self.line;
        loop {
            let body_len = self.body().len();
            if split_fields(&self.record[..body_len], self.delimiter, &mut self.spans) {
                return Ok(true);
            }
            let read = self
                .input
                .read_until(b'\n', &mut self.record)
                .at(&self.path)?;
            if read == 0 {
                return Err(RiffleError::bad_input(
                    &self.path,
                    format!("line {}", self.first_line),
                    "a quoted field that starts on this line is never closed",
                ));
            }
            self.line += 1;
            if self.record.len() > MAX_RECORD_BYTES {
                return Err(RiffleError::bad_input(
                    &self.path,
                    format!("line {}", self.first_line),
                    format!(
                        "a quoted field that starts on this line runs on for over {} MiB; \
                         is a closing quote missing?",
                        MAX_RECORD_BYTES >> 20
                    ),
                ));
            }
        }
    }

    /// The record without its line ending.
    fn body(&self) -> &[u8] {
        let r = &self.record[..];
        let r = r.strip_suffix(b"\n").unwrap_or(r);
        r.strip_suffix(b"\r").unwrap_or(r)
    }

    fn line_ending(&self) -> &[u8] {
        &self.record[self.body().len()..]
    }

    /// Content of field `i`, quotes removed.
    fn field(&self, i: usize) -> Cow<'_, [u8]> {
        let span = self.spans[i];
        let content = &self.record[span.start..span.end];
        if span.quoted && content.contains(&b'"') {
            let mut unquoted = Vec::with_capacity(content.len());
            let mut bytes = content.iter();
            while let Some(&b) = bytes.next() {
                unquoted.push(b);
                if b == b'"' {
                    // The second quote of a doubled pair.
                    bytes.next();
                }
            }
            Cow::Owned(unquoted)
        } else {
            Cow::Borrowed(content)
        }
    }

    fn field_text(&self, i: usize, place: impl FnOnce() -> String) -> Result<Cow<'_, str>> {
        match self.field(i) {
            Cow::Borrowed(b) => std::str::from_utf8(b).map(Cow::Borrowed),
            Cow::Owned(b) => String::from_utf8(b)
                .map(Cow::Owned)
                .map_err(|e| e.utf8_error()),
        }
        .map_err(|_| {
            RiffleError::bad_input(&self.path, place(), "the cell is not valid UTF-8 text")
        })
    }
}

/// Splits a record (line ending removed) into fields; false when a quoted
/// field is still open at the end, i.e. the record goes on on the next line.
fn split_fields(body: &[u8], delimiter: u8, spans: &mut Vec<Span>) -> bool {
    spans.clear();
    let find = |from: usize, byte: u8| {
        body[from..]
            .iter()
            .position(|&b| b == byte)
            .map(|k| from + k)
    };
    let mut start = 0;
    loop {
        if body.get(start) == Some(&b'"') {
            let content = start + 1;
            let mut at = content;
            let close = loop {
                match find(at, b'"') {
                    None => return false,
                    Some(q) if body.get(q + 1) == Some(&b'"') => at = q + 2,
                    Some(q) => break q,
                }
            };
            spans.push(Span {
                start: content,
                end: close,
                quoted: true,
            });
            // Stray text between the closing quote and the delimiter is
            // tolerated and dropped, as most readers do.
            match find(close + 1, delimiter) {
                Some(d) => start = d + 1,
                None => return true,
            }
        } else {
            match find(start, delimiter) {
                Some(d) => {
                    spans.push(Span {
                        start,
                        end: d,
                        quoted: false,
                    });
                    start = d + 1;
                }
                None => {
                    spans.push(Span {
                        start,
                        end: body.len(),
                        quoted: false,
                    });
                    return true;
                }
            }
        }
    }
}

/// Reads the p field of every data record. Blank lines are not rows: they
/// are skipped here and copied through unchanged to text outputs.
struct TextPValues<'a> {
    layout: &'a TextLayout,
    column: usize,
    name: String,
    stop: &'a AtomicBool,
    /// (row index, line) of the last row read, for [`PValueSource::location`].
    last_line: (u64, u64),
}

impl PValueSource for TextPValues<'_> {
    fn for_each(&mut self, f: &mut dyn FnMut(f64) -> Result<()>) -> Result<()> {
        let layout = self.layout;
        let mut records = layout.records()?;
        let mut index = 0u64;
        while records.next()? {
            if records.body().is_empty() {
                continue;
            }
            if index.is_multiple_of(STOP_CHECK_ROWS) {
                check_stop(self.stop)?;
            }
            layout.check_fields(&records, index + 1)?;
            self.last_line = (index, records.first_line);
            let place = || {
                format!(
                    "{}, column '{}'",
                    layout.place(index + 1, records.first_line),
                    self.name
                )
            };
            let text = records.field_text(self.column, place)?;
            let p =
                parse_p_text(&text).ok_or_else(|| unparseable_p(&layout.path, place(), &text))?;
            f(p)?;
            index += 1;
        }
        Ok(())
    }

    fn location(&self, index: u64) -> (PathBuf, String) {
        let place = if self.last_line.0 == index {
            self.layout.place(index + 1, self.last_line.1)
        } else {
            format!("row {}", index + 1)
        };
        (
            self.layout.path.clone(),
            format!("{place}, column '{}'", self.name),
        )
    }
}

// ---------------------------------------------------------------------------
// Output

/// The output under its temporary name until [`OutputFile::commit`];
/// removed if the job fails before that.
struct OutputFile {
    path: PathBuf,
    temp: PathBuf,
    out: Option<BufWriter<File>>,
    committed: bool,
}

impl OutputFile {
    fn create(path: &Path) -> Result<Self> {
        let temp = temp_name(path);
        let file = File::create(&temp).at(&temp)?;
        Ok(OutputFile {
            path: path.to_path_buf(),
            temp,
            out: Some(BufWriter::with_capacity(1 << 20, file)),
            committed: false,
        })
    }

    fn writer(&mut self) -> Result<&mut BufWriter<File>> {
        self.out
            .as_mut()
            .ok_or_else(|| RiffleError::Internal("output already handed over".into()))
    }

    fn write(&mut self, bytes: &[u8]) -> Result<()> {
        let temp = self.temp.clone();
        self.writer()?.write_all(bytes).at(&temp)
    }

    fn take(&mut self) -> Result<BufWriter<File>> {
        self.out
            .take()
            .ok_or_else(|| RiffleError::Internal("output already handed over".into()))
    }

    fn give_back(&mut self, out: BufWriter<File>) {
        self.out = Some(out);
    }

    fn commit(mut self) -> Result<()> {
        let out = self.take()?;
        let file = out
            .into_inner()
            .map_err(|e| RiffleError::io(&self.temp, e.into_error()))?;
        file.sync_all().at(&self.temp)?;
        std::fs::rename(&self.temp, &self.path).at(&self.path)?;
        self.committed = true;
        Ok(())
    }
}

impl Drop for OutputFile {
    fn drop(&mut self) {
        if !self.committed {
            let _ = std::fs::remove_file(&self.temp);
        }
    }
}

struct BatchSink {
    writer: BatchWriter,
    schema: SchemaRef,
    /// The output's temporary name, for error messages.
    temp: PathBuf,
}

enum BatchWriter {
    Parquet(ArrowWriter<BufWriter<File>>),
    Arrow(arrow_ipc::writer::FileWriter<BufWriter<File>>),
}

impl BatchSink {
    fn create(kind: TableKind, output: &mut OutputFile, schema: SchemaRef) -> Result<Self> {
        let out = output.take()?;
        let temp = output.temp.clone();
        let failed = |e: ArrowError| RiffleError::io(&temp, std::io::Error::other(e));
        let writer = match kind {
            TableKind::Parquet => {
                let props = WriterProperties::builder()
                    .set_compression(Compression::ZSTD(
                        ZstdLevel::try_new(3)
                            .map_err(|e| RiffleError::Internal(format!("zstd level: {e}")))?,
                    ))
                    .set_max_row_group_bytes(Some(PARQUET_ROW_GROUP_BYTES))
                    .set_created_by(format!("riffle {}", env!("CARGO_PKG_VERSION")))
                    .build();
                BatchWriter::Parquet(
                    ArrowWriter::try_new(out, schema.clone(), Some(props))
                        .map_err(|e| RiffleError::io(&temp, std::io::Error::other(e)))?,
                )
            }
            TableKind::Arrow => BatchWriter::Arrow(
                arrow_ipc::writer::FileWriter::try_new(out, &schema).map_err(failed)?,
            ),
            TableKind::Tsv | TableKind::Csv => {
                return Err(RiffleError::Internal(
                    "batch sink asked for a text format".into(),
                ))
            }
        };
        Ok(BatchSink {
            writer,
            schema,
            temp,
        })
    }

    fn write(&mut self, columns: Vec<ArrayRef>) -> Result<()> {
        let batch = RecordBatch::try_new(self.schema.clone(), columns)
            .map_err(|e| RiffleError::Internal(format!("output batch: {e}")))?;
        let written = match &mut self.writer {
            BatchWriter::Parquet(writer) => writer.write(&batch).map_err(|e| e.to_string()),
            BatchWriter::Arrow(writer) => writer.write(&batch).map_err(|e| e.to_string()),
        };
        written.map_err(|e| RiffleError::io(&self.temp, std::io::Error::other(e)))
    }

    fn finish(self, output: &mut OutputFile) -> Result<()> {
        let temp = self.temp;
        let failed = |e: String| RiffleError::io(&temp, std::io::Error::other(e));
        let out = match self.writer {
            BatchWriter::Parquet(writer) => {
                writer.into_inner().map_err(|e| failed(e.to_string()))?
            }
            BatchWriter::Arrow(mut writer) => {
                writer.finish().map_err(|e| failed(e.to_string()))?;
                writer.into_inner().map_err(|e| failed(e.to_string()))?
            }
        };
        output.give_back(out);
        Ok(())
    }
}

fn with_new_columns(schema: &Schema, new_columns: &[String]) -> SchemaRef {
    let mut fields: Vec<Arc<Field>> = schema.fields().iter().cloned().collect();
    fields.extend(
        new_columns
            .iter()
            .map(|n| Arc::new(Field::new(n, DataType::Float64, true))),
    );
    Arc::new(Schema::new_with_metadata(fields, schema.metadata().clone()))
}

/// One Float64 array per method from row-major adjusted rows; NaN -> null.
fn adjusted_arrays(rows: &[f64], width: usize) -> Vec<ArrayRef> {
    let n = rows.len() / width.max(1);
    (0..width)
        .map(|k| {
            let mut builder = Float64Builder::with_capacity(n);
            for row in rows.chunks_exact(width) {
                let v = row[k];
                if v.is_nan() {
                    builder.append_null();
                } else {
                    builder.append_value(v);
                }
            }
            Arc::new(builder.finish()) as ArrayRef
        })
        .collect()
}

/// Appends the adjusted cells (shortest text that reads back as the same
/// double; NA when missing) to a text line.
fn push_adjusted_cells(line: &mut Vec<u8>, delimiter: u8, row: &[f64]) {
    use std::io::Write as _;
    for &v in row {
        line.push(delimiter);
        if v.is_nan() {
            line.extend_from_slice(b"NA");
        } else {
            let _ = write!(line, "{v}");
        }
    }
}

/// Writes a cell, quoted (RFC 4180 style) when it holds the delimiter, a
/// quote or a line break.
fn push_text_cell(line: &mut Vec<u8>, delimiter: u8, cell: &[u8]) {
    if cell
        .iter()
        .any(|&b| b == delimiter || b == b'"' || b == b'\n' || b == b'\r')
    {
        line.push(b'"');
        for &b in cell {
            if b == b'"' {
                line.push(b'"');
            }
            line.push(b);
        }
        line.push(b'"');
    } else {
        line.extend_from_slice(cell);
    }
}

fn text_to_text(
    layout: &TextLayout,
    delimiter: u8,
    new_columns: &[String],
    adjusted: &mut AdjustedRows,
    output: &mut OutputFile,
    stop: &AtomicBool,
) -> Result<()> {
    let same_delimiter = delimiter == layout.delimiter;
    let mut records = layout.records()?;
    let mut line = Vec::new();
    let mut row = vec![0.0f64; adjusted.width];

    // Header: the original record, then the new names.
    let mut header_reader = RecordReader::open_at(&layout.path, layout.delimiter, 0, 0)?;
    header_reader.next()?;
    write_record(&header_reader, same_delimiter, delimiter, &mut line);
    for name in new_columns {
        line.push(delimiter);
        push_text_cell(&mut line, delimiter, name.as_bytes());
    }
    line.extend_from_slice(line_ending_or_newline(header_reader.line_ending()));
    output.write(&line)?;
    drop(header_reader);

    let mut index = 0u64;
    while records.next()? {
        if records.body().is_empty() {
            output.write(&records.record)?;
            continue;
        }
        if index.is_multiple_of(STOP_CHECK_ROWS) {
            check_stop(stop)?;
        }
        index += 1;
        layout.check_fields(&records, index)?;
        adjusted.next_row(&mut row, &layout.path)?;
        line.clear();
        write_record(&records, same_delimiter, delimiter, &mut line);
        push_adjusted_cells(&mut line, delimiter, &row);
        line.extend_from_slice(records.line_ending());
        output.write(&line)?;
    }
    Ok(())
}

/// The record's body as in the file when the delimiter is kept, else its
/// fields re-encoded for the other delimiter.
fn write_record(records: &RecordReader, same_delimiter: bool, delimiter: u8, line: &mut Vec<u8>) {
    line.clear();
    if same_delimiter {
        line.extend_from_slice(records.body());
        return;
    }
    for i in 0..records.spans.len() {
        if i > 0 {
            line.push(delimiter);
        }
        push_text_cell(line, delimiter, &records.field(i));
    }
}

fn line_ending_or_newline(ending: &[u8]) -> &[u8] {
    if ending.is_empty() {
        b"\n"
    } else {
        ending
    }
}

fn text_to_batches(
    layout: &TextLayout,
    adjusted: &mut AdjustedRows,
    sink: &mut BatchSink,
    stop: &AtomicBool,
) -> Result<()> {
    let mut records = layout.records()?;
    let n_fields = layout.names.len();
    let mut builders: Vec<StringBuilder> = (0..n_fields).map(|_| StringBuilder::new()).collect();
    let mut rows = 0usize;
    let mut index = 0u64;
    let mut adjusted_rows = Vec::new();
    let mut flush = |builders: &mut Vec<StringBuilder>,
                     rows: &mut usize,
                     sink: &mut BatchSink,
                     adjusted: &mut AdjustedRows|
     -> Result<()> {
        if *rows == 0 {
            return Ok(());
        }
        adjusted.next_rows(*rows, &mut adjusted_rows, &layout.path)?;
        let mut columns: Vec<ArrayRef> = builders
            .iter_mut()
            .map(|b| Arc::new(b.finish()) as ArrayRef)
            .collect();
        columns.extend(adjusted_arrays(&adjusted_rows, adjusted.width));
        *rows = 0;
        sink.write(columns)
    };
    while records.next()? {
        if records.body().is_empty() {
            continue;
        }
        if index.is_multiple_of(STOP_CHECK_ROWS) {
            check_stop(stop)?;
        }
        index += 1;
        layout.check_fields(&records, index)?;
        for (i, builder) in builders.iter_mut().enumerate() {
            let text = records.field_text(i, || {
                format!(
                    "{}, column '{}'",
                    layout.place(index, records.first_line),
                    layout.names[i]
                )
            })?;
            builder.append_value(text);
        }
        rows += 1;
        if rows == BATCH_ROWS {
            flush(&mut builders, &mut rows, sink, adjusted)?;
        }
    }
    flush(&mut builders, &mut rows, sink, adjusted)
}

fn batches_to_batches(
    input: &InputTable,
    adjusted: &mut AdjustedRows,
    sink: &mut BatchSink,
    stop: &AtomicBool,
) -> Result<()> {
    let path = input.path();
    let mut batches = input.batches(None)?;
    let mut first_row = 0u64;
    let mut adjusted_rows = Vec::new();
    while let Some(batch) = next_batch(&mut batches, path, input.kind(), first_row)? {
        check_stop(stop)?;
        adjusted.next_rows(batch.num_rows(), &mut adjusted_rows, path)?;
        let mut columns: Vec<ArrayRef> = batch.columns().to_vec();
        columns.extend(adjusted_arrays(&adjusted_rows, adjusted.width));
        sink.write(columns)?;
        first_row += batch.num_rows() as u64;
    }
    Ok(())
}

fn batches_to_text(
    input: &InputTable,
    delimiter: u8,
    new_columns: &[String],
    adjusted: &mut AdjustedRows,
    output: &mut OutputFile,
    stop: &AtomicBool,
) -> Result<()> {
    let path = input.path();
    let schema = input.schema();
    for field in schema.fields() {
        if !text_convertible(field.data_type()) {
            return Err(RiffleError::options(format!(
                "column '{}' of {} has type {}, which riffle cannot write as text; \
                 keep the input's format (leave out --format)",
                field.name(),
                path.display(),
                field.data_type()
            )));
        }
    }
    let mut line = Vec::new();
    let names = schema
        .fields()
        .iter()
        .map(|f| f.name().as_str())
        .chain(new_columns.iter().map(String::as_str));
    for (i, name) in names.enumerate() {
        if i > 0 {
            line.push(delimiter);
        }
        push_text_cell(&mut line, delimiter, name.as_bytes());
    }
    line.push(b'\n');
    output.write(&line)?;

    let mut batches = input.batches(None)?;
    let mut first_row = 0u64;
    let mut adjusted_rows = Vec::new();
    let mut cell = String::new();
    while let Some(batch) = next_batch(&mut batches, path, input.kind(), first_row)? {
        check_stop(stop)?;
        adjusted.next_rows(batch.num_rows(), &mut adjusted_rows, path)?;
        for (r, row) in adjusted_rows
            .chunks_exact(adjusted.width)
            .enumerate()
            .take(batch.num_rows())
        {
            line.clear();
            for (c, column) in batch.columns().iter().enumerate() {
                if c > 0 {
                    line.push(delimiter);
                }
                cell.clear();
                format_cell(column.as_ref(), r, &mut cell);
                push_text_cell(&mut line, delimiter, cell.as_bytes());
            }
            push_adjusted_cells(&mut line, delimiter, row);
            line.push(b'\n');
            output.write(&line)?;
        }
        first_row += batch.num_rows() as u64;
    }
    Ok(())
}

fn text_convertible(data_type: &DataType) -> bool {
    matches!(
        data_type,
        DataType::Null
            | DataType::Boolean
            | DataType::Int8
            | DataType::Int16
            | DataType::Int32
            | DataType::Int64
            | DataType::UInt8
            | DataType::UInt16
            | DataType::UInt32
            | DataType::UInt64
            | DataType::Float16
            | DataType::Float32
            | DataType::Float64
            | DataType::Utf8
            | DataType::LargeUtf8
            | DataType::Utf8View
    )
}

/// Text of one cell of the types [`text_convertible`] accepts; NA for null.
fn format_cell(array: &dyn Array, row: usize, out: &mut String) {
    use std::fmt::Write as _;
    if array.is_null(row) {
        out.push_str("NA");
        return;
    }
    macro_rules! number {
        ($t:ty) => {{
            let _ = write!(out, "{}", array.as_primitive::<$t>().value(row));
        }};
    }
    match array.data_type() {
        DataType::Boolean => out.push_str(if array.as_boolean().value(row) {
            "true"
        } else {
            "false"
        }),
        DataType::Int8 => number!(Int8Type),
        DataType::Int16 => number!(Int16Type),
        DataType::Int32 => number!(Int32Type),
        DataType::Int64 => number!(Int64Type),
        DataType::UInt8 => number!(UInt8Type),
        DataType::UInt16 => number!(UInt16Type),
        DataType::UInt32 => number!(UInt32Type),
        DataType::UInt64 => number!(UInt64Type),
        DataType::Float16 => number!(Float16Type),
        DataType::Float32 => number!(Float32Type),
        DataType::Float64 => number!(Float64Type),
        DataType::Utf8 => out.push_str(array.as_string::<i32>().value(row)),
        DataType::LargeUtf8 => out.push_str(array.as_string::<i64>().value(row)),
        DataType::Utf8View => out.push_str(array.as_string_view().value(row)),
        _ => out.push_str("NA"),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn fields(body: &str, delimiter: u8) -> Option<Vec<String>> {
        let mut spans = Vec::new();
        if !split_fields(body.as_bytes(), delimiter, &mut spans) {
            return None;
        }
        Some(
            spans
                .iter()
                .map(|s| body[s.start..s.end].to_string())
                .collect(),
        )
    }

    // Quoting rules of RFC 4180 (common practice, no single source for the
    // tolerance of quotes in TSV).
    #[test]
    fn splits_quoted_and_plain_fields() {
        assert_eq!(
            fields("a,b,,c", b','),
            Some(vec!["a".into(), "b".into(), "".into(), "c".into()])
        );
        assert_eq!(
            fields("\"x,y\",2", b','),
            Some(vec!["x,y".into(), "2".into()])
        );
        assert_eq!(
            fields("\"say \"\"hi\"\"\",2", b','),
            Some(vec!["say \"\"hi\"\"".into(), "2".into()])
        );
        assert_eq!(fields("a,", b','), Some(vec!["a".into(), "".into()]));
        assert_eq!(fields("\"open,", b','), None);
        assert_eq!(
            fields("a,b\tc", b'\t'),
            Some(vec!["a,b".into(), "c".into()])
        );
    }

    #[test]
    fn missing_markers_and_numbers() {
        for missing in ["", " ", "NA", "na", "NaN", "nan", "null", "NULL"] {
            assert!(parse_p_text(missing).unwrap().is_nan(), "{missing:?}");
        }
        assert_eq!(parse_p_text(" 0.25 "), Some(0.25));
        assert_eq!(parse_p_text("1e-300"), Some(1e-300));
        assert_eq!(parse_p_text("abc"), None);
    }

    #[test]
    fn methods_by_short_or_column_name() {
        assert_eq!(parse_method("bh"), Ok(Method::Bh));
        assert_eq!(parse_method("P_HOLM"), Ok(Method::Holm));
        assert!(parse_method("fdr").is_err());
    }
}
