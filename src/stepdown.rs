//! Westfall–Young step-down maxT (Westfall & Young 1993, "Resampling-based
//! multiple testing", Wiley; algorithm 4.1 there, in the successive-maxima
//! form of Ge, Dudoit & Speed 2003, "Resampling-based multiple testing for
//! microarray data analysis", TEST 12), exact, in memory O(B) plus bounded
//! buffers:
//!
//! 1. the first pass standardizes every feature and hands its observed
//!    kernel statistic, index and standardized row to a [`RowSorter`]
//!    (sorted runs on disk);
//! 2. the rank pass streams the rows back in ascending order of observed
//!    statistic and runs the GEMM kernel over them, keeping one running
//!    maximum per relabelling: for feature j, `reached_j` counts the
//!    relabelings whose maximum over j and every less extreme feature
//!    reaches T_j, and p~_j = (reached_j + 1) / (B + 1); the same pass counts
//!    each feature's own exceedances (its permutation p-value);
//! 3. the reverse pass reads those records from the most extreme feature
//!    down, takes the running maximum of p~ (the step-down monotonicity),
//!    and scatters the results back to feature order through index-range
//!    bucket files;
//! 4. the spill records are rewritten with the counts and p_maxt.
//!
//! Parallelism in the rank pass is over relabelings (each worker owns a
//! contiguous range of them and sees every row in order), so results do not
//! depend on the thread count.

