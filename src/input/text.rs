//! Text import: tab-, comma- or semicolon-separated matrices, plain or
//! gzipped, in either orientation, streamed into an Arrow IPC or Parquet
//! matrix with one row per feature.
//!
//! Memory stays bounded whatever the file size. With one row per feature the
//! file is converted in one streaming pass. With one row per sample, the
//! first pass validates every cell and counts the samples; if the whole
//! matrix fits in half of the memory budget it is transposed in memory,
//! otherwise further passes each re-read (and re-decompress) the file and
//! collect a band of feature columns that fits, writing those features as
//! rows. The output layout (rows per batch) depends only on the matrix
//! shape, so the bytes written do not depend on the memory budget.

use std::collections::HashMap;
use std::fs::File;
use std::hash::{BuildHasherDefault, Hash, Hasher};
use std::io::{BufRead, BufReader, Read, Seek};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};

use clap::Args;

use super::{create_matrix_writer, MatrixFormat, ValueType};
use crate::error::{IoContext, Result, RiffleError};

#[derive(Args, Debug, Clone)]
pub struct ImportArgs {
    /// Text matrix: tab-, comma- or semicolon-separated, optionally gzipped.
    #[arg(long)]
    pub input: PathBuf,
    /// Output matrix (.arrow or .parquet).
    #[arg(long)]
    pub out: PathBuf,
    /// Output format [default: from the output file's extension].
    #[arg(long, value_enum)]
    pub format: Option<ImportFormat>,
    /// The file has one row per sample and one column per feature.
    #[arg(long)]
    pub features_in_columns: bool,
    /// Name of the feature id column written to the output.
    #[arg(long, default_value = "feature")]
    pub id_column: String,
    /// Store values as 64-bit floats (default: 32-bit).
    #[arg(long)]
    pub f64: bool,
    /// Memory budget for transposing, e.g. 512M or 2G.
    #[arg(long, default_value = "1G", value_parser = crate::cli::parse_size)]
    pub memory: u64,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum ImportFormat {
    Arrow,
    Parquet,
}

#[derive(Debug, Clone)]
pub struct ImportOptions {
    pub input: PathBuf,
    pub output: PathBuf,
    /// `None`: chosen from the output file's extension.
    pub format: Option<MatrixFormat>,
    pub features_in_columns: bool,
    pub id_column: String,
    pub value_type: ValueType,
    pub memory_bytes: u64,
}

impl ImportOptions {
    pub fn new(input: &Path, output: &Path) -> Self {
        ImportOptions {
            input: input.to_path_buf(),
            output: output.to_path_buf(),
            format: None,
            features_in_columns: false,
            id_column: "feature".into(),
            value_type: ValueType::F32,
            memory_bytes: 1 << 30,
        }
    }
}

#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ImportSummary {
    pub output: PathBuf,
    pub format: MatrixFormat,
    pub gzip: bool,
    pub delimiter: u8,
    pub features: u64,
    pub samples: usize,
    pub missing_values: u64,
    /// Times the input was read from start to end.
    pub passes: usize,
}

pub fn run_import(args: &ImportArgs) -> Result<()> {
    let options = ImportOptions {
        input: args.input.clone(),
        output: args.out.clone(),
        format: args.format.map(|f| match f {
            ImportFormat::Arrow => MatrixFormat::ArrowIpc,
            ImportFormat::Parquet => MatrixFormat::Parquet,
        }),
        features_in_columns: args.features_in_columns,
        id_column: args.id_column.clone(),
        value_type: if args.f64 {
            ValueType::F64
        } else {
            ValueType::F32
        },
        memory_bytes: args.memory,
    };
    let s = import_text_until(&options, &crate::cli::STOP)?;
    eprintln!(
        "riffle import: {} features x {} samples ({} missing values) from {} ({}{}-separated) \
         to {} ({}, {}), {} pass(es) over the input",
        s.features,
        s.samples,
        s.missing_values,
        options.input.display(),
        if s.gzip { "gzip, " } else { "" },
        delimiter_name(s.delimiter),
        s.output.display(),
        match s.format {
            MatrixFormat::ArrowIpc => "Arrow IPC",
            MatrixFormat::Parquet => "Parquet",
        },
        match options.value_type {
            ValueType::F32 => "f32",
            ValueType::F64 => "f64",
        },
        s.passes
    );
    Ok(())
}

fn delimiter_name(delimiter: u8) -> &'static str {
    match delimiter {
        b'\t' => "tab",
        b',' => "comma",
        _ => "semicolon",
    }
}

