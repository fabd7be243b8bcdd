//! A matrix held in memory, behind the same trait as the file readers:
//! for library users with data already loaded, and for tests.

use std::path::PathBuf;

use super::{FeatureBlock, FeatureSource, MatrixFormat, MatrixInfo};
use crate::error::{Result, RiffleError};

pub struct MemorySource {
    info: MatrixInfo,
    ids: Vec<String>,
    /// Row-major `ids.len() x n_samples`.
    values: Vec<f64>,
    n_samples: usize,
    next: usize,
}

impl MemorySource {
    /// `values` is row-major, one row per feature, columns in the order of
    /// `samples`.
    pub fn new(ids: Vec<String>, samples: Vec<String>, values: Vec<f64>) -> Result<Self> {
        let n_samples = samples.len();
        if values.len() != ids.len() * n_samples {
            return Err(RiffleError::options(format!(
                "in-memory matrix: {} values for {} features x {} samples",
                values.len(),
                ids.len(),
                n_samples
            )));
        }
        Ok(MemorySource {
            info: MatrixInfo {
                path: PathBuf::from("<memory>"),
                format: MatrixFormat::ArrowIpc,
                n_features: ids.len() as u64,
                sample_columns: samples,
                id_column: "feature".into(),
            },
            ids,
            values,
            n_samples,
            next: 0,
        })
    }
}

impl FeatureSource for MemorySource {
    fn info(&self) -> &MatrixInfo {
        &self.info
    }

    fn seek(&mut self, feature_index: u64) -> Result<()> {
        self.next = (feature_index as usize).min(self.ids.len());
        Ok(())
    }

    fn next_block(&mut self, max_rows: usize, block: &mut FeatureBlock) -> Result<usize> {
        let rows = max_rows.min(self.ids.len() - self.next);
        block.first_index = self.next as u64;
        block.n_samples = self.n_samples;
        block.ids.clear();
        block
            .ids
            .extend_from_slice(&self.ids[self.next..self.next + rows]);
        block.values.clear();
        block.values.extend_from_slice(
            &self.values[self.next * self.n_samples..(self.next + rows) * self.n_samples],
        );
        self.next += rows;
        Ok(rows)
    }
}
