//! Input stage: feature matrices (one row per feature) and sample sheets.
//!
//! A matrix is read as a stream of [`FeatureBlock`]s through the
//! [`FeatureSource`] trait, whatever the file format underneath.

use std::fs::File;
use std::io::{Read, Seek, SeekFrom};
use std::path::{Path, PathBuf};

use crate::error::{IoContext, Result, RiffleError};

mod columns;
mod ipc_file;
pub mod memory;
mod parquet_file;
pub mod text;
mod writer;

#[cfg(test)]
mod tests;

pub use writer::{create_matrix_writer, MatrixWriter, ValueType};

/// On-disk formats of a feature matrix, detected from content.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum MatrixFormat {
    ArrowIpc,
    Parquet,
}

/// What is known about a matrix before any feature is read.
#[derive(Debug, Clone)]
pub struct MatrixInfo {
    pub path: PathBuf,
    pub format: MatrixFormat,
    pub n_features: u64,
    /// Names of all numeric sample columns, in file order.
    pub sample_columns: Vec<String>,
    pub id_column: String,
}

/// A block of consecutive features: ids and a row-major `rows x n_samples`
/// array of values (f64, NaN for missing), columns in the order requested
/// when the source was opened.
#[derive(Debug, Default, Clone)]
pub struct FeatureBlock {
    /// Index of the first feature of the block in the whole matrix.
    pub first_index: u64,
    pub ids: Vec<String>,
    pub values: Vec<f64>,
    pub n_samples: usize,
}

impl FeatureBlock {
    pub fn rows(&self) -> usize {
        self.ids.len()
    }
    pub fn row(&self, i: usize) -> &[f64] {
        &self.values[i * self.n_samples..(i + 1) * self.n_samples]
    }
}

/// A stream of feature rows restricted to chosen sample columns.
pub trait FeatureSource: Send {
    fn info(&self) -> &MatrixInfo;
    /// Position the stream so that the next block starts at `feature_index`.
    fn seek(&mut self, feature_index: u64) -> Result<()>;
    /// Fill `block` with up to `max_rows` next features; returns the number
    /// read, 0 at the end of the matrix.
    fn next_block(&mut self, max_rows: usize, block: &mut FeatureBlock) -> Result<usize>;
}

const ARROW_FILE_HEAD: &[u8] = b"ARROW1\0\0";
const ARROW_FILE_TAIL: &[u8] = b"ARROW1";
const PARQUET_MAGIC: &[u8] = b"PAR1";
const PARQUET_ENCRYPTED_MAGIC: &[u8] = b"PARE";
/// Every Arrow IPC stream message starts with this continuation marker.
const ARROW_STREAM_HEAD: &[u8] = &[0xFF, 0xFF, 0xFF, 0xFF];

const ACCEPTED_FORMATS: &str =
    "riffle reads Arrow IPC files (.arrow/.feather v2) and Parquet files";