/// Convert a text matrix to a binary one; on any error no output is left.
pub fn import_text(options: &ImportOptions) -> Result<ImportSummary> {
    import_text_until(options, &AtomicBool::new(false))
}

/// As [`import_text`], giving up with `Interrupted` soon after `stop` is set.
pub fn import_text_until(options: &ImportOptions, stop: &AtomicBool) -> Result<ImportSummary> {
    let format = match options.format {
        Some(f) => f,
        None => format_from_extension(&options.output)?,
    };
    if options.id_column.is_empty() {
        return Err(RiffleError::options("the id column name must not be empty"));
    }
    if options.features_in_columns {
        import_features_in_columns(options, format, stop)
    } else {
        import_features_in_rows(options, format, stop)
    }
}

fn format_from_extension(path: &Path) -> Result<MatrixFormat> {
    let extension = path
        .extension()
        .and_then(|e| e.to_str())
        .map(str::to_ascii_lowercase);
    match extension.as_deref() {
        Some("arrow" | "feather" | "ipc") => Ok(MatrixFormat::ArrowIpc),
        Some("parquet" | "pq") => Ok(MatrixFormat::Parquet),
        _ => Err(RiffleError::options(format!(
            "{}: cannot tell the output format from the extension; name it .arrow or \
             .parquet, or give --format arrow|parquet",
            path.display()
        ))),
    }
}

/// Rows per record batch / row group: about 4 Mi values per batch, so the
/// writer's buffers stay near 32 MiB however wide the matrix is.
fn rows_per_batch(n_samples: usize) -> usize {
    ((1usize << 22) / n_samples.max(1)).clamp(1, 65_536)
}

/// Rows handed to the writer at a time (it copies them).
fn rows_per_block(n_samples: usize) -> usize {
    ((1usize << 20) / n_samples.max(1)).clamp(1, 4096)
}

const GZIP_MAGIC: [u8; 2] = [0x1f, 0x8b];
const READ_BUFFER: usize = 1 << 20;
const SHOWN_TEXT: usize = 40;

/// One pass over a text table: the header, then data rows one at a time.
struct TextTable {
    path: PathBuf,
    gzip: bool,
    delimiter: u8,
    reader: csv::Reader<Box<dyn Read + Send>>,
    /// Trimmed header cells; a leading byte-order mark is dropped.
    header: Vec<String>,
    record: csv::ByteRecord,
    line: u64,
}

impl TextTable {
    fn open(path: &Path) -> Result<Self> {
        let mut file = File::open(path).at(path)?;
        let mut magic = [0u8; 2];
        let magic_len = super::read_up_to(&mut file, &mut magic).at(path)?;
        file.rewind().at(path)?;
        let gzip = magic_len == 2 && magic == GZIP_MAGIC;
        let raw: Box<dyn Read + Send> = if gzip {
            Box::new(flate2::read::MultiGzDecoder::new(BufReader::with_capacity(
                READ_BUFFER,
                file,
            )))
        } else {
            Box::new(file)
        };
        let mut buffered = BufReader::with_capacity(READ_BUFFER, raw);

        let head = buffered
            .fill_buf()
            .map_err(|e| read_failure(path, gzip, 1, e))?;
        if head.is_empty() {
            return Err(RiffleError::bad_input(
                path,
                "line 1, column 1",
                "the file is empty; expected a header line with the id column name, then \
                 one name per column",
            ));
        }
        let probe = &head[..head.len().min(512)];
        if probe
            .iter()
            .any(|&b| b < 0x20 && !matches!(b, b'\t' | b'\n' | b'\r'))
        {
            return Err(RiffleError::bad_input(
                path,
                "line 1, column 1",
                "this is not a text table (it holds binary bytes); riffle import reads tab-, \
                 comma- or semicolon-separated text, optionally gzipped",
            ));
        }
        let mut header_line = Vec::new();
        buffered
            .read_until(b'\n', &mut header_line)
            .map_err(|e| read_failure(path, gzip, 1, e))?;
        let delimiter = if header_line.contains(&b'\t') {
            b'\t'
        } else if header_line.contains(&b',') {
            b','
        } else if header_line.contains(&b';') {
            b';'
        } else {
            return Err(RiffleError::bad_input(
                path,
                "line 1, column 1",
                "the header line has a single column; expected the id column name then one \
                 name per column, separated by tabs, commas or semicolons",
            ));
        };
        let stream: Box<dyn Read + Send> =
            Box::new(std::io::Cursor::new(header_line).chain(buffered));
        let reader = csv::ReaderBuilder::new()
            .has_headers(false)
            .flexible(true)
            .delimiter(delimiter)
            .buffer_capacity(READ_BUFFER)
            .from_reader(stream);
        let mut table = TextTable {
            path: path.to_path_buf(),
            gzip,
            delimiter,
            reader,
            header: Vec::new(),
            record: csv::ByteRecord::new(),
            line: 1,
        };
        if !table.read_record()? {
            return Err(RiffleError::bad_input(
                path,
                "line 1, column 1",
                "the file is empty; expected a header line",
            ));
        }
        let mut header = Vec::with_capacity(table.record.len());
        for (index, cell) in table.record.iter().enumerate() {
            let cell = if index == 0 {
                cell.strip_prefix("\u{feff}".as_bytes()).unwrap_or(cell)
            } else {
                cell
            };
            let text = std::str::from_utf8(cell).map_err(|_| {
                RiffleError::bad_input(
                    path,
                    format!("line 1, column {}", index + 1),
                    "the column name is not UTF-8 text",
                )
            })?;
            header.push(text.trim().to_string());
        }
        table.header = header;
        Ok(table)
    }

