//! `riffle inspect`: what a matrix holds, found in one streaming pass, and
//! (optionally) how it lines up with a sample sheet.

use std::collections::HashSet;
use std::fmt::Write as _;
use std::fs::File;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};

use arrow_schema::{DataType, SchemaRef};
use clap::Args;
use rand_chacha::ChaCha20Rng;
use rand_core::{RngCore, SeedableRng};

use crate::design::SampleSheet;
use crate::error::{IoContext, Result, RiffleError};
use crate::input::{detect_format, open_matrix, FeatureBlock, MatrixFormat};

#[derive(Args, Debug, Clone)]
pub struct InspectArgs {
    /// Matrix file (Arrow IPC or Parquet).
    pub matrix: PathBuf,
    /// Sample sheet to check against the matrix's sample columns.
    #[arg(long)]
    pub samples: Option<PathBuf>,
    /// Matrix column with the feature ids.
    #[arg(long, default_value = "feature")]
    pub id_column: String,
    /// Sample-sheet column with the sample ids.
    #[arg(long, default_value = "sample")]
    pub sample_column: String,
}

/// Per-feature means kept for the median; beyond this many features the
/// median is that of a uniform random sample of them.
const RESERVOIR_SIZE: usize = 100_000;
/// Values read per block, whatever the width of the matrix.
const VALUES_PER_BLOCK: usize = 1 << 21;
const NAMES_SHOWN: usize = 5;
/// Fixed so the same matrix always gives the same report.
const RESERVOIR_SEED: u64 = 0x5EED_1257;

#[derive(Debug, Clone, PartialEq)]
pub struct MatrixReport {
    pub path: PathBuf,
    pub format: MatrixFormat,
    pub id_column: String,
    pub id_type: String,
    pub features: u64,
    pub sample_columns: Vec<String>,
    /// Numeric column types and how many columns have each, in first-seen order.
    pub value_types: Vec<(String, usize)>,
    /// Columns that are neither the id column nor numeric, with their types.
    pub other_columns: Vec<(String, String)>,
    pub missing_values: u64,
    pub features_with_missing: u64,
    pub features_all_missing: u64,
    /// Features whose present values are all equal (at least one present).
    pub constant_features: u64,
    /// Min, median, max of per-feature means over features with a value.
    pub mean_range: Option<(f64, f64, f64)>,
    /// True when the median comes from the whole set of means.
    pub median_exact: bool,
}

#[derive(Debug, Clone, PartialEq, Eq)]
pub struct SheetCheck {
    pub sheet: PathBuf,
    pub sheet_samples: usize,
    /// Sheet samples with no matrix column, in sheet order.
    pub missing_from_matrix: Vec<String>,
    /// Matrix sample columns not in the sheet, in file order.
    pub not_in_sheet: Vec<String>,
}

pub fn run_inspect(args: &InspectArgs) -> Result<()> {
    let report = inspect_matrix(&args.matrix, &args.id_column, &crate::cli::STOP)?;
    let mut text = report_text(&report);
    if let Some(sheet_path) = &args.samples {
        let sheet = SampleSheet::read(sheet_path, &args.sample_column)?;
        let check = check_sheet(&report, &sheet);
        text.push_str(&sheet_text(&check));
    }
    print!("{text}");
    Ok(())
}

fn read_schema(path: &Path, format: MatrixFormat) -> Result<SchemaRef> {
    let file = File::open(path).at(path)?;
    let unreadable = |detail: String| {
        RiffleError::bad_input(path, "footer", format!("cannot read the schema ({detail})"))
    };
    match format {
        MatrixFormat::ArrowIpc => arrow_ipc::reader::FileReader::try_new(file, None)
            .map(|reader| reader.schema())
            .map_err(|e| unreadable(e.to_string())),
        MatrixFormat::Parquet => parquet::arrow::arrow_reader::ArrowReaderMetadata::load(
            &file,
            parquet::arrow::arrow_reader::ArrowReaderOptions::new(),
        )
        .map(|metadata| metadata.schema().clone())
        .map_err(|e| unreadable(e.to_string())),
    }
}

fn is_numeric(data_type: &DataType) -> bool {
    matches!(
        data_type,
        DataType::Float32 | DataType::Float64 | DataType::Int32 | DataType::Int64
    )
}

