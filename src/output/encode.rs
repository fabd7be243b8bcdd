//! Parquet row groups encoded on several threads, written in order.
//!
//! At small B the results table is most of a scan's final pass: per value,
//! dictionary attempts, statistics and zstd. Row groups are independent
//! until they are appended to the file, so each finished batch (exactly one
//! row group) is encoded by whichever encoder thread is free, and one
//! writer thread appends the encoded column chunks in row-group order.
//! Every row group goes through the same column writers with the same
//! properties as `ArrowWriter` would use, and is appended the way
//! `ArrowWriter::flush` appends it, so the file bytes do not depend on the
//! number of threads (tested against a plain `ArrowWriter`).

use std::collections::BTreeMap;
use std::fs::File;
use std::io::BufWriter;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::thread::JoinHandle;

use arrow_array::RecordBatch;
use arrow_schema::SchemaRef;
use crossbeam_channel::{bounded, Receiver, Sender};
use parquet::arrow::arrow_writer::{compute_leaves, ArrowColumnChunk, ArrowRowGroupWriterFactory};
use parquet::arrow::ArrowWriter;
use parquet::errors::ParquetError;
use parquet::file::properties::WriterProperties;
use parquet::file::writer::SerializedFileWriter;

use crate::error::{IoContext, Result, RiffleError};

type Encoded = (usize, Result<Vec<ArrowColumnChunk>>);

/// Encodes batches on `threads` threads; each batch becomes one row group.
pub(crate) struct RowGroupEncoder {
    temp: PathBuf,
    batches: usize,
    /// Rendezvous: a batch is handed over only when an encoder is free, so
    /// at most `threads` batches are encoded while the caller fills one.
    work: Option<Sender<(usize, RecordBatch)>>,
    finish: Option<Sender<usize>>,
    encoders: Vec<JoinHandle<()>>,
    writer: Option<JoinHandle<Result<()>>>,
}

fn parquet_error(path: &Path) -> impl Fn(ParquetError) -> RiffleError + '_ {
    move |e| RiffleError::io(path, std::io::Error::other(e))
}

impl RowGroupEncoder {
    pub(crate) fn new(
        temp: &Path,
        out: BufWriter<File>,
        schema: SchemaRef,
        props: WriterProperties,
        threads: usize,
    ) -> Result<Self> {
        let err = parquet_error(temp);
        // ArrowWriter builds the file writer (schema conversion, the Arrow
        // schema in the key-value metadata) exactly as a serial write would.
        let (file_writer, factory) = ArrowWriter::try_new(out, schema.clone(), Some(props))
            .and_then(|w| w.into_serialized_writer())
            .map_err(&err)?;
        let factory = Arc::new(factory);
        let threads = threads.max(1);
        let (work_tx, work_rx) = bounded::<(usize, RecordBatch)>(0);
        let (done_tx, done_rx) = bounded::<Encoded>(threads);
        let (finish_tx, finish_rx) = bounded::<usize>(1);
        let mut encoders = Vec::with_capacity(threads);
        for _ in 0..threads {
            let work_rx = work_rx.clone();
            let done_tx = done_tx.clone();
            let factory = factory.clone();
            let schema = schema.clone();
            let encoder_temp = temp.to_path_buf();
            encoders.push(
                std::thread::Builder::new()
                    .name("riffle-encode".into())
                    .spawn(move || {
                        while let Ok((index, batch)) = work_rx.recv() {
                            let encoded = encode(&factory, &schema, index, &batch)
                                .map_err(parquet_error(&encoder_temp));
                            if done_tx.send((index, encoded)).is_err() {
                                break;
                            }
                        }
                    })
                    .at(temp)?,
            );
        }
        drop(done_tx);
        let writer_temp = temp.to_path_buf();
        let writer = std::thread::Builder::new()
            .name("riffle-append".into())
            .spawn(move || append_in_order(file_writer, done_rx, finish_rx, &writer_temp))
            .at(temp)?;
        Ok(RowGroupEncoder {
            temp: temp.to_path_buf(),
            batches: 0,
            work: Some(work_tx),
            finish: Some(finish_tx),
            encoders,
            writer: Some(writer),
        })
    }