    fn read_record(&mut self) -> Result<bool> {
        match self.reader.read_byte_record(&mut self.record) {
            Ok(more) => {
                if let Some(position) = self.record.position() {
                    self.line = position.line();
                }
                Ok(more)
            }
            Err(e) => {
                let line = e
                    .position()
                    .map(|p| p.line())
                    .unwrap_or(self.line.saturating_add(1));
                match e.into_kind() {
                    csv::ErrorKind::Io(io) => Err(read_failure(&self.path, self.gzip, line, io)),
                    other => Err(RiffleError::bad_input(
                        &self.path,
                        format!("line {line}"),
                        format!("unreadable row: {other:?}"),
                    )),
                }
            }
        }
    }

    /// Advance to the next data row, skipping blank lines; checks its width.
    fn next_row(&mut self) -> Result<bool> {
        loop {
            if !self.read_record()? {
                return Ok(false);
            }
            if self.record.iter().all(|c| c.trim_ascii().is_empty()) {
                continue;
            }
            let (expected, found) = (self.header.len(), self.record.len());
            if found != expected {
                let column = found.min(expected) + 1;
                let what = if found < expected {
                    format!("column {column} ('{}') is missing", self.header[column - 1])
                } else {
                    format!("column {column} lies beyond the header")
                };
                return Err(RiffleError::bad_input(
                    &self.path,
                    format!("line {}, column {column}", self.line),
                    format!("expected {expected} cells as in the header, found {found} ({what})"),
                ));
            }
            return Ok(true);
        }
    }

    fn place(&self, column: usize) -> String {
        format!(
            "line {}, column {} ('{}')",
            self.line,
            column + 1,
            self.header[column]
        )
    }

    /// The row's id (first cell), trimmed; must be non-empty UTF-8.
    fn row_id(&self) -> Result<&str> {
        let cell = self.record.get(0).unwrap_or_default();
        let text = std::str::from_utf8(cell)
            .map_err(|_| RiffleError::bad_input(&self.path, self.place(0), "the id is not UTF-8"))?
            .trim();
        if text.is_empty() {
            return Err(RiffleError::bad_input(
                &self.path,
                self.place(0),
                "empty id; every row needs an id in its first cell",
            ));
        }
        Ok(text)
    }

    fn value(&self, column: usize, value_type: ValueType) -> Result<f64> {
        let cell = self.record.get(column).unwrap_or_default();
        parse_value(cell, value_type)
            .map_err(|message| RiffleError::bad_input(&self.path, self.place(column), message))
    }

    fn header_error(&self, place: String, message: String) -> RiffleError {
        RiffleError::bad_input(&self.path, place, message)
    }
}

fn read_failure(path: &Path, gzip: bool, line: u64, error: std::io::Error) -> RiffleError {
    use std::io::ErrorKind;
    let corrupt = matches!(
        error.kind(),
        ErrorKind::InvalidData | ErrorKind::InvalidInput | ErrorKind::UnexpectedEof
    );
    if gzip && corrupt {
        RiffleError::bad_input(
            path,
            format!("line {line}"),
            format!("the gzip stream is corrupt or truncated ({error})"),
        )
    } else {
        RiffleError::io(path, error)
    }
}

