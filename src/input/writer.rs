//! Streaming matrix writers (Arrow IPC file, Parquet) used by simulation and
//! text import. Output goes to a temporary file beside the target and is
//! renamed into place only by `finish`, so a reader never sees half a file.

use std::fs::File;
use std::io::BufWriter;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use arrow_array::{ArrayRef, Float32Array, Float64Array, RecordBatch, StringArray};
use arrow_schema::{ArrowError, DataType, Field, Schema, SchemaRef};
use parquet::arrow::ArrowWriter;
use parquet::basic::{Compression, ZstdLevel};
use parquet::errors::ParquetError;
use parquet::file::properties::WriterProperties;

use super::MatrixFormat;
use crate::error::{IoContext, Result, RiffleError};

/// Storage type of the sample columns written.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum ValueType {
    F32,
    F64,
}

/// Receives feature rows in order and writes them as a matrix file.
pub trait MatrixWriter: Send {
    /// Append rows: `values` is row-major, `ids.len() x n_samples`.
    fn write_block(&mut self, ids: &[String], values: &[f64]) -> Result<()>;
    /// Complete the file and move it to its final name.
    fn finish(self: Box<Self>) -> Result<()>;
}

/// Start writing a matrix with columns `id_column`, then one per sample.
/// Record batches (Arrow) and row groups (Parquet) hold `rows_per_batch`
/// rows whatever the sizes of the blocks written, so the output bytes do not
/// depend on how the caller chunks its rows.
pub fn create_matrix_writer(
    path: &Path,
    format: MatrixFormat,
    id_column: &str,
    samples: &[String],
    value_type: ValueType,
    rows_per_batch: usize,
) -> Result<Box<dyn MatrixWriter>> {
    if rows_per_batch == 0 {
        return Err(RiffleError::options("rows per batch must be at least 1"));
    }
    let mut names = std::collections::HashSet::new();
    for name in std::iter::once(id_column).chain(samples.iter().map(String::as_str)) {
        if !names.insert(name) {
            return Err(RiffleError::options(format!(
                "{}: column name '{name}' would appear twice",
                path.display()
            )));
        }
    }
    let value_data_type = match value_type {
        ValueType::F32 => DataType::Float32,
        ValueType::F64 => DataType::Float64,
    };
    let fields: Vec<Field> = std::iter::once(Field::new(id_column, DataType::Utf8, false))
        .chain(
            samples
                .iter()
                .map(|s| Field::new(s, value_data_type.clone(), true)),
        )
        .collect();
    let schema: SchemaRef = Arc::new(Schema::new(fields));

    let target = TempTarget::create(path)?;
    let out = BufWriter::with_capacity(1 << 20, target.file.try_clone().at(&target.temp_path)?);
    let sink = match format {
        MatrixFormat::ArrowIpc => Sink::Ipc(
            arrow_ipc::writer::FileWriter::try_new(out, &schema)
                .map_err(|e| arrow_failure(&target.temp_path, e))?,
        ),
        MatrixFormat::Parquet => {
            let properties = WriterProperties::builder()
                .set_compression(Compression::ZSTD(ZstdLevel::default()))
                // Ids are unique and values continuous: dictionaries only cost.
                .set_dictionary_enabled(false)
                .set_max_row_group_row_count(Some(rows_per_batch))
                .set_max_row_group_bytes(None)
                .build();
            Sink::Parquet(
                ArrowWriter::try_new(out, schema.clone(), Some(properties))
                    .map_err(|e| parquet_failure(&target.temp_path, e))?,
            )
        }
    };
    Ok(Box::new(StreamingWriter {
        schema,
        n_samples: samples.len(),
        value_type,
        rows_per_batch,
        pending_ids: Vec::with_capacity(rows_per_batch.min(1 << 20)),
        pending_columns: vec![Vec::new(); samples.len()],
        sink: Some(sink),
        target,
    }))
}

enum Sink {
    Ipc(arrow_ipc::writer::FileWriter<BufWriter<File>>),
    Parquet(ArrowWriter<BufWriter<File>>),
}

/// The temporary file and its destination; removed unless committed.
struct TempTarget {
    temp_path: PathBuf,
    final_path: PathBuf,
    file: File,
    committed: bool,
}

impl TempTarget {
    fn create(final_path: &Path) -> Result<Self> {
        let name = final_path.file_name().ok_or_else(|| {
            RiffleError::options(format!("{}: not a file name", final_path.display()))
        })?;
        let mut temp_name = std::ffi::OsString::from(".");
        temp_name.push(name);
        temp_name.push(format!(".tmp-{}", std::process::id()));
        let temp_path = final_path.with_file_name(temp_name);
        let file = File::create(&temp_path).at(&temp_path)?;
        Ok(TempTarget {
            temp_path,
            final_path: final_path.to_path_buf(),
            file,
            committed: false,
        })
    }