use std::cmp::Ordering as CmpOrdering;
use std::collections::BinaryHeap;
use std::fs::File;
use std::io::{BufReader, BufWriter, Read, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;

use crossbeam_channel::bounded;

use crate::error::{IoContext, Result, RiffleError};
use crate::kernel::{Kernel, KernelScratch, NullHistogram, RankState};

/// External sort of standardized rows by (observed statistic, index).
///
/// Two half-size buffers: while one is sorted and written as a run on a
/// background thread, the caller (the pipeline's collecting thread) fills
/// the other, so sorting and writing overlap reading and standardizing
/// instead of stalling them. Peak memory is the same as one full-size
/// buffer; the run count doubles, which the merge's fixed read budget
/// absorbs, and the merged order (a total order on (key, index)) does not
/// depend on how the rows were split into runs.
pub struct RowSorter {
    dir: PathBuf,
    n: usize,
    /// Rows per buffer (half the budget).
    capacity_rows: usize,
    /// Read buffers of all runs together during the merge.
    merge_bytes: u64,
    keys: Vec<(f64, u64)>,
    rows: Vec<f64>,
    runs: Vec<PathBuf>,
    /// The run being written; gives back its emptied buffers for reuse.
    writing: Option<std::thread::JoinHandle<Result<RunBuffers>>>,
}

type RunBuffers = (Vec<(f64, u64)>, Vec<f64>);

impl RowSorter {
    pub fn new(dir: &Path, n: usize, memory_bytes: u64) -> Result<Self> {
        Self::resume(dir, n, memory_bytes, 0)
    }

    /// A sorter whose first `runs` run files (from `commit`) are kept and
    /// any later ones, left by an interrupted process, removed.
    pub fn resume(dir: &Path, n: usize, memory_bytes: u64, runs: usize) -> Result<Self> {
        std::fs::create_dir_all(dir).at(dir)?;
        let per_row = (16 + 8 * n) as u64;
        let capacity_rows = (memory_bytes / per_row / 2).clamp(32, 1 << 23) as usize;
        let paths: Vec<PathBuf> = (0..runs).map(|r| run_path(dir, r)).collect();
        for p in &paths {
            if !p.is_file() {
                return Err(RiffleError::bad_input(
                    p,
                    "checkpoint",
                    "a sorted run named by the checkpoint is missing",
                ));
            }
        }
        for entry in std::fs::read_dir(dir).at(dir)?.flatten() {
            let path = entry.path();
            if path.extension().is_some_and(|e| e == "bin") && !paths.contains(&path) {
                let _ = std::fs::remove_file(&path);
            }
        }
        Ok(RowSorter {
            dir: dir.to_path_buf(),
            n,
            capacity_rows,
            merge_bytes: memory_bytes / 4,
            keys: Vec::new(),
            rows: Vec::new(),
            runs: paths,
            writing: None,
        })
    }

    /// Writes the rows held in memory as a run and makes every run durable;
    /// returns the number of runs (for `resume`).
    pub fn commit(&mut self) -> Result<usize> {
        self.write_run()?;
        self.wait()?;
        Ok(self.runs.len())
    }

    pub fn push(&mut self, key: f64, index: u64, row: &[f64]) -> Result<()> {
        if self.keys.capacity() == 0 {
            // Once, at the full size: growing by doubling would copy and
            // could leave up to twice the budget resident.
            self.keys.reserve_exact(self.capacity_rows);
            self.rows.reserve_exact(self.capacity_rows * self.n);
        }
        self.keys.push((key, index));
        self.rows.extend_from_slice(row);
        if self.keys.len() >= self.capacity_rows {
            self.write_run()?;
        }
        Ok(())
    }

    /// Waits for the run being written, if any, and keeps its buffers for
    /// the next fill when the fill buffers have been handed off.
    fn wait(&mut self) -> Result<()> {
        let Some(handle) = self.writing.take() else {
            return Ok(());
        };
        let (keys, rows) = handle
            .join()
            .map_err(|_| RiffleError::Internal("the run writer thread panicked".into()))??;
        if self.keys.capacity() == 0 {
            self.keys = keys;
            self.rows = rows;
        }
        Ok(())
    }

    /// Hands the rows held in memory to a background thread that sorts and
    /// writes them as the next run; at most one run is in flight, so at
    /// most two buffers exist.
    fn write_run(&mut self) -> Result<()> {
        if self.keys.is_empty() {
            return Ok(());
        }
        let keys = std::mem::take(&mut self.keys);
        let rows = std::mem::take(&mut self.rows);
        // The previous run's buffers, once written, become the next fill.
        self.wait()?;
        let path = run_path(&self.dir, self.runs.len());
        self.runs.push(path.clone());
        let n = self.n;
        let handle = std::thread::Builder::new()
            .name("riffle-run-writer".into())
            .spawn(move || write_sorted_run(&path, n, keys, rows))
            .map_err(|e| RiffleError::Internal(format!("cannot start the run writer: {e}")))?;
        self.writing = Some(handle);
        Ok(())
    }

    pub fn finish(mut self) -> Result<SortedRows> {
        self.write_run()?;
        self.wait()?;
        // The sort buffers are no longer needed; the merge's read buffers
        // share a fixed budget, so many runs do not add memory.
        self.keys = Vec::new();
        self.rows = Vec::new();
        let per_run =
            (self.merge_bytes / self.runs.len().max(1) as u64).clamp(16 << 10, 256 << 10) as usize;
        let mut runs = Vec::new();
        let mut heap = BinaryHeap::new();
        for (r, path) in self.runs.iter().enumerate() {
            let file = File::open(path).at(path)?;
            let mut run = RunReader {
                path: path.clone(),
                input: BufReader::with_capacity(per_run, file),
                key: (0.0, 0),
                row: vec![0.0; self.n],
                buf: vec![0u8; 16 + 8 * self.n],
            };
            if run.advance()? {
                heap.push(HeapEntry {
                    key: run.key,
                    run: r,
                });
            }
            runs.push(run);
        }
        Ok(SortedRows {
            n: self.n,
            runs,
            heap,
        })
    }
}

impl Drop for RowSorter {
    // A run still being written when the sorter is dropped (an error or
    // an interruption elsewhere) must not outlive it and write into a
    // directory being removed.
    fn drop(&mut self) {
        if let Some(handle) = self.writing.take() {
            let _ = handle.join();
        }
    }
}

/// Sorts one buffer and writes it as a durable run file; returns the
/// emptied buffers.
fn write_sorted_run(
    path: &Path,
    n: usize,
    mut keys: Vec<(f64, u64)>,
    mut rows: Vec<f64>,
) -> Result<RunBuffers> {
    let mut order: Vec<usize> = (0..keys.len()).collect();
    order.sort_unstable_by(|&a, &b| compare_keys(keys[a], keys[b]));
    let mut out = BufWriter::with_capacity(1 << 20, File::create(path).at(path)?);
    // One record at a time through a small buffer: one write call per row
    // instead of one per value.
    let mut record = vec![0u8; 16 + 8 * n];
    for &i in &order {
        let (key, index) = keys[i];
        record[..8].copy_from_slice(&key.to_le_bytes());
        record[8..16].copy_from_slice(&index.to_le_bytes());
        for (slot, v) in record[16..]
            .chunks_exact_mut(8)
            .zip(&rows[i * n..(i + 1) * n])
        {
            slot.copy_from_slice(&v.to_le_bytes());
        }
        out.write_all(&record).at(path)?;
    }
    let file = out
        .into_inner()
        .map_err(|e| RiffleError::io(path, e.into_error()))?;
    file.sync_all().at(path)?;
    keys.clear();
    rows.clear();
    Ok((keys, rows))
}

fn run_path(dir: &Path, run: usize) -> PathBuf {
    dir.join(format!("rows-{run:05}.bin"))
}

fn compare_keys(a: (f64, u64), b: (f64, u64)) -> CmpOrdering {
    a.0.total_cmp(&b.0).then(a.1.cmp(&b.1))
}

struct RunReader {
    path: PathBuf,
    input: BufReader<File>,
    key: (f64, u64),
    row: Vec<f64>,
    buf: Vec<u8>,
}

impl RunReader {
    fn advance(&mut self) -> Result<bool> {
        match self.input.read_exact(&mut self.buf) {
            Ok(()) => {}
            Err(e) if e.kind() == std::io::ErrorKind::UnexpectedEof => return Ok(false),
            Err(e) => return Err(RiffleError::io(&self.path, e)),
        }
        let word = |i: usize| self.buf[i * 8..i * 8 + 8].try_into().unwrap();
        self.key = (f64::from_le_bytes(word(0)), u64::from_le_bytes(word(1)));
        for (k, v) in self.row.iter_mut().enumerate() {
            *v = f64::from_le_bytes(word(k + 2));
        }
        Ok(true)
    }
}

struct HeapEntry {
    key: (f64, u64),
    run: usize,
}

impl PartialEq for HeapEntry {
    fn eq(&self, other: &Self) -> bool {
        self.cmp(other) == CmpOrdering::Equal
    }
}
impl Eq for HeapEntry {}
impl PartialOrd for HeapEntry {
    fn partial_cmp(&self, other: &Self) -> Option<CmpOrdering> {
        Some(self.cmp(other))
    }
}
impl Ord for HeapEntry {
    // Reversed: BinaryHeap is a max-heap and we want the smallest key.
    fn cmp(&self, other: &Self) -> CmpOrdering {
        compare_keys(other.key, self.key)
    }
}

/// The merged runs, read in ascending order.
/// The run files stay until the caller removes them (after the rank pass
/// has been committed), so an interrupted rank pass can start again.
pub struct SortedRows {
    n: usize,
    runs: Vec<RunReader>,
    heap: BinaryHeap<HeapEntry>,
}

/// Consecutive rows of the rank order.
pub struct RankChunk {
    pub keys: Vec<f64>,
    pub indices: Vec<u64>,
    pub rows: Vec<f64>,
}

impl SortedRows {
    pub fn next_chunk(&mut self, max_rows: usize) -> Result<Option<RankChunk>> {
        let mut chunk = RankChunk {
            keys: Vec::with_capacity(max_rows),
            indices: Vec::with_capacity(max_rows),
            rows: Vec::with_capacity(max_rows * self.n),
        };
        while chunk.keys.len() < max_rows {
            let Some(top) = self.heap.pop() else { break };
            let run = &mut self.runs[top.run];
            chunk.keys.push(run.key.0);
            chunk.indices.push(run.key.1);
            chunk.rows.extend_from_slice(&run.row);
            if run.advance()? {
                self.heap.push(HeapEntry {
                    key: run.key,
                    run: top.run,
                });
            }
        }
        Ok((!chunk.keys.is_empty()).then_some(chunk))
    }
}

/// Rows per kernel call of the rank pass: a multiple of the kernel's row
/// tile, small enough to be done in well under a second.
const RANK_PIECE_ROWS: usize = 4096;

/// A worker's part of one chunk: (sequence number, exceedance counts,
/// reached counts, and from the first worker the chunk's ids and keys).
type Part = (u64, Vec<u64>, Vec<u64>, Option<(Vec<u64>, Vec<f64>)>);

/// A chunk whose parts are being summed.
struct Pending {
    parts: usize,
    exceed: Vec<u64>,
    reached: Vec<u64>,
    order: Option<(Vec<u64>, Vec<f64>)>,
}

/// Per-feature outcome of the rank pass, in rank order.
pub const RANK_RECORD: usize = 24;

/// Runs the rank pass and writes (index, exceed, reached) records in
/// ascending rank order to `rank_file`. Returns the per-relabelling maxima
/// over all features (for single-step maxT) and, when the kernel keeps one,
/// the pooled null histogram.
pub fn rank_pass(
    kernel: Arc<Kernel>,
    sorted: SortedRows,
    threads: usize,
    chunk_rows: usize,
    rank_file: &Path,
    stop: &AtomicBool,
    progress: &mut dyn FnMut(u64),
) -> Result<(Vec<f64>, Option<NullHistogram>)> {
    let output = rank_pass_with(
        kernel, sorted, threads, chunk_rows, rank_file, None, stop, progress,
    )?;
    Ok((output.null_max, output.histogram))
}

/// A rank-pass worker's maxima, histogram counts and step functions.
type WorkerResult = (Vec<f64>, Vec<u64>, Vec<Vec<(f64, f64)>>);

/// What the rank pass leaves besides the rank file.
pub struct RankPassOutput {
    pub null_max: Vec<f64>,
    pub histogram: Option<NullHistogram>,
    /// With a shard keys file: per relabelling, the running-maximum step
    /// function (see `RankState::record_maxima`).
    pub step_functions: Option<Vec<Vec<(f64, f64)>>>,
}

/// The rank pass; with `shard_keys`, also records the step functions and
/// writes (statistic, index, exceed) in rank order to that file, which is
/// what a later merge of shards needs.
#[allow(clippy::too_many_arguments)]
pub fn rank_pass_with(
    kernel: Arc<Kernel>,
    mut sorted: SortedRows,
    threads: usize,
    chunk_rows: usize,
    rank_file: &Path,
    shard_keys: Option<&Path>,
    stop: &AtomicBool,
    progress: &mut dyn FnMut(u64),
) -> Result<RankPassOutput> {
    let recording = shard_keys.is_some();
    let mut keys_out = match shard_keys {
        Some(p) => Some(BufWriter::with_capacity(1 << 20, File::create(p).at(p)?)),
        None => None,
    };
    let b_total = kernel.relabelings().count;
    let workers = threads.clamp(1, b_total.max(1));
    let ranges: Vec<(usize, usize)> = (0..workers)
        .map(|w| {
            let start = b_total * w / workers;
            let end = b_total * (w + 1) / workers;
            (start, end - start)
        })
        .collect();
    let mut out = BufWriter::with_capacity(1 << 20, File::create(rank_file).at(rank_file)?);
    let failed = AtomicBool::new(false);

    let result = std::thread::scope(|scope| -> Result<RankPassOutput> {
        let (part_tx, part_rx) = bounded::<Part>(2 * workers + 2);
        let mut chunk_txs = Vec::new();
        let mut handles = Vec::new();
        for (w, &(col0, cols)) in ranges.iter().enumerate() {
            let (tx, rx) = bounded::<(u64, Arc<RankChunk>)>(2);
            chunk_txs.push(tx);
            let part_tx = part_tx.clone();
            let kernel = kernel.clone();
            let failed = &failed;
            handles.push(scope.spawn(move || -> WorkerResult {
                let mut state = RankState::new(col0, cols, kernel.pooled_null());
                if recording {
                    state = state.record_maxima();
                }
                let mut scratch = KernelScratch::default();
                'chunks: while let Ok((seq, chunk)) = rx.recv() {
                    if failed.load(Ordering::Relaxed) || stop.load(Ordering::Relaxed) {
                        continue;
                    }
                    let rows = chunk.keys.len();
                    let mut exceed = vec![0u64; rows];
                    let mut reached = vec![0u64; rows];
                    // In pieces of whole row tiles, so that an interrupt is
                    // noticed within a fraction of a second; rows are visited
                    // in the same order either way, so the running maxima
                    // and counts are unchanged.
                    let n = chunk.rows.len() / rows.max(1);
                    for start in (0..rows).step_by(RANK_PIECE_ROWS) {
                        if stop.load(Ordering::Relaxed) {
                            continue 'chunks;
                        }
                        let end = (start + RANK_PIECE_ROWS).min(rows);
                        kernel.rank_rows(
                            &chunk.rows[start * n..end * n],
                            &chunk.keys[start..end],
                            &mut state,
                            &mut exceed[start..end],
                            &mut reached[start..end],
                            &mut scratch,
                        );
                    }
                    // The first worker carries the chunk's ids and keys to the
                    // collector, which then holds only chunks in flight.
                    let order = (w == 0).then(|| {
                        let keys = if recording {
                            chunk.keys.clone()
                        } else {
                            Vec::new()
                        };
                        (chunk.indices.clone(), keys)
                    });
                    if part_tx.send((seq, exceed, reached, order)).is_err() {
                        break;
                    }
                }
                (state.maxima, state.histogram, state.records)
            }));
        }
        drop(part_tx);

        // Reader: merge the runs and hand every chunk to every worker.
        let reader = scope.spawn(move || -> Result<u64> {
            let mut seq = 0u64;
            while let Some(chunk) = sorted.next_chunk(chunk_rows)? {
                if stop.load(Ordering::Relaxed) {
                    break;
                }
                let chunk = Arc::new(chunk);
                for tx in &chunk_txs {
                    if tx.send((seq, chunk.clone())).is_err() {
                        return Err(RiffleError::Internal("rank pass worker stopped".into()));
                    }
                }
                seq += 1;
            }
            Ok(seq)
        });

        // Collector: sum the workers' parts of each chunk and write the
        // chunks out in order as soon as they are complete (a chunk is
        // complete when every worker has sent its part).
        let mut pending: std::collections::BTreeMap<u64, Pending> = Default::default();
        let mut next = 0u64;
        let mut done = 0u64;
        let mut written: Result<()> = Ok(());
        for (seq, exceed, reached, order) in part_rx.iter() {
            let entry = pending.entry(seq).or_insert_with(|| Pending {
                parts: 0,
                exceed: vec![0; exceed.len()],
                reached: vec![0; reached.len()],
                order: None,
            });
            entry.parts += 1;
            for (a, b) in entry.exceed.iter_mut().zip(&exceed) {
                *a += b;
            }
            for (a, b) in entry.reached.iter_mut().zip(&reached) {
                *a += b;
            }
            if order.is_some() {
                entry.order = order;
            }
            while pending
                .get(&next)
                .is_some_and(|p| p.parts == workers && p.order.is_some())
            {
                let chunk = pending.remove(&next).unwrap();
                next += 1;
                if written.is_err() {
                    continue;
                }
                let (indices, keys) = chunk.order.unwrap();
                written = (|| -> Result<()> {
                    for ((index, exceed), reached) in
                        indices.iter().zip(&chunk.exceed).zip(&chunk.reached)
                    {
                        out.write_all(&index.to_le_bytes()).at(rank_file)?;
                        out.write_all(&exceed.to_le_bytes()).at(rank_file)?;
                        out.write_all(&reached.to_le_bytes()).at(rank_file)?;
                    }
                    if let (Some(w), Some(path)) = (keys_out.as_mut(), shard_keys) {
                        for ((key, index), exceed) in keys.iter().zip(&indices).zip(&chunk.exceed) {
                            w.write_all(&key.to_le_bytes()).at(path)?;
                            w.write_all(&index.to_le_bytes()).at(path)?;
                            w.write_all(&exceed.to_le_bytes()).at(path)?;
                        }
                    }
                    Ok(())
                })();
                if written.is_err() {
                    failed.store(true, Ordering::Relaxed);
                }
                done += indices.len() as u64;
                progress(done);
            }
        }
        let chunks = reader
            .join()
            .map_err(|_| RiffleError::Internal("rank pass reader panicked".into()))??;
        let mut null_max = Vec::with_capacity(b_total);
        let mut histogram = kernel.pooled_null().then(NullHistogram::empty);
        let mut step_functions = Vec::new();
        for h in handles {
            let (maxima, counts, records) = h
                .join()
                .map_err(|_| RiffleError::Internal("rank pass worker panicked".into()))?;
            null_max.extend(maxima);
            step_functions.extend(records);
            if let Some(hist) = histogram.as_mut() {
                hist.add(&counts);
            }
        }
        if stop.load(Ordering::Relaxed) {
            return Err(RiffleError::Interrupted);
        }
        written?;
        if next != chunks || !pending.is_empty() {
            return Err(RiffleError::Internal("rank pass lost chunks".into()));
        }
        Ok(RankPassOutput {
            null_max,
            histogram,
            step_functions: recording.then_some(step_functions),
        })
    })?;
    let file = out
        .into_inner()
        .map_err(|e| RiffleError::io(rank_file, e.into_error()))?;
    file.sync_all().at(rank_file)?;
    if let (Some(w), Some(path)) = (keys_out, shard_keys) {
        let file = w
            .into_inner()
            .map_err(|e| RiffleError::io(path, e.into_error()))?;
        file.sync_all().at(path)?;
    }
    Ok(result)
}