fn shown(text: &str) -> String {
    if text.chars().count() > SHOWN_TEXT {
        let cut: String = text.chars().take(SHOWN_TEXT).collect();
        format!("{cut}...")
    } else {
        text.to_string()
    }
}

/// A cell as a value: NaN for missing (empty, NA, NaN in any case).
fn parse_value(cell: &[u8], value_type: ValueType) -> std::result::Result<f64, String> {
    let cell = cell.trim_ascii();
    if cell.is_empty() || cell.eq_ignore_ascii_case(b"na") || cell.eq_ignore_ascii_case(b"nan") {
        return Ok(f64::NAN);
    }
    let text = String::from_utf8_lossy(cell);
    let value: f64 = text.parse().map_err(|_| {
        format!(
            "'{}' is not a number; expected a decimal number, or NA, NaN or an empty cell \
             for a missing value",
            shown(&text)
        )
    })?;
    if value.is_nan() {
        return Ok(f64::NAN);
    }
    if value.is_infinite() {
        return Err(if text.to_ascii_lowercase().contains("inf") {
            format!(
                "'{}' is infinite, which is not a valid abundance; use NA for a missing value",
                shown(&text)
            )
        } else {
            format!("'{}' is too large for a 64-bit float", shown(&text))
        });
    }
    if value_type == ValueType::F32 && (value as f32).is_infinite() {
        return Err(format!(
            "'{}' is too large for a 32-bit float; use --f64 to store 64-bit values",
            shown(&text)
        ));
    }
    Ok(value)
}

/// Column names of the header after the first: unique, non-empty, and not
/// the output id column's name.
fn check_column_names(table: &TextTable, what: &str, id_column: Option<&str>) -> Result<()> {
    if table.header.len() < 2 {
        return Err(table.header_error(
            "line 1, column 2".into(),
            format!("the header names no {what}; expected the id column name then one {what} per column"),
        ));
    }
    let mut seen: HashMap<&str, usize> = HashMap::with_capacity(table.header.len());
    for (index, name) in table.header.iter().enumerate().skip(1) {
        if name.is_empty() {
            return Err(table.header_error(
                format!("line 1, column {}", index + 1),
                format!("empty {what} name in the header"),
            ));
        }
        if let Some(first) = seen.insert(name, index) {
            return Err(table.header_error(
                format!("line 1, columns {} and {}", first + 1, index + 1),
                format!("{what} '{name}' appears twice in the header"),
            ));
        }
        if id_column == Some(name.as_str()) {
            return Err(table.header_error(
                format!("line 1, column {}", index + 1),
                format!(
                    "{what} '{name}' has the name of the output id column; choose another \
                     with --id-column"
                ),
            ));
        }
    }
    Ok(())
}

fn header_only(table: &TextTable) -> RiffleError {
    table.header_error(
        "line 2, column 1".into(),
        "the file has a header but no data rows".into(),
    )
}

/// Passes a precomputed 64-bit hash through unchanged.
#[derive(Default)]
struct PassThroughHasher(u64);

impl Hasher for PassThroughHasher {
    fn finish(&self) -> u64 {
        self.0
    }
    fn write(&mut self, bytes: &[u8]) {
        for &b in bytes {
            self.0 = (self.0 << 8) | u64::from(b);
        }
    }
    fn write_u64(&mut self, value: u64) {
        self.0 = value;
    }
}

/// Finds repeated ids in one pass while keeping only a 64-bit hash and a
/// line number per id (about 32 bytes each) instead of the ids themselves.
/// A hash seen before is confirmed by re-reading the earlier id from the
/// file, so a rare collision of different ids is never reported as a
/// duplicate.
struct DuplicateFinder {
    first_line_of_hash: HashMap<u64, u64, BuildHasherDefault<PassThroughHasher>>,
    /// Ids whose hash collided with a different id's: kept in full.
    collided: HashMap<String, u64>,
}

impl DuplicateFinder {
    fn new() -> Self {
        DuplicateFinder {
            first_line_of_hash: HashMap::default(),
            collided: HashMap::new(),
        }
    }

    /// The line where `id` was first seen, if it was.
    fn check(&mut self, path: &Path, id: &str, line: u64) -> Result<Option<u64>> {
        // Fixed keys: the hashes only need to agree within this process.
        let mut hasher = std::hash::DefaultHasher::new();
        id.hash(&mut hasher);
        let hash = hasher.finish();
        let Some(&first_line) = self.first_line_of_hash.get(&hash) else {
            self.first_line_of_hash.insert(hash, line);
            return Ok(None);
        };
        if let Some(&earlier) = self.collided.get(id) {
            return Ok(Some(earlier));
        }
        if id_at_line(path, first_line)? == id {
            return Ok(Some(first_line));
        }
        self.collided.insert(id.to_string(), line);
        Ok(None)
    }
}