/// Shape, types and summary figures of a matrix, in one pass over it;
/// gives up with `Interrupted` soon after `stop` is set.
pub fn inspect_matrix(path: &Path, id_column: &str, stop: &AtomicBool) -> Result<MatrixReport> {
    let format = detect_format(path)?;
    let schema = read_schema(path, format)?;
    let mut sample_columns = Vec::new();
    let mut value_types: Vec<(String, usize)> = Vec::new();
    let mut other_columns = Vec::new();
    let mut id_type = String::new();
    for field in schema.fields() {
        let type_name = field.data_type().to_string();
        if field.name() == id_column {
            id_type = type_name;
        } else if is_numeric(field.data_type()) {
            sample_columns.push(field.name().clone());
            match value_types.iter_mut().find(|(t, _)| *t == type_name) {
                Some((_, count)) => *count += 1,
                None => value_types.push((type_name, 1)),
            }
        } else {
            other_columns.push((field.name().clone(), type_name));
        }
    }
    if sample_columns.is_empty() {
        return Err(RiffleError::bad_input(
            path,
            "column list",
            "the matrix has no numeric sample columns (Float32, Float64, Int32 or Int64)",
        ));
    }
    let mut source = open_matrix(path, id_column, &sample_columns)?;
    let n_samples = sample_columns.len();
    let block_rows = (VALUES_PER_BLOCK / n_samples).max(1);

    let mut summary = MeanSummary::new();
    let mut block = FeatureBlock::default();
    let (mut features, mut missing_values) = (0u64, 0u64);
    let (mut features_with_missing, mut features_all_missing, mut constant_features) =
        (0u64, 0u64, 0u64);
    while source.next_block(block_rows, &mut block)? > 0 {
        if stop.load(Ordering::Relaxed) {
            return Err(RiffleError::Interrupted);
        }
        for row in 0..block.rows() {
            let values = block.row(row);
            let (mut present, mut sum) = (0usize, 0.0f64);
            let mut first_present: Option<f64> = None;
            let mut constant = true;
            for &value in values {
                if value.is_nan() {
                    continue;
                }
                present += 1;
                sum += value;
                match first_present {
                    None => first_present = Some(value),
                    Some(first) => constant &= value == first,
                }
            }
            let missing = (n_samples - present) as u64;
            missing_values += missing;
            features_with_missing += u64::from(missing > 0);
            if present == 0 {
                features_all_missing += 1;
            } else {
                constant_features += u64::from(constant);
                summary.add(sum / present as f64);
            }
            features += 1;
        }
    }
    let median_exact = summary.seen <= RESERVOIR_SIZE as u64;
    Ok(MatrixReport {
        path: path.to_path_buf(),
        format,
        id_column: id_column.to_string(),
        id_type,
        features,
        sample_columns,
        value_types,
        other_columns,
        missing_values,
        features_with_missing,
        features_all_missing,
        constant_features,
        mean_range: summary.range(),
        median_exact,
    })
}

/// Min and max of all means, and a uniform reservoir sample of them
/// (Vitter's algorithm R) for the median.
struct MeanSummary {
    min: f64,
    max: f64,
    seen: u64,
    reservoir: Vec<f64>,
    rng: ChaCha20Rng,
}

impl MeanSummary {
    fn new() -> Self {
        MeanSummary {
            min: f64::INFINITY,
            max: f64::NEG_INFINITY,
            seen: 0,
            reservoir: Vec::new(),
            rng: ChaCha20Rng::seed_from_u64(RESERVOIR_SEED),
        }
    }

    fn add(&mut self, mean: f64) {
        self.min = self.min.min(mean);
        self.max = self.max.max(mean);
        self.seen += 1;
        if self.reservoir.len() < RESERVOIR_SIZE {
            self.reservoir.push(mean);
        } else {
            // Modulo bias is below 2^-40 for any realistic feature count.
            let slot = self.rng.next_u64() % self.seen;
            if (slot as usize) < RESERVOIR_SIZE {
                self.reservoir[slot as usize] = mean;
            }
        }
    }

    fn range(&self) -> Option<(f64, f64, f64)> {
        if self.reservoir.is_empty() {
            return None;
        }
        let mut sorted = self.reservoir.clone();
        sorted.sort_by(f64::total_cmp);
        let n = sorted.len();
        // Mean of the two middle values for an even count, as numpy.median.
        let median = if n % 2 == 1 {
            sorted[n / 2]
        } else {
            (sorted[n / 2 - 1] + sorted[n / 2]) / 2.0
        };
        Some((self.min, median, self.max))
    }
}

pub fn check_sheet(report: &MatrixReport, sheet: &SampleSheet) -> SheetCheck {
    let in_matrix: HashSet<&str> = report.sample_columns.iter().map(String::as_str).collect();
    let sheet_samples: Vec<&str> = (0..sheet.rows.len()).map(|r| sheet.sample(r)).collect();
    let in_sheet: HashSet<&str> = sheet_samples.iter().copied().collect();
    SheetCheck {
        sheet: sheet.path.clone(),
        sheet_samples: sheet_samples.len(),
        missing_from_matrix: sheet_samples
            .iter()
            .filter(|s| !in_matrix.contains(*s))
            .map(|s| s.to_string())
            .collect(),
        not_in_sheet: report
            .sample_columns
            .iter()
            .filter(|c| !in_sheet.contains(c.as_str()))
            .cloned()
            .collect(),
    }
}

