//! Pipeline stage: reader thread -> bounded queue -> worker pool running
//! the kernel -> bounded queue -> ordered writer (the calling thread).
//!
//! Chunks may finish out of order; the writer holds at most the chunks in
//! flight and emits them in feature order, so results do not depend on the
//! thread count or the chunk size.

use std::collections::BTreeMap;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::Instant;

use crossbeam_channel::bounded;

use crate::error::{Result, RiffleError};
use crate::input::{FeatureBlock, FeatureSource};
use crate::kernel::{ChunkOutcome, Kernel, KernelScratch};

/// A finished chunk handed to the writer.
pub struct FinishedChunk {
    pub first_index: u64,
    pub ids: Vec<String>,
    pub outcome: ChunkOutcome,
}

/// Receives finished chunks in feature order. The chunk is lent: its
/// buffers go back to the reader and the workers for later chunks.
pub trait ChunkSink {
    fn accept(&mut self, chunk: &FinishedChunk) -> Result<()>;
}

#[derive(Debug, Clone)]
pub struct PipelineOptions {
    pub threads: usize,
    pub chunk_rows: usize,
    /// Chunks that may wait in each queue.
    pub queue_depth: usize,
    /// Only screen and standardize (the relabelings run in a later pass).
    pub prepare_only: bool,
}

#[derive(Debug, Clone, Default)]
pub struct PipelineStats {
    pub features: u64,
    pub chunks: u64,
    /// Seconds the reader spent inside `next_block`.
    pub read_seconds: f64,
    /// Seconds summed over workers spent in the kernel.
    pub kernel_seconds: f64,
    pub wall_seconds: f64,
}

/// Called by the writer after each chunk with the features done so far.
pub type Progress<'a> = &'a mut dyn FnMut(u64);

pub fn run(
    mut source: Box<dyn FeatureSource>,
    kernel: Arc<Kernel>,
    options: &PipelineOptions,
    stop: &AtomicBool,
    sink: &mut dyn ChunkSink,
    progress: Progress<'_>,
) -> Result<PipelineStats> {
    run_with(&mut *source, kernel, options, stop, sink, progress)
}

/// [`run`] on a borrowed source, which the caller keeps (a later pass may
/// seek in it again).
pub fn run_with(
    source: &mut dyn FeatureSource,
    kernel: Arc<Kernel>,
    options: &PipelineOptions,
    stop: &AtomicBool,
    sink: &mut dyn ChunkSink,
    progress: Progress<'_>,
) -> Result<PipelineStats> {
    let started = Instant::now();
    let threads = options.threads.max(1);
    let chunk_rows = options.chunk_rows.max(1);
    let depth = options.queue_depth.max(1);
    let (work_tx, work_rx) = bounded::<(u64, FeatureBlock)>(depth);
    let (done_tx, done_rx) = bounded::<Result<(u64, FinishedChunk, f64)>>(depth + threads);
    let failed = Arc::new(AtomicBool::new(false));
    let count = !options.prepare_only;
    // Buffers of finished chunks handed back for later ones, so that a
    // chunk does not fault in fresh pages for its values, ids (one string
    // each) and outcomes. At most `POOLED` of each wait here; a full pool
    // drops the buffer, so the memory held is bounded as before plus these.
    let (values_back, values_pool) = bounded::<Vec<f64>>(POOLED);
    let (ids_back, ids_pool) = bounded::<Vec<String>>(POOLED);
    let (outcome_back, outcome_pool) = bounded::<ChunkOutcome>(POOLED);

    std::thread::scope(|scope| -> Result<PipelineStats> {
        let reader_failed = failed.clone();
        let reader_done = done_tx.clone();
        let reader = scope.spawn(move || -> f64 {
            let mut read_seconds = 0.0;
            let mut chunk_index = 0u64;
            loop {
                if stop.load(Ordering::Relaxed) || reader_failed.load(Ordering::Relaxed) {
                    break;
                }
                let mut block = FeatureBlock {
                    values: values_pool.try_recv().unwrap_or_default(),
                    ids: ids_pool.try_recv().unwrap_or_default(),
                    ..FeatureBlock::default()
                };
                let t0 = Instant::now();
                let got = source.next_block(chunk_rows, &mut block);
                read_seconds += t0.elapsed().as_secs_f64();
                match got {
                    Ok(0) => break,
                    Ok(_) => {
                        if work_tx.send((chunk_index, block)).is_err() {
                            break;
                        }
                        chunk_index += 1;
                    }
                    Err(e) => {
                        let _ = reader_done.send(Err(e));
                        break;
                    }
                }
            }
            read_seconds
        });
        for _ in 0..threads {
            let rx = work_rx.clone();
            let tx = done_tx.clone();
            let kernel = kernel.clone();
            let worker_failed = failed.clone();
            let values_back = values_back.clone();
            let outcome_pool = outcome_pool.clone();
            scope.spawn(move || {
                let mut scratch = KernelScratch::default();
                while let Ok((index, block)) = rx.recv() {
                    // Queued chunks are drained unworked once stopping.
                    if worker_failed.load(Ordering::Relaxed) || stop.load(Ordering::Relaxed) {
                        continue;
                    }
                    let t0 = Instant::now();
                    let reuse = outcome_pool.try_recv().ok();
                    let Some(outcome) =
                        run_in_pieces(&kernel, &block, count, &mut scratch, stop, reuse)
                    else {
                        continue;
                    };
                    let seconds = t0.elapsed().as_secs_f64();
                    let _ = values_back.try_send(block.values);
                    let chunk = FinishedChunk {
                        first_index: block.first_index,
                        ids: block.ids,
                        outcome,
                    };
                    if tx.send(Ok((index, chunk, seconds))).is_err() {
                        break;
                    }
                }
            });
        }
        drop(work_rx);
        drop(done_tx);
        drop(values_back);
        drop(outcome_pool);

        let mut stats = PipelineStats::default();
        let mut pending: BTreeMap<u64, FinishedChunk> = BTreeMap::new();
        let mut next = 0u64;
        let mut outcome: Result<()> = Ok(());
        for message in done_rx.iter() {
            if outcome.is_err() {
                continue;
            }
            match message {
                Ok((index, chunk, seconds)) => {
                    stats.kernel_seconds += seconds;
                    pending.insert(index, chunk);
                    while let Some(chunk) = pending.remove(&next) {
                        stats.features += chunk.ids.len() as u64;
                        stats.chunks += 1;
                        if let Err(e) = sink.accept(&chunk) {
                            outcome = Err(e);
                            failed.store(true, Ordering::Relaxed);
                            break;
                        }
                        let _ = ids_back.try_send(chunk.ids);
                        let _ = outcome_back.try_send(chunk.outcome);
                        next += 1;
                        progress(stats.features);
                    }
                }
                Err(e) => {
                    outcome = Err(e);
                    failed.store(true, Ordering::Relaxed);
                }
            }
        }
        stats.read_seconds = reader
            .join()
            .map_err(|_| RiffleError::Internal("the reader thread panicked".into()))?;
        outcome?;
        if stop.load(Ordering::Relaxed) {
            return Err(RiffleError::Interrupted);
        }
        if !pending.is_empty() {
            return Err(RiffleError::Internal("chunks left unwritten".into()));
        }
        stats.wall_seconds = started.elapsed().as_secs_f64();
        Ok(stats)
    })
}