fn id_at_line(path: &Path, line: u64) -> Result<String> {
    let mut table = TextTable::open(path)?;
    while table.next_row()? {
        if table.line == line {
            return Ok(table.row_id()?.to_string());
        }
    }
    Err(RiffleError::bad_input(
        path,
        format!("line {line}"),
        "the file changed while it was being read",
    ))
}

fn check_stop(stop: &AtomicBool) -> Result<()> {
    if stop.load(Ordering::Relaxed) {
        return Err(RiffleError::Interrupted);
    }
    Ok(())
}

fn import_features_in_rows(
    options: &ImportOptions,
    format: MatrixFormat,
    stop: &AtomicBool,
) -> Result<ImportSummary> {
    let path = options.input.as_path();
    let mut table = TextTable::open(path)?;
    check_column_names(&table, "sample", Some(&options.id_column))?;
    let samples: Vec<String> = table.header[1..].to_vec();
    let n_samples = samples.len();
    let mut writer = create_matrix_writer(
        &options.output,
        format,
        &options.id_column,
        &samples,
        options.value_type,
        rows_per_batch(n_samples),
    )?;
    let block_rows = rows_per_block(n_samples);
    let mut ids: Vec<String> = Vec::with_capacity(block_rows);
    let mut values: Vec<f64> = Vec::with_capacity(block_rows * n_samples);
    let mut duplicates = DuplicateFinder::new();
    let (mut features, mut missing) = (0u64, 0u64);
    while table.next_row()? {
        let id = table.row_id()?;
        if let Some(first) = duplicates.check(path, id, table.line)? {
            return Err(RiffleError::bad_input(
                path,
                format!(
                    "lines {first} and {}, column 1 ('{}')",
                    table.line, table.header[0]
                ),
                format!("feature id '{id}' appears twice"),
            ));
        }
        ids.push(id.to_string());
        for column in 1..=n_samples {
            let value = table.value(column, options.value_type)?;
            missing += u64::from(value.is_nan());
            values.push(value);
        }
        features += 1;
        if ids.len() == block_rows {
            check_stop(stop)?;
            writer.write_block(&ids, &values)?;
            ids.clear();
            values.clear();
        }
    }
    if features == 0 {
        return Err(header_only(&table));
    }
    writer.write_block(&ids, &values)?;
    writer.finish()?;
    Ok(ImportSummary {
        output: options.output.clone(),
        format,
        gzip: table.gzip,
        delimiter: table.delimiter,
        features,
        samples: n_samples,
        missing_values: missing,
        passes: 1,
    })
}