    /// Queues one row group; blocks until an encoder takes it.
    pub(crate) fn write(&mut self, batch: RecordBatch) -> Result<()> {
        let sent = self
            .work
            .as_ref()
            .is_some_and(|tx| tx.send((self.batches, batch)).is_ok());
        if !sent {
            return Err(self.stop().err().unwrap_or_else(|| {
                RiffleError::Internal("the results encoder stopped early".into())
            }));
        }
        self.batches += 1;
        Ok(())
    }

    /// Appends what is queued, writes the footer and syncs the file.
    pub(crate) fn finish(mut self) -> Result<()> {
        if let Some(finish) = self.finish.take() {
            // The writer reads this only after every encoder has stopped.
            let _ = finish.send(self.batches);
        }
        self.stop()
    }

    /// Closes the queue and joins every thread; the writer's result.
    fn stop(&mut self) -> Result<()> {
        self.work = None;
        for handle in self.encoders.drain(..) {
            let _ = handle.join();
        }
        self.finish = None;
        match self.writer.take() {
            Some(handle) => handle.join().map_err(|_| {
                RiffleError::Internal(format!(
                    "the results writer of {} panicked",
                    self.temp.display()
                ))
            })?,
            None => Ok(()),
        }
    }
}

impl Drop for RowGroupEncoder {
    fn drop(&mut self) {
        // Without a finish message the writer abandons the temporary file
        // (never renamed into place); errors here only repeat an earlier one.
        let _ = self.stop();
    }
}

/// One row group, as `ArrowWriter` encodes a batch that fills it.
fn encode(
    factory: &ArrowRowGroupWriterFactory,
    schema: &SchemaRef,
    index: usize,
    batch: &RecordBatch,
) -> std::result::Result<Vec<ArrowColumnChunk>, ParquetError> {
    let mut writers = factory.create_column_writers(index)?;
    let mut next = writers.iter_mut();
    for (field, column) in schema.fields().iter().zip(batch.columns()) {
        for leaf in compute_leaves(field.as_ref(), column)? {
            next.next()
                .ok_or_else(|| ParquetError::General("more leaves than column writers".into()))?
                .write(&leaf)?;
        }
    }
    writers.into_iter().map(|w| w.close()).collect()
}

fn append_in_order(
    mut file_writer: SerializedFileWriter<BufWriter<File>>,
    done: Receiver<Encoded>,
    finish: Receiver<usize>,
    temp: &Path,
) -> Result<()> {
    let err = parquet_error(temp);
    let mut pending: BTreeMap<usize, Vec<ArrowColumnChunk>> = BTreeMap::new();
    let mut next = 0usize;
    // Returning early drops `done`, which stops the encoders in turn.
    for (index, encoded) in done.iter() {
        pending.insert(index, encoded?);
        while let Some(chunks) = pending.remove(&next) {
            let mut row_group = file_writer.next_row_group().map_err(&err)?;
            for chunk in chunks {
                chunk.append_to_row_group(&mut row_group).map_err(&err)?;
            }
            row_group.close().map_err(&err)?;
            next += 1;
        }
    }
    match finish.try_recv() {
        Ok(batches) if batches == next && pending.is_empty() => {
            let out = file_writer.into_inner().map_err(&err)?;
            let file = out
                .into_inner()
                .map_err(|e| RiffleError::io(temp, e.into_error()))?;
            file.sync_all().at(temp)
        }
        Ok(_) => Err(RiffleError::Internal(format!(
            "{}: row groups missing at the end of the results",
            temp.display()
        ))),
        // No finish message: the caller gave up (an error elsewhere).
        Err(_) => Ok(()),
    }
}