    fn commit(&mut self) -> Result<()> {
        self.file.sync_all().at(&self.temp_path)?;
        std::fs::rename(&self.temp_path, &self.final_path).at(&self.final_path)?;
        self.committed = true;
        Ok(())
    }
}

impl Drop for TempTarget {
    fn drop(&mut self) {
        if !self.committed {
            let _ = std::fs::remove_file(&self.temp_path);
        }
    }
}

fn arrow_failure(path: &Path, error: ArrowError) -> RiffleError {
    match error {
        ArrowError::IoError(_, source) => RiffleError::io(path, source),
        other => RiffleError::Internal(format!("{}: writing Arrow IPC: {other}", path.display())),
    }
}

fn parquet_failure(path: &Path, error: ParquetError) -> RiffleError {
    match error {
        ParquetError::External(source) => match source.downcast::<std::io::Error>() {
            Ok(io) => RiffleError::io(path, *io),
            Err(other) => RiffleError::io(path, std::io::Error::other(other.to_string())),
        },
        other => RiffleError::Internal(format!("{}: writing Parquet: {other}", path.display())),
    }
}

struct StreamingWriter {
    schema: SchemaRef,
    n_samples: usize,
    value_type: ValueType,
    rows_per_batch: usize,
    pending_ids: Vec<String>,
    /// Column-major copy of the pending rows, one vector per sample.
    pending_columns: Vec<Vec<f64>>,
    sink: Option<Sink>,
    target: TempTarget,
}

impl StreamingWriter {
    fn flush_pending(&mut self) -> Result<()> {
        if self.pending_ids.is_empty() {
            return Ok(());
        }
        let ids: ArrayRef = Arc::new(StringArray::from_iter_values(self.pending_ids.drain(..)));
        let mut columns = Vec::with_capacity(self.n_samples + 1);
        columns.push(ids);
        for column in &mut self.pending_columns {
            let array: ArrayRef = match self.value_type {
                ValueType::F32 => Arc::new(Float32Array::from_iter_values(
                    column.iter().map(|&v| v as f32),
                )),
                ValueType::F64 => Arc::new(Float64Array::from_iter_values(column.iter().copied())),
            };
            column.clear();
            columns.push(array);
        }
        let batch = RecordBatch::try_new(self.schema.clone(), columns)
            .map_err(|e| RiffleError::Internal(format!("building a record batch: {e}")))?;
        let temp_path = self.target.temp_path.clone();
        match self.sink.as_mut() {
            Some(Sink::Ipc(w)) => w.write(&batch).map_err(|e| arrow_failure(&temp_path, e)),
            Some(Sink::Parquet(w)) => w.write(&batch).map_err(|e| parquet_failure(&temp_path, e)),
            None => Err(RiffleError::Internal("write after finish".into())),
        }
    }
}

impl MatrixWriter for StreamingWriter {
    fn write_block(&mut self, ids: &[String], values: &[f64]) -> Result<()> {
        if values.len() != ids.len() * self.n_samples {
            return Err(RiffleError::Internal(format!(
                "write_block got {} values for {} rows of {} samples",
                values.len(),
                ids.len(),
                self.n_samples
            )));
        }
        let mut row = 0;
        while row < ids.len() {
            let room = self.rows_per_batch - self.pending_ids.len();
            let take = room.min(ids.len() - row);
            self.pending_ids.extend_from_slice(&ids[row..row + take]);
            let rows = &values[row * self.n_samples..(row + take) * self.n_samples];
            for (sample, column) in self.pending_columns.iter_mut().enumerate() {
                column.extend(rows.chunks_exact(self.n_samples).map(|r| r[sample]));
            }
            row += take;
            if self.pending_ids.len() == self.rows_per_batch {
                self.flush_pending()?;
            }
        }
        Ok(())
    }

    fn finish(mut self: Box<Self>) -> Result<()> {
        self.flush_pending()?;
        let temp_path = self.target.temp_path.clone();
        let buffered = match self.sink.take() {
            Some(Sink::Ipc(w)) => w.into_inner().map_err(|e| arrow_failure(&temp_path, e))?,
            Some(Sink::Parquet(w)) => w.into_inner().map_err(|e| parquet_failure(&temp_path, e))?,
            None => return Err(RiffleError::Internal("finish called twice".into())),
        };
        buffered
            .into_inner()
            .map_err(|e| RiffleError::io(&temp_path, e.into_error()))?;
        self.target.commit()
    }
}