/// Tell the format of a matrix from its leading and trailing bytes; the file
/// name plays no part, so a mislabelled file is still read correctly.
pub fn detect_format(path: &Path) -> Result<MatrixFormat> {
    let mut file = File::open(path).at(path)?;
    let len = file.metadata().at(path)?.len();
    if len == 0 {
        return Err(RiffleError::bad_input(
            path,
            "start of file",
            format!("the file is empty; {ACCEPTED_FORMATS}"),
        ));
    }
    let mut head = [0u8; 512];
    let head_len = read_up_to(&mut file, &mut head).at(path)?;
    let head = &head[..head_len];
    let mut tail = [0u8; 6];
    let tail_len = if len >= 6 {
        file.seek(SeekFrom::End(-6)).at(path)?;
        file.read_exact(&mut tail).at(path)?;
        6
    } else {
        0
    };
    let tail = &tail[..tail_len];

    // A file cut inside its leading magic still says what it was meant to be.
    for (magic, name) in [
        (ARROW_FILE_HEAD, "an Arrow IPC"),
        (PARQUET_MAGIC, "a Parquet"),
    ] {
        if head.len() < magic.len() && magic.starts_with(head) {
            return Err(RiffleError::bad_input(
                path,
                "end of file",
                format!(
                    "the file is only {len} bytes, the start of {name} file's leading magic; \
                     it is truncated or was not completely written"
                ),
            ));
        }
    }
    if head.starts_with(ARROW_FILE_HEAD) {
        // The smallest valid file is head magic, footer length and tail magic.
        if tail == ARROW_FILE_TAIL && len >= 18 {
            return Ok(MatrixFormat::ArrowIpc);
        }
        return Err(RiffleError::bad_input(
            path,
            "end of file",
            "starts like an Arrow IPC file but does not end with the 'ARROW1' trailer; \
             the file is truncated or was not completely written",
        ));
    }
    if head.starts_with(PARQUET_MAGIC) {
        if tail.ends_with(PARQUET_MAGIC) && len >= 12 {
            return Ok(MatrixFormat::Parquet);
        }
        if tail.ends_with(PARQUET_ENCRYPTED_MAGIC) {
            return Err(RiffleError::bad_input(
                path,
                "end of file",
                "this Parquet file has an encrypted footer, which riffle cannot read",
            ));
        }
        return Err(RiffleError::bad_input(
            path,
            "end of file",
            "starts like a Parquet file but does not end with the 'PAR1' trailer; \
             the file is truncated or was not completely written",
        ));
    }
    if head.starts_with(ARROW_STREAM_HEAD) {
        return Err(RiffleError::bad_input(
            path,
            "start of file",
            format!(
                "this looks like an Arrow IPC stream, which has no index of its batches; \
                 {ACCEPTED_FORMATS} (the IPC file format)"
            ),
        ));
    }
    if looks_like_text(head) {
        return Err(RiffleError::bad_input(
            path,
            "start of file",
            format!(
                "this looks like a text table, not a binary matrix; {ACCEPTED_FORMATS}. \
                 Convert a text table first with `riffle import`"
            ),
        ));
    }
    let shown: Vec<String> = head.iter().take(8).map(|b| format!("{b:02x}")).collect();
    Err(RiffleError::bad_input(
        path,
        "start of file",
        format!(
            "unrecognised content (first bytes {}); {ACCEPTED_FORMATS}",
            shown.join(" ")
        ),
    ))
}

/// Reads until `buf` is full or the file ends; returns the bytes read.
pub(crate) fn read_up_to(file: &mut File, buf: &mut [u8]) -> std::io::Result<usize> {
    let mut filled = 0;
    while filled < buf.len() {
        match file.read(&mut buf[filled..]) {
            Ok(0) => break,
            Ok(n) => filled += n,
            Err(e) if e.kind() == std::io::ErrorKind::Interrupted => {}
            Err(e) => return Err(e),
        }
    }
    Ok(filled)
}

/// Text tables (TSV/CSV, possibly UTF-8) have no NUL or stray control bytes
/// in their first few hundred bytes; binary formats almost always do.
fn looks_like_text(head: &[u8]) -> bool {
    let valid_utf8_prefix = match std::str::from_utf8(head) {
        Ok(_) => true,
        // A multi-byte character cut by the 512-byte window is still text.
        Err(e) => e.error_len().is_none(),
    };
    valid_utf8_prefix
        && head
            .iter()
            .all(|&b| b >= 0x20 || matches!(b, b'\t' | b'\n' | b'\r'))
}

/// Open a matrix for streaming: checks that `id_column` is a string column
/// and that every requested sample is a numeric column, then reads only
/// those columns, values in the order of `samples`.
pub fn open_matrix(
    path: &Path,
    id_column: &str,
    samples: &[String],
) -> Result<Box<dyn FeatureSource>> {
    check_requested_samples(id_column, samples)?;
    match detect_format(path)? {
        MatrixFormat::ArrowIpc => ipc_file::open(path, id_column, samples),
        MatrixFormat::Parquet => parquet_file::open(path, id_column, samples),
    }
}

fn check_requested_samples(id_column: &str, samples: &[String]) -> Result<()> {
    if samples.is_empty() {
        return Err(RiffleError::options("no samples were requested"));
    }
    let mut seen = std::collections::HashSet::with_capacity(samples.len());
    for sample in samples {
        if sample == id_column {
            return Err(RiffleError::options(format!(
                "--id-column '{id_column}' names a sample of the sample sheet; \
                 give the name of the feature id column (default 'feature')"
            )));
        }
        if !seen.insert(sample.as_str()) {
            return Err(RiffleError::options(format!(
                "sample '{sample}' is requested more than once"
            )));
        }
    }
    Ok(())
}