/// Buffers of each kind waiting to be reused: in steady state the reader
/// and the workers take each one back as soon as it comes, so one keeps
/// them supplied whatever the thread count, and the memory held beyond the
/// chunks in flight stays one chunk's worth.
const POOLED: usize = 1;

/// Rows per kernel call inside a chunk: a large chunk against thousands of
/// relabelings takes seconds, and an interrupt must not wait for it.
const PIECE_ROWS: usize = 4096;

/// The kernel over a chunk in pieces, checking `stop` between them; `None`
/// when stopped. Results do not depend on how rows are grouped (counts are
/// exact per feature; maxima and histograms merge), so this equals one call.
/// Every piece writes into one outcome whose vectors come from `reuse` (a
/// finished chunk's, handed back by the writer).
///
/// Standardized rows are kept only without `count`: the step-down sorter
/// reads them, and step-down runs only prepare here (its relabelings run in
/// the rank pass); a counting run never reads them, and copying them was a
/// large share of a small-B run's page faults.
fn run_in_pieces(
    kernel: &Kernel,
    block: &FeatureBlock,
    count: bool,
    scratch: &mut KernelScratch,
    stop: &AtomicBool,
    reuse: Option<ChunkOutcome>,
) -> Option<ChunkOutcome> {
    let rows = block.rows();
    let keep_rows = !count;
    let mut out = reuse.unwrap_or_default();
    out.features.clear();
    out.standardized.clear();
    out.null_max.clear();
    out.null_hist.clear();
    if !count || rows <= PIECE_ROWS {
        kernel.run_chunk_into(&block.values, rows, count, keep_rows, scratch, &mut out);
        return Some(out);
    }
    out.features.reserve(rows);
    let n = block.n_samples;
    for start in (0..rows).step_by(PIECE_ROWS) {
        if stop.load(Ordering::Relaxed) {
            return None;
        }
        let piece_rows = PIECE_ROWS.min(rows - start);
        let values = &block.values[start * n..(start + piece_rows) * n];
        kernel.run_chunk_into(values, piece_rows, count, keep_rows, scratch, &mut out);
    }
    Some(out)
}

#[cfg(test)]
mod tests;