/// Per-feature results of step-down, in feature order.
#[derive(Debug, Clone, Copy)]
pub struct StepDownResult {
    pub exceed: u64,
    pub p_maxt: f64,
}

/// Reads the rank file from the most extreme feature down, applies the
/// step-down running maximum, and calls `sink(index, result)` in feature
/// order for every feature (`None` for features that were not ranked),
/// using index-range bucket files of at most `memory_bytes` each.
pub fn reverse_and_scatter(
    rank_file: &Path,
    scratch: &Path,
    b_total: usize,
    n_features: u64,
    memory_bytes: u64,
    sink: &mut dyn FnMut(u64, Option<StepDownResult>) -> Result<()>,
) -> Result<()> {
    let bucket_width = (memory_bytes / 24).clamp(1024, 1 << 26);
    let buckets = n_features.div_ceil(bucket_width).max(1) as usize;
    let bucket_path = |b: usize| scratch.join(format!("stepdown-{b:05}.bin"));
    let mut writers = Vec::with_capacity(buckets);
    for b in 0..buckets {
        let p = bucket_path(b);
        writers.push(BufWriter::with_capacity(64 << 10, File::create(&p).at(&p)?));
    }
    let mut file = File::open(rank_file).at(rank_file)?;
    let total = file.metadata().at(rank_file)?.len() / RANK_RECORD as u64;
    let block = 1 << 16;
    let mut buf = vec![0u8; block * RANK_RECORD];
    let mut end = total;
    let mut running = 0.0f64;
    let denominator = (b_total + 1) as f64;
    while end > 0 {
        let start = end.saturating_sub(block as u64);
        let count = (end - start) as usize;
        file.seek(SeekFrom::Start(start * RANK_RECORD as u64))
            .at(rank_file)?;
        file.read_exact(&mut buf[..count * RANK_RECORD])
            .at(rank_file)?;
        for k in (0..count).rev() {
            let rec = &buf[k * RANK_RECORD..(k + 1) * RANK_RECORD];
            let word = |i: usize| u64::from_le_bytes(rec[i * 8..i * 8 + 8].try_into().unwrap());
            let (index, exceed, reached) = (word(0), word(1), word(2));
            let p = (reached + 1) as f64 / denominator;
            running = running.max(p);
            let b = (index / bucket_width) as usize;
            let mut out = [0u8; 24];
            out[0..8].copy_from_slice(&index.to_le_bytes());
            out[8..16].copy_from_slice(&exceed.to_le_bytes());
            out[16..24].copy_from_slice(&running.to_le_bytes());
            // The path is built only for the error message: joining it per
            // record was a tenth of the final pass.
            if let Err(e) = writers[b].write_all(&out) {
                return Err(RiffleError::io(&bucket_path(b), e));
            }
        }
        end = start;
    }
    for (b, mut w) in writers.into_iter().enumerate() {
        w.flush().at(&bucket_path(b))?;
    }
    let mut slots: Vec<Option<StepDownResult>> = Vec::new();
    for b in 0..buckets {
        let p = bucket_path(b);
        let bytes = std::fs::read(&p).at(&p)?;
        let base = b as u64 * bucket_width;
        let width = bucket_width.min(n_features - base) as usize;
        slots.clear();
        slots.resize(width, None);
        for rec in bytes.chunks_exact(24) {
            let word = |i: usize| rec[i * 8..i * 8 + 8].try_into().unwrap();
            let index = u64::from_le_bytes(word(0));
            slots[(index - base) as usize] = Some(StepDownResult {
                exceed: u64::from_le_bytes(word(1)),
                p_maxt: f64::from_le_bytes(word(2)),
            });
        }
        drop(bytes);
        let _ = std::fs::remove_file(&p);
        for (k, slot) in slots.iter().enumerate() {
            sink(base + k as u64, *slot)?;
        }
    }
    Ok(())
}