fn first_names(names: &[String], shown: usize) -> String {
    let mut text = names
        .iter()
        .take(shown)
        .map(String::as_str)
        .collect::<Vec<_>>()
        .join(", ");
    if names.len() > shown {
        let _ = write!(text, ", ... ({} more)", names.len() - shown);
    }
    text
}

fn share(part: u64, whole: u64) -> String {
    if whole == 0 {
        return "0%".into();
    }
    format!("{:.2}%", 100.0 * part as f64 / whole as f64)
}

fn number(x: f64) -> String {
    if x == 0.0 || (1e-3..1e6).contains(&x.abs()) {
        format!("{x:.4}")
    } else {
        format!("{x:.4e}")
    }
}

pub fn report_text(r: &MatrixReport) -> String {
    let n_samples = r.sample_columns.len() as u64;
    let cells = r.features * n_samples;
    let mut t = String::new();
    let _ = writeln!(t, "matrix: {}", r.path.display());
    let _ = writeln!(
        t,
        "format: {}",
        match r.format {
            MatrixFormat::ArrowIpc => "Arrow IPC file",
            MatrixFormat::Parquet => "Parquet",
        }
    );
    let _ = writeln!(t, "features: {}", r.features);
    let _ = writeln!(
        t,
        "sample columns: {} ({})",
        n_samples,
        first_names(&r.sample_columns, NAMES_SHOWN)
    );
    let types: Vec<String> = r
        .value_types
        .iter()
        .map(|(name, count)| format!("{name} x {count}"))
        .collect();
    let _ = writeln!(
        t,
        "column types: id '{}' {}; samples {}",
        r.id_column,
        r.id_type,
        types.join(", ")
    );
    if !r.other_columns.is_empty() {
        let others: Vec<String> = r
            .other_columns
            .iter()
            .map(|(name, data_type)| format!("{name} ({data_type})"))
            .collect();
        let _ = writeln!(
            t,
            "other columns (not read): {}",
            first_names(&others, NAMES_SHOWN)
        );
    }
    let _ = writeln!(
        t,
        "missing values: {} of {} ({}); features with any missing: {}; all missing: {}",
        r.missing_values,
        cells,
        share(r.missing_values, cells),
        r.features_with_missing,
        r.features_all_missing
    );
    match r.mean_range {
        Some((min, median, max)) => {
            let _ = writeln!(
                t,
                "per-feature mean: min {}, median {}{}, max {}",
                number(min),
                number(median),
                if r.median_exact {
                    ""
                } else {
                    " (from a random sample of features)"
                },
                number(max)
            );
        }
        None => {
            let _ = writeln!(t, "per-feature mean: no feature has a value");
        }
    }
    let _ = writeln!(
        t,
        "constant features: {} ({})",
        r.constant_features,
        share(r.constant_features, r.features)
    );
    t
}

pub fn sheet_text(c: &SheetCheck) -> String {
    let mut t = String::new();
    let _ = writeln!(
        t,
        "sample sheet: {} ({} samples)",
        c.sheet.display(),
        c.sheet_samples
    );
    if c.missing_from_matrix.is_empty() {
        let _ = writeln!(t, "sheet samples missing from the matrix: none");
    } else {
        let _ = writeln!(
            t,
            "WARNING: {} sheet sample(s) missing from the matrix: {}",
            c.missing_from_matrix.len(),
            first_names(&c.missing_from_matrix, 50)
        );
    }
    let _ = writeln!(
        t,
        "matrix sample columns not in the sheet: {}{}",
        c.not_in_sheet.len(),
        if c.not_in_sheet.is_empty() {
            String::new()
        } else {
            format!(" ({})", first_names(&c.not_in_sheet, NAMES_SHOWN))
        }
    );
    t
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn median_matches_numpy_convention() {
        // numpy.median([3, 1, 4, 2]) == 2.5 and numpy.median([3, 1, 2]) == 2.0
        // (numpy documentation of numpy.median), from memory.
        let mut even = MeanSummary::new();
        for x in [3.0, 1.0, 4.0, 2.0] {
            even.add(x);
        }
        assert_eq!(even.range(), Some((1.0, 2.5, 4.0)));
        let mut odd = MeanSummary::new();
        for x in [3.0, 1.0, 2.0] {
            odd.add(x);
        }
        assert_eq!(odd.range(), Some((1.0, 2.0, 3.0)));
    }

    #[test]
    fn reservoir_median_is_close_for_many_means() {
        // The sample median of a uniform random sample of 100,000 from
        // 0..1,000,000 has standard error about 0.5/sqrt(1e5)*1e6 ~ 1,600
        // (asymptotic distribution of the sample median, common practice,
        // no single source); allow five of them.
        let mut many = MeanSummary::new();
        for i in 0..1_000_000u64 {
            many.add(((i * 7_919) % 1_000_000) as f64);
        }
        let (min, median, max) = many.range().unwrap();
        assert_eq!((min, max), (0.0, 999_999.0));
        assert!((median - 500_000.0).abs() < 8_000.0, "{median}");
    }
}