fn import_features_in_columns(
    options: &ImportOptions,
    format: MatrixFormat,
    stop: &AtomicBool,
) -> Result<ImportSummary> {
    let path = options.input.as_path();
    let band_budget = (options.memory_bytes / 2).max(1);
    let mut table = TextTable::open(path)?;
    check_column_names(&table, "feature", None)?;
    let feature_ids: Vec<String> = table.header[1..].to_vec();
    let n_features = feature_ids.len();

    // Pass 1 validates every cell and keeps the values while they fit.
    let mut samples: Vec<String> = Vec::new();
    let mut sample_lines: HashMap<String, u64> = HashMap::new();
    let mut whole: Option<Vec<f64>> = Some(Vec::new());
    let mut missing = 0u64;
    while table.next_row()? {
        check_stop(stop)?;
        let sample = table.row_id()?.to_string();
        if sample == options.id_column {
            return Err(RiffleError::bad_input(
                path,
                table.place(0),
                format!(
                    "sample '{sample}' has the name of the output id column; choose another \
                     with --id-column"
                ),
            ));
        }
        if let Some(first) = sample_lines.insert(sample.clone(), table.line) {
            return Err(RiffleError::bad_input(
                path,
                format!(
                    "lines {first} and {}, column 1 ('{}')",
                    table.line, table.header[0]
                ),
                format!("sample '{sample}' appears twice"),
            ));
        }
        samples.push(sample);
        let fits = whole
            .as_ref()
            .is_some_and(|w| ((w.len() + n_features) * 8) as u64 <= band_budget);
        if !fits {
            whole = None;
        }
        for column in 1..=n_features {
            let value = table.value(column, options.value_type)?;
            missing += u64::from(value.is_nan());
            if let Some(w) = whole.as_mut() {
                w.push(value);
            }
        }
    }
    if samples.is_empty() {
        return Err(header_only(&table));
    }
    let n_samples = samples.len();
    let mut writer = create_matrix_writer(
        &options.output,
        format,
        &options.id_column,
        &samples,
        options.value_type,
        rows_per_batch(n_samples),
    )?;
    let mut passes = 1;
    match whole {
        Some(by_sample) => {
            let block_rows = rows_per_block(n_samples);
            let mut by_feature = Vec::with_capacity(block_rows * n_samples);
            for start in (0..n_features).step_by(block_rows) {
                let end = (start + block_rows).min(n_features);
                by_feature.clear();
                for feature in start..end {
                    by_feature.extend((0..n_samples).map(|s| by_sample[s * n_features + feature]));
                }
                writer.write_block(&feature_ids[start..end], &by_feature)?;
            }
        }
        None => {
            let band_width = ((band_budget / (n_samples as u64 * 8)) as usize).clamp(1, n_features);
            let mut band = vec![0.0f64; band_width * n_samples];
            for start in (0..n_features).step_by(band_width) {
                let end = (start + band_width).min(n_features);
                let columns = start..end;
                read_band(path, options.value_type, &samples, columns, &mut band, stop)?;
                passes += 1;
                writer.write_block(&feature_ids[start..end], &band[..(end - start) * n_samples])?;
            }
        }
    }
    writer.finish()?;
    Ok(ImportSummary {
        output: options.output.clone(),
        format,
        gzip: table.gzip,
        delimiter: table.delimiter,
        features: n_features as u64,
        samples: n_samples,
        missing_values: missing,
        passes,
    })
}

/// Re-read the file and collect features `start..end` (header columns
/// `start + 1..=end`) as rows: `band[(f - start) * n_samples + s]`.
fn read_band(
    path: &Path,
    value_type: ValueType,
    samples: &[String],
    features: std::ops::Range<usize>,
    band: &mut [f64],
    stop: &AtomicBool,
) -> Result<()> {
    let (start, end) = (features.start, features.end);
    let n_samples = samples.len();
    let changed = |place: String| {
        RiffleError::bad_input(path, place, "the file changed while it was being read")
    };
    let mut table = TextTable::open(path)?;
    let mut sample = 0;
    while table.next_row()? {
        check_stop(stop)?;
        if samples.get(sample).map(String::as_str) != Some(table.row_id()?) {
            return Err(changed(table.place(0)));
        }
        for feature in start..end {
            band[(feature - start) * n_samples + sample] = table.value(feature + 1, value_type)?;
        }
        sample += 1;
    }
    if sample != n_samples {
        return Err(changed(format!("line {}", table.line)));
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn missing_and_bad_cells() {
        // Rust's float parser rounds correctly (IEEE 754 round to nearest),
        // common practice, no single source.
        assert_eq!(parse_value(b" 1.5 ", ValueType::F32), Ok(1.5));
        assert_eq!(parse_value(b"-2e3", ValueType::F64), Ok(-2000.0));
        for missing in [&b""[..], b"NA", b"NaN", b"nan", b"  "] {
            assert!(parse_value(missing, ValueType::F32).unwrap().is_nan());
        }
        assert!(parse_value(b"Inf", ValueType::F64)
            .unwrap_err()
            .contains("infinite"));
        assert!(parse_value(b"-inf", ValueType::F64)
            .unwrap_err()
            .contains("infinite"));
        assert!(parse_value(b"1,5", ValueType::F64)
            .unwrap_err()
            .contains("'1,5'"));
        // f32::MAX is about 3.4028235e38 (IEEE 754 binary32), from memory.
        assert!(parse_value(b"1e39", ValueType::F32)
            .unwrap_err()
            .contains("--f64"));
        assert_eq!(parse_value(b"1e39", ValueType::F64), Ok(1e39));
        assert!(parse_value(b"1e400", ValueType::F64)
            .unwrap_err()
            .contains("too large"));
    }

    #[test]
    fn batch_sizes_depend_only_on_width() {
        assert_eq!(rows_per_batch(48), 65_536);
        assert_eq!(rows_per_batch(10_000_000), 1);
        assert_eq!(rows_per_block(1 << 30), 1);
    }
}