#[cfg(test)]
mod sorter_tests {
    use super::*;

    /// A row whose values are derived from its index, so that the test can
    /// check each row travelled with its key.
    fn row_of(index: u64) -> Vec<f64> {
        (0..3).map(|k| index as f64 * 10.0 + k as f64).collect()
    }

    /// Keys with many ties (ties are broken by index) and both signs.
    fn key_of(index: u64) -> f64 {
        ((index.wrapping_mul(2_654_435_761) % 97) as f64 - 48.0) / 4.0
    }

    fn drain(sorted: &mut SortedRows) -> Vec<(f64, u64, Vec<f64>)> {
        let mut out = Vec::new();
        while let Some(chunk) = sorted.next_chunk(50).unwrap() {
            for (i, (&k, &j)) in chunk.keys.iter().zip(&chunk.indices).enumerate() {
                out.push((k, j, chunk.rows[i * 3..i * 3 + 3].to_vec()));
            }
        }
        out
    }

    /// Brute force: the whole set sorted in memory by (key, index).
    fn expected(count: u64) -> Vec<(f64, u64, Vec<f64>)> {
        let mut all: Vec<_> = (0..count).map(|j| (key_of(j), j, row_of(j))).collect();
        all.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1)));
        all
    }

    /// Several scatter buckets (the smallest budget gives 1,024 features
    /// each) and features missing from the rank file: every feature gets
    /// the running maximum of (reached + 1) / (B + 1) over itself and all
    /// more extreme features (those later in the file), computed here by
    /// brute force (Westfall & Young 1993, algorithm 4.1).
    #[test]
    fn reverse_pass_scatters_the_running_maximum_to_feature_order() {
        let dir = tempfile::tempdir().unwrap();
        let n_features = 3_500u64;
        let b_total = 999usize;
        // Rank order: a fixed shuffle of the ranked features (every third
        // one is left out), least extreme first.
        let mut ranked: Vec<u64> = (0..n_features).filter(|j| j % 3 != 1).collect();
        ranked.sort_by_key(|&j| j.wrapping_mul(2_654_435_761) % 10_007);
        let reached = |j: u64| (j * 31) % 700;
        let rank_file = dir.path().join("rank.bin");
        let mut bytes = Vec::new();
        for &j in &ranked {
            for w in [j, j % 11, reached(j)] {
                bytes.extend_from_slice(&w.to_le_bytes());
            }
        }
        std::fs::write(&rank_file, &bytes).unwrap();
        let mut expected = vec![None; n_features as usize];
        for (k, &j) in ranked.iter().enumerate() {
            let p = ranked[k..]
                .iter()
                .map(|&i| (reached(i) + 1) as f64 / (b_total + 1) as f64)
                .fold(0.0, f64::max);
            expected[j as usize] = Some((j % 11, p));
        }
        let mut got = Vec::new();
        reverse_and_scatter(
            &rank_file,
            dir.path(),
            b_total,
            n_features,
            0,
            &mut |i, r| {
                assert_eq!(i, got.len() as u64);
                got.push(r.map(|r| (r.exceed, r.p_maxt)));
                Ok(())
            },
        )
        .unwrap();
        assert_eq!(got, expected);
        // The bucket files are gone.
        let left: Vec<_> = std::fs::read_dir(dir.path()).unwrap().collect();
        assert_eq!(left.len(), 1);
    }

    #[test]
    fn many_background_runs_merge_to_the_in_memory_order() {
        let dir = tempfile::tempdir().unwrap();
        // A zero budget gives the smallest buffers (32 rows): ~30 runs,
        // each written while the next one fills.
        let mut sorter = RowSorter::new(dir.path(), 3, 0).unwrap();
        for j in 0..1000u64 {
            sorter.push(key_of(j), j, &row_of(j)).unwrap();
        }
        let mut sorted = sorter.finish().unwrap();
        assert_eq!(drain(&mut sorted), expected(1000));
    }

    #[test]
    fn resume_drops_runs_written_after_the_commit() {
        let dir = tempfile::tempdir().unwrap();
        let mut sorter = RowSorter::new(dir.path(), 3, 0).unwrap();
        for j in 0..500u64 {
            sorter.push(key_of(j), j, &row_of(j)).unwrap();
        }
        let committed = sorter.commit().unwrap();
        // Rows after the commit, some already in (background) run files,
        // then an interruption: they are pushed again after resuming.
        for j in 500..700u64 {
            sorter.push(key_of(j), j, &row_of(j)).unwrap();
        }
        drop(sorter);
        let mut sorter = RowSorter::resume(dir.path(), 3, 0, committed).unwrap();
        for j in 500..800u64 {
            sorter.push(key_of(j), j, &row_of(j)).unwrap();
        }
        let mut sorted = sorter.finish().unwrap();
        assert_eq!(drain(&mut sorted), expected(800));
    }
}
