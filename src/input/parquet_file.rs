//! Parquet reader: streams row groups of the projected columns; seeking
//! restarts the decoder at the row group that holds the wanted feature.

use std::fs::File;
use std::path::Path;

use parquet::arrow::arrow_reader::{
    ArrowReaderMetadata, ArrowReaderOptions, ParquetRecordBatchReader,
    ParquetRecordBatchReaderBuilder,
};
use parquet::arrow::ProjectionMask;

use super::columns::{plan_columns, BatchSource, LoadedBatch, RowStream};
use super::ipc_file::without_panic;
use super::{FeatureSource, MatrixFormat, MatrixInfo};
use crate::error::{IoContext, Result, RiffleError};

/// Rows per decoded batch: large enough to amortise per-batch work, small
/// enough that a batch of 48 f64 columns stays around 6 MB.
const PARQUET_BATCH_ROWS: usize = 16 * 1024;

pub(crate) struct ParquetBatchSource {
    info: MatrixInfo,
    file: File,
    metadata: ArrowReaderMetadata,
    mask: ProjectionMask,
    /// First feature index of each row group, plus the total at the end.
    row_group_starts: Vec<u64>,
    /// Position of the id and each requested sample in a decoded batch,
    /// whose columns come in file order.
    batch_columns: Vec<usize>,
    samples: Vec<String>,
    reader: Option<ParquetRecordBatchReader>,
    /// Feature index of the next row the reader yields.
    next_index: u64,
}

fn corrupt(path: &Path, place: impl Into<String>, detail: impl std::fmt::Display) -> RiffleError {
    RiffleError::bad_input(
        path,
        place,
        format!("the Parquet file is corrupt or truncated ({detail})"),
    )
}

pub(crate) fn open(
    path: &Path,
    id_column: &str,
    samples: &[String],
) -> Result<Box<dyn FeatureSource>> {
    let source = ParquetBatchSource::new(path, id_column, samples)?;
    Ok(Box::new(RowStream::new(source, samples.len())))
}

impl ParquetBatchSource {
    fn new(path: &Path, id_column: &str, samples: &[String]) -> Result<Self> {
        let file = File::open(path).at(path)?;
        let metadata = without_panic(
            path,
            || "footer".to_string(),
            || {
                ArrowReaderMetadata::load(&file, ArrowReaderOptions::new())
                    .map_err(|e| corrupt(path, "footer", e))
            },
        )?;
        let schema = metadata.schema().clone();
        let plan = plan_columns(path, &schema, id_column, samples)?;

        let mut file_columns = plan.projection();
        file_columns.sort_unstable();
        file_columns.dedup();
        let position_of = |file_index: usize| {
            file_columns
                .binary_search(&file_index)
                .map_err(|_| RiffleError::Internal("projected column lost".into()))
        };
        let batch_columns = plan
            .projection()
            .into_iter()
            .map(position_of)
            .collect::<Result<Vec<_>>>()?;
        let mask = ProjectionMask::roots(metadata.parquet_schema(), file_columns.iter().copied());

        let mut row_group_starts = Vec::with_capacity(metadata.metadata().num_row_groups() + 1);
        let mut total: u64 = 0;
        for (k, group) in metadata.metadata().row_groups().iter().enumerate() {
            row_group_starts.push(total);
            let rows = group.num_rows();
            if rows < 0 {
                return Err(corrupt(
                    path,
                    format!("row group {}", k + 1),
                    format!("negative row count {rows}"),
                ));
            }
            total += rows as u64;
        }
        row_group_starts.push(total);

        let mut source = ParquetBatchSource {
            info: MatrixInfo {
                path: path.to_path_buf(),
                format: MatrixFormat::Parquet,
                n_features: total,
                sample_columns: plan.numeric_columns,
                id_column: id_column.to_string(),
            },
            file,
            metadata,
            mask,
            row_group_starts,
            batch_columns,
            samples: samples.to_vec(),
            reader: None,
            next_index: 0,
        };
        source.start_reader_at(0)?;
        Ok(source)
    }

    fn start_reader_at(&mut self, feature_index: u64) -> Result<()> {
        self.reader = None;
        self.next_index = feature_index;
        let n_groups = self.row_group_starts.len() - 1;
        // The row group holding `feature_index` is the last starting at or before it.
        let group = self
            .row_group_starts
            .partition_point(|&start| start <= feature_index)
            .saturating_sub(1);
        if feature_index >= self.info.n_features || group >= n_groups {
            return Ok(());
        }
        let path = self.info.path.clone();
        let file = self.file.try_clone().at(&path)?;
        let builder =
            ParquetRecordBatchReaderBuilder::new_with_metadata(file, self.metadata.clone())
                .with_projection(self.mask.clone())
                .with_batch_size(PARQUET_BATCH_ROWS)
                .with_row_groups((group..n_groups).collect())
                .with_offset((feature_index - self.row_group_starts[group]) as usize);
        let reader = without_panic(
            &path,
            || format!("row group {}", group + 1),
            || {
                builder
                    .build()
                    .map_err(|e| corrupt(&path, format!("row group {}", group + 1), e))
            },
        )?;
        self.reader = Some(reader);
        Ok(())
    }

    fn place(&self) -> String {
        let group = self
            .row_group_starts
            .partition_point(|&start| start <= self.next_index)
            .saturating_sub(1);
        format!(
            "row group {} (from feature row {})",
            group + 1,
            self.next_index + 1
        )
    }
}

impl BatchSource for ParquetBatchSource {
    fn info(&self) -> &MatrixInfo {
        &self.info
    }

    fn seek_batch(&mut self, feature_index: u64) -> Result<u64> {
        self.start_reader_at(feature_index)?;
        Ok(feature_index)
    }

    fn next_batch(&mut self) -> Result<Option<LoadedBatch>> {
        let path = self.info.path.clone();
        let place = self.place();
        let Some(reader) = self.reader.as_mut() else {
            return Ok(None);
        };
        let next = without_panic(&path, || place.clone(), || Ok(reader.next()));
        let batch = match next {
            Ok(Some(Ok(batch))) => batch,
            Ok(None) => {
                self.reader = None;
                if self.next_index != self.info.n_features {
                    return Err(corrupt(
                        &path,
                        place,
                        format!(
                            "the data ended after {} rows where the footer promises {}",
                            self.next_index, self.info.n_features
                        ),
                    ));
                }
                return Ok(None);
            }
            Ok(Some(Err(e))) => {
                self.reader = None;
                return Err(corrupt(&path, place, e));
            }
            Err(e) => {
                // A reader that panicked mid-way has no trustworthy state.
                self.reader = None;
                return Err(e);
            }
        };
        let ordered = batch
            .project(&self.batch_columns)
            .map_err(|e| RiffleError::Internal(format!("reordering Parquet columns: {e}")))?;
        let first_index = self.next_index;
        if first_index + ordered.num_rows() as u64 > self.info.n_features {
            self.reader = None;
            return Err(corrupt(
                &path,
                place,
                "the data holds more rows than the footer declares",
            ));
        }
        self.next_index += ordered.num_rows() as u64;
        LoadedBatch::new(
            &path,
            &ordered,
            first_index,
            &self.info.id_column,
            &self.samples,
        )
        .map(Some)
    }
}
