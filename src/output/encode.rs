//! Parquet row groups whose columns are encoded on several threads.
//!
//! At small B the results table is a large part of a scan's final pass:
//! per value, dictionary lookups, statistics and zstd. The columns of a row
//! group are independent until they are appended to the file, so each
//! batch (exactly one row group) has its columns encoded by up to
//! `threads` threads, then appended in column order the way
//! `ArrowWriter::flush` appends them. Every column goes through the same
//! column writer with the same properties as in `ArrowWriter`, so the file
//! bytes do not depend on the number of threads (tested against a plain
//! `ArrowWriter`). One row group is in memory at a time, as with
//! `ArrowWriter`: encoding the next batch while the caller fills another
//! would hold one more batch (~11 MB), which the flat-memory target cannot
//! afford.

use std::fs::File;
use std::io::BufWriter;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Mutex;

use arrow_array::{ArrayRef, RecordBatch};
use arrow_schema::{Field, SchemaRef};
use parquet::arrow::arrow_writer::{
    compute_leaves, ArrowColumnChunk, ArrowColumnWriter, ArrowRowGroupWriterFactory,
};
use parquet::arrow::ArrowWriter;
use parquet::errors::ParquetError;
use parquet::file::properties::WriterProperties;
use parquet::file::writer::SerializedFileWriter;

use crate::error::{IoContext, Result, RiffleError};

/// Writes each batch as one row group, its columns encoded in parallel.
pub(crate) struct RowGroupEncoder {
    temp: PathBuf,
    schema: SchemaRef,
    file_writer: SerializedFileWriter<BufWriter<File>>,
    factory: ArrowRowGroupWriterFactory,
    threads: usize,
    row_groups: usize,
}

impl RowGroupEncoder {
    pub(crate) fn new(
        temp: &Path,
        out: BufWriter<File>,
        schema: SchemaRef,
        props: WriterProperties,
        threads: usize,
    ) -> Result<Self> {
        // ArrowWriter builds the file writer (schema conversion, the Arrow
        // schema in the key-value metadata) exactly as a serial write would.
        let (file_writer, factory) = ArrowWriter::try_new(out, schema.clone(), Some(props))
            .and_then(|w| w.into_serialized_writer())
            .map_err(|e| parquet_error(temp, e))?;
        Ok(RowGroupEncoder {
            temp: temp.to_path_buf(),
            schema,
            file_writer,
            factory,
            threads: threads.max(1),
            row_groups: 0,
        })
    }

    /// Encodes `batch` as the next row group and appends it to the file.
    pub(crate) fn write(&mut self, batch: &RecordBatch) -> Result<()> {
        let err = |e| parquet_error(&self.temp, e);
        let writers = self
            .factory
            .create_column_writers(self.row_groups)
            .map_err(err)?;
        if self.schema.fields().len() != writers.len() {
            return Err(RiffleError::Internal(format!(
                "{}: {} columns for {} column writers",
                self.temp.display(),
                self.schema.fields().len(),
                writers.len()
            )));
        }
        let fields: Vec<&Field> = self.schema.fields().iter().map(|f| f.as_ref()).collect();
        let chunks =
            encode_columns(writers, &fields, batch.columns(), self.threads).map_err(err)?;
        let mut row_group = self.file_writer.next_row_group().map_err(err)?;
        for chunk in chunks {
            chunk.append_to_row_group(&mut row_group).map_err(err)?;
        }
        row_group.close().map_err(err)?;
        self.row_groups += 1;
        Ok(())
    }

    /// Writes the footer and syncs the file.
    pub(crate) fn finish(self) -> Result<()> {
        let out = self
            .file_writer
            .into_inner()
            .map_err(|e| parquet_error(&self.temp, e))?;
        let file = out
            .into_inner()
            .map_err(|e| RiffleError::io(&self.temp, e.into_error()))?;
        file.sync_all().at(&self.temp)
    }
}

fn parquet_error(path: &Path, e: ParquetError) -> RiffleError {
    RiffleError::io(path, std::io::Error::other(e))
}

/// Each writer gets its leaf and is closed; threads take the next column
/// as they become free (columns differ a lot in cost: ids, continuous
/// floats, a few words). The chunks come back in column order.
fn encode_columns(
    writers: Vec<ArrowColumnWriter>,
    fields: &[&Field],
    columns: &[ArrayRef],
    threads: usize,
) -> std::result::Result<Vec<ArrowColumnChunk>, ParquetError> {
    // A column's levels (a u16 and a usize per row of a nullable column,
    // ~0.6 MB per column of a 65,536-row group) are computed by the thread
    // that encodes it and dropped with it, not for all columns up front.
    let one = |mut writer: ArrowColumnWriter, i: usize| {
        let leaves = compute_leaves(fields[i], &columns[i])?;
        let [leaf] = leaves.as_slice() else {
            return Err(ParquetError::General(format!(
                "column {} has {} leaves; the results table has flat columns",
                fields[i].name(),
                leaves.len()
            )));
        };
        writer.write(leaf)?;
        writer.close()
    };
    let threads = threads.min(writers.len());
    if threads <= 1 {
        return writers
            .into_iter()
            .enumerate()
            .map(|(i, w)| one(w, i))
            .collect();
    }
    let slots: Vec<Mutex<Option<ArrowColumnWriter>>> =
        writers.into_iter().map(|w| Mutex::new(Some(w))).collect();
    let done: Vec<Mutex<Option<std::result::Result<ArrowColumnChunk, ParquetError>>>> =
        slots.iter().map(|_| Mutex::new(None)).collect();
    let next = AtomicUsize::new(0);
    let work = || loop {
        let i = next.fetch_add(1, Ordering::Relaxed);
        let Some(slot) = slots.get(i) else { break };
        let writer = slot.lock().ok().and_then(|mut s| s.take());
        let chunk = match writer {
            Some(writer) => one(writer, i),
            None => Err(ParquetError::General("column writer taken twice".into())),
        };
        if let Ok(mut d) = done[i].lock() {
            *d = Some(chunk);
        }
    };
    std::thread::scope(|scope| {
        for _ in 1..threads {
            scope.spawn(work);
        }
        work();
    });
    done.into_iter()
        .map(|d| {
            d.into_inner()
                .ok()
                .flatten()
                .unwrap_or_else(|| Err(ParquetError::General("a column was not encoded".into())))
        })
        .collect()
}
