//! Input stage: feature matrices (one row per feature) and sample sheets.
//!
//! A matrix is read as a stream of [`FeatureBlock`]s through the
//! [`FeatureSource`] trait, whatever the file format underneath.

use std::path::{Path, PathBuf};

use crate::error::Result;

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

pub fn detect_format(path: &Path) -> Result<MatrixFormat> {
    todo_input(path)
}

fn todo_input(_path: &Path) -> Result<MatrixFormat> {
    unimplemented!("input layer under construction")
}

pub fn open_matrix(path: &Path, _id: &str, _samples: &[String]) -> Result<Box<dyn FeatureSource>> {
    let _ = detect_format(path)?;
    unimplemented!()
}
#[derive(Debug, Clone, Copy)]
pub enum ValueType {
    F32,
    F64,
}
pub trait MatrixWriter {
    fn write_block(&mut self, ids: &[String], values: &[f64]) -> Result<()>;
    fn finish(self: Box<Self>) -> Result<()>;
}
pub fn create_matrix_writer(
    _p: &Path,
    _f: MatrixFormat,
    _i: &str,
    _s: &[String],
    _v: ValueType,
    _r: usize,
) -> Result<Box<dyn MatrixWriter>> {
    unimplemented!()
}
