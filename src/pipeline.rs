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

/// Receives finished chunks in feature order.
pub trait ChunkSink {
    fn accept(&mut self, chunk: FinishedChunk) -> Result<()>;
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
                let mut block = FeatureBlock::default();
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
            scope.spawn(move || {
                let mut scratch = KernelScratch::default();
                while let Ok((index, block)) = rx.recv() {
                    // Queued chunks are drained unworked once stopping.
                    if worker_failed.load(Ordering::Relaxed) || stop.load(Ordering::Relaxed) {
                        continue;
                    }
                    let t0 = Instant::now();
                    let Some(outcome) = run_in_pieces(&kernel, &block, count, &mut scratch, stop)
                    else {
                        continue;
                    };
                    let seconds = t0.elapsed().as_secs_f64();
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
                        if let Err(e) = sink.accept(chunk) {
                            outcome = Err(e);
                            failed.store(true, Ordering::Relaxed);
                            break;
                        }
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

/// Rows per kernel call inside a chunk: a large chunk against thousands of
/// relabelings takes seconds, and an interrupt must not wait for it.
const PIECE_ROWS: usize = 4096;

/// The kernel over a chunk in pieces, checking `stop` between them; `None`
/// when stopped. Results do not depend on how rows are grouped (counts are
/// exact per feature; maxima and histograms merge), so this equals one call.
fn run_in_pieces(
    kernel: &Kernel,
    block: &FeatureBlock,
    count: bool,
    scratch: &mut KernelScratch,
    stop: &AtomicBool,
) -> Option<ChunkOutcome> {
    let rows = block.rows();
    if !count || rows <= PIECE_ROWS {
        return Some(kernel.run_chunk(&block.values, rows, count, scratch));
    }
    let n = block.n_samples;
    let mut merged: Option<ChunkOutcome> = None;
    for start in (0..rows).step_by(PIECE_ROWS) {
        if stop.load(Ordering::Relaxed) {
            return None;
        }
        let piece_rows = PIECE_ROWS.min(rows - start);
        let values = &block.values[start * n..(start + piece_rows) * n];
        let piece = kernel.run_chunk(values, piece_rows, count, scratch);
        merged = Some(match merged {
            None => {
                // Room for the whole chunk at once: growing by doubling
                // copied every piece again (5% of a B = 100 run).
                let mut all = piece;
                let rest = rows - piece_rows;
                all.features.reserve(rest);
                all.standardized
                    .reserve(all.standardized.len() / piece_rows.max(1) * rest);
                all
            }
            Some(mut all) => {
                all.features.extend(piece.features);
                all.standardized.extend(piece.standardized);
                for (m, v) in all.null_max.iter_mut().zip(&piece.null_max) {
                    *m = m.max(*v);
                }
                if all.null_hist.is_empty() {
                    all.null_hist = piece.null_hist;
                } else {
                    for (h, v) in all.null_hist.iter_mut().zip(&piece.null_hist) {
                        *h += v;
                    }
                }
                all
            }
        });
    }
    merged
}
