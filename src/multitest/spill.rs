//! External-sort path, used when the distinct p-values do not fit in the
//! memory budget. Every file is a flat sequence of fixed-size records of
//! little-endian u64 words (a p-value is stored by its bits: for p >= 0 the
//! order of the bits is the numeric order).
//!
//! 1. Sorted runs of (p, index), each the size of the budget.
//! 2. Runs merged `fan` at a time until at most `fan` remain.
//! 3. A first final merge writes the tie blocks (p, count) ascending.
//! 4. That file read backwards feeds the step-up kernels (descending p).
//! 5. A second final merge, joined with both files, gives each (p, index)
//!    its row of adjusted values; rows are scattered by index range into
//!    partition files small enough to be placed in memory by index.
//! 6. Partitions are emitted in index order (split again if too large).

use std::cmp::Reverse;
use std::collections::BinaryHeap;
use std::fs::File;
use std::io::{BufReader, BufWriter, Read, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};

use super::kernels::{step_up_methods, Constants, RowAssembler, StepUp};
use super::{Emitter, Method, PValueSource};
use crate::error::{IoContext, Result, RiffleError};

/// Sizes derived from the memory budget.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Budget {
    pub memory_bytes: usize,
    /// Buffer of each open scratch file.
    pub io_buffer: usize,
    /// Largest number of scratch files open at once for a merge or split.
    pub fan: usize,
}

impl Budget {
    pub fn new(memory_bytes: usize) -> Self {
        let io_buffer = (memory_bytes / 64).clamp(4 << 10, 1 << 20);
        let fan = (memory_bytes / 2 / io_buffer).clamp(2, 64);
        Budget {
            memory_bytes,
            io_buffer,
            fan,
        }
    }
}

/// A private directory under the user's scratch directory, removed with
/// everything in it when dropped, on success and on error alike.
pub(crate) struct ScratchDir {
    path: PathBuf,
    next_file: u64,
}

impl ScratchDir {
    pub fn create(parent: &Path) -> Result<Self> {
        static COUNTER: AtomicU64 = AtomicU64::new(0);
        let nanos = std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .map(|d| d.subsec_nanos())
            .unwrap_or(0);
        for _ in 0..100 {
            let name = format!(
                "riffle-multitest-{}-{}-{}",
                std::process::id(),
                COUNTER.fetch_add(1, Ordering::Relaxed),
                nanos
            );
            let path = parent.join(name);
            match std::fs::create_dir(&path) {
                Ok(()) => return Ok(ScratchDir { path, next_file: 0 }),
                Err(e) if e.kind() == std::io::ErrorKind::AlreadyExists => continue,
                Err(e) => return Err(RiffleError::io(&path, e)),
            }
        }
        Err(RiffleError::Internal(format!(
            "could not create a fresh scratch directory under {}",
            parent.display()
        )))
    }

    pub fn new_file_path(&mut self, kind: &str) -> PathBuf {
        self.next_file += 1;
        self.path.join(format!("{kind}-{}.bin", self.next_file))
    }
}

impl Drop for ScratchDir {
    fn drop(&mut self) {
        // Nothing useful can be done about a failed cleanup while unwinding
        // from another error; the directory name says what it was.
        let _ = std::fs::remove_dir_all(&self.path);
    }
}

struct RecordWriter {
    path: PathBuf,
    out: BufWriter<File>,
}

impl RecordWriter {
    fn create(path: PathBuf, budget: &Budget) -> Result<Self> {
        let file = File::create(&path).at(&path)?;
        Ok(RecordWriter {
            out: BufWriter::with_capacity(budget.io_buffer, file),
            path,
        })
    }

    fn write(&mut self, words: &[u64]) -> Result<()> {
        for w in words {
            self.out.write_all(&w.to_le_bytes()).at(&self.path)?;
        }
        Ok(())
    }

    fn finish(mut self) -> Result<PathBuf> {
        self.out.flush().at(&self.path)?;
        Ok(self.path)
    }
}

struct RecordReader {
    path: PathBuf,
    input: BufReader<File>,
}

impl RecordReader {
    fn open(path: &Path, budget: &Budget) -> Result<Self> {
        let file = File::open(path).at(path)?;
        Ok(RecordReader {
            path: path.to_path_buf(),
            input: BufReader::with_capacity(budget.io_buffer, file),
        })
    }

    /// Fills `words`; false at a clean end of file.
    fn read(&mut self, words: &mut [u64]) -> Result<bool> {
        let mut bytes = [0u8; 8];
        for (i, w) in words.iter_mut().enumerate() {
            match self.input.read_exact(&mut bytes) {
                Ok(()) => *w = u64::from_le_bytes(bytes),
                Err(e) if e.kind() == std::io::ErrorKind::UnexpectedEof && i == 0 => {
                    return Ok(false)
                }
                Err(e) => return Err(RiffleError::io(&self.path, e)),
            }
        }
        Ok(true)
    }
}

/// Reads a file of fixed-size records from the last record to the first.
struct ReverseRecordReader {
    path: PathBuf,
    file: File,
    record_bytes: usize,
    /// File offset where the bytes in `chunk` start.
    chunk_start: u64,
    chunk: Vec<u8>,
    /// Bytes of `chunk` not yet returned (records are taken from its end).
    chunk_len: usize,
}

impl ReverseRecordReader {
    fn open(path: &Path, record_words: usize, budget: &Budget) -> Result<Self> {
        let file = File::open(path).at(path)?;
        let len = file.metadata().at(path)?.len();
        let record_bytes = record_words * 8;
        if len % record_bytes as u64 != 0 {
            return Err(RiffleError::Internal(format!(
                "{}: size {len} is not a multiple of the record size {record_bytes}",
                path.display()
            )));
        }
        let records_per_chunk = (budget.io_buffer / record_bytes).max(1);
        Ok(ReverseRecordReader {
            path: path.to_path_buf(),
            file,
            record_bytes,
            chunk_start: len,
            chunk: vec![0; records_per_chunk * record_bytes],
            chunk_len: 0,
        })
    }

    fn read(&mut self, words: &mut [u64]) -> Result<bool> {
        if self.chunk_len == 0 {
            if self.chunk_start == 0 {
                return Ok(false);
            }
            let take = (self.chunk.len() as u64).min(self.chunk_start);
            self.chunk_start -= take;
            self.file
                .seek(SeekFrom::Start(self.chunk_start))
                .at(&self.path)?;
            self.chunk_len = take as usize;
            self.file
                .read_exact(&mut self.chunk[..self.chunk_len])
                .at(&self.path)?;
        }
        let start = self.chunk_len - self.record_bytes;
        for (i, w) in words.iter_mut().enumerate() {
            let at = start + 8 * i;
            *w = u64::from_le_bytes(self.chunk[at..at + 8].try_into().expect("8 bytes"));
        }
        self.chunk_len = start;
        Ok(true)
    }
}

/// Ascending k-way merge of run files of (p bits, index) records.
struct MergeStream {
    readers: Vec<RecordReader>,
    heap: BinaryHeap<Reverse<(u64, u64, usize)>>,
}

impl MergeStream {
    fn open(runs: &[PathBuf], budget: &Budget) -> Result<Self> {
        let mut readers = Vec::with_capacity(runs.len());
        let mut heap = BinaryHeap::with_capacity(runs.len());
        for (i, run) in runs.iter().enumerate() {
            let mut reader = RecordReader::open(run, budget)?;
            let mut rec = [0u64; 2];
            if reader.read(&mut rec)? {
                heap.push(Reverse((rec[0], rec[1], i)));
            }
            readers.push(reader);
        }
        Ok(MergeStream { readers, heap })
    }

    fn next(&mut self) -> Result<Option<(u64, u64)>> {
        let Some(Reverse((p_bits, index, i))) = self.heap.pop() else {
            return Ok(None);
        };
        let mut rec = [0u64; 2];
        if self.readers[i].read(&mut rec)? {
            self.heap.push(Reverse((rec[0], rec[1], i)));
        }
        Ok(Some((p_bits, index)))
    }
}

fn remove(path: &Path) -> Result<()> {
    std::fs::remove_file(path).at(path)
}

fn source_changed() -> RiffleError {
    RiffleError::Internal("the p-values changed between two readings of the source".into())
}

/// Runs the external-sort path; `n_total` and `constants.m` come from the
/// first reading of the source and are checked again here.
pub(crate) fn adjust_external(
    source: &mut dyn PValueSource,
    methods: &[Method],
    constants: Constants,
    n_total: u64,
    scratch_parent: &Path,
    budget: Budget,
    emitter: &mut Emitter<'_>,
) -> Result<()> {
    let mut scratch = ScratchDir::create(scratch_parent)?;
    let runs = write_sorted_runs(source, &mut scratch, &budget, n_total, constants.m)?;
    let runs = merge_until_fan(runs, &mut scratch, &budget)?;
    let blocks = write_tie_blocks(&runs, &mut scratch, &budget, constants.m)?;
    let up_methods = step_up_methods(methods);
    let step_up = write_step_up_values(&blocks, &up_methods, constants, &mut scratch, &budget)?;
    let partitions = scatter_rows(
        &runs,
        &blocks,
        step_up.as_deref(),
        methods,
        constants,
        n_total,
        &mut scratch,
        &budget,
    )?;
    for runs_file in runs.iter().chain([&blocks]).chain(step_up.iter()) {
        remove(runs_file)?;
    }
    for part in partitions {
        emit_partition(part, methods.len(), &mut scratch, &budget, emitter)?;
    }
    Ok(())
}

fn write_sorted_runs(
    source: &mut dyn PValueSource,
    scratch: &mut ScratchDir,
    budget: &Budget,
    n_total: u64,
    m: u64,
) -> Result<Vec<PathBuf>> {
    let run_len = (budget.memory_bytes / 16).max(1);
    let mut buffer: Vec<(u64, u64)> = Vec::with_capacity(run_len);
    let mut runs = Vec::new();
    let mut index = 0u64;
    let mut non_missing = 0u64;
    let mut flush = |buffer: &mut Vec<(u64, u64)>, runs: &mut Vec<PathBuf>| -> Result<()> {
        if buffer.is_empty() {
            return Ok(());
        }
        buffer.sort_unstable();
        let mut writer = RecordWriter::create(scratch.new_file_path("run"), budget)?;
        for &(p_bits, i) in buffer.iter() {
            writer.write(&[p_bits, i])?;
        }
        runs.push(writer.finish()?);
        buffer.clear();
        Ok(())
    };
    source.for_each(&mut |p| {
        let i = index;
        index += 1;
        if p.is_nan() {
            return Ok(());
        }
        if !(0.0..=1.0).contains(&p) {
            return Err(source_changed());
        }
        non_missing += 1;
        // +0.0 turns -0.0 into 0.0 so that equal p-values share their bits.
        buffer.push(((p + 0.0).to_bits(), i));
        if buffer.len() == run_len {
            flush(&mut buffer, &mut runs)?;
        }
        Ok(())
    })?;
    flush(&mut buffer, &mut runs)?;
    if index != n_total || non_missing != m {
        return Err(source_changed());
    }
    Ok(runs)
}

fn merge_until_fan(
    mut runs: Vec<PathBuf>,
    scratch: &mut ScratchDir,
    budget: &Budget,
) -> Result<Vec<PathBuf>> {
    while runs.len() > budget.fan {
        let mut merged = Vec::with_capacity(runs.len().div_ceil(budget.fan));
        for group in runs.chunks(budget.fan) {
            let mut stream = MergeStream::open(group, budget)?;
            let mut writer = RecordWriter::create(scratch.new_file_path("run"), budget)?;
            while let Some((p_bits, index)) = stream.next()? {
                writer.write(&[p_bits, index])?;
            }
            merged.push(writer.finish()?);
            drop(stream);
            for run in group {
                remove(run)?;
            }
        }
        runs = merged;
    }
    Ok(runs)
}

/// Writes (p bits, count) per distinct p-value, ascending.
fn write_tie_blocks(
    runs: &[PathBuf],
    scratch: &mut ScratchDir,
    budget: &Budget,
    m: u64,
) -> Result<PathBuf> {
    let mut stream = MergeStream::open(runs, budget)?;
    let mut writer = RecordWriter::create(scratch.new_file_path("blocks"), budget)?;
    let mut current: Option<(u64, u64)> = None;
    let mut total = 0u64;
    while let Some((p_bits, _)) = stream.next()? {
        total += 1;
        current = match current {
            Some((bits, count)) if bits == p_bits => Some((bits, count + 1)),
            Some((bits, count)) => {
                writer.write(&[bits, count])?;
                Some((p_bits, 1))
            }
            None => Some((p_bits, 1)),
        };
    }
    if let Some((bits, count)) = current {
        writer.write(&[bits, count])?;
    }
    if total != m {
        return Err(RiffleError::Internal(format!(
            "merged {total} p-values, expected {m}"
        )));
    }
    writer.finish()
}

/// Step-up values per tie block, written in descending order of p; None
/// when no step-up method is requested.
fn write_step_up_values(
    blocks: &Path,
    up_methods: &[Method],
    constants: Constants,
    scratch: &mut ScratchDir,
    budget: &Budget,
) -> Result<Option<PathBuf>> {
    if up_methods.is_empty() {
        return Ok(None);
    }
    let mut reader = ReverseRecordReader::open(blocks, 2, budget)?;
    let mut writer = RecordWriter::create(scratch.new_file_path("stepup"), budget)?;
    let mut kernel = StepUp::new(constants, up_methods);
    let mut block = [0u64; 2];
    let mut values = vec![0.0f64; up_methods.len()];
    let mut words = vec![0u64; up_methods.len()];
    while reader.read(&mut block)? {
        kernel.push(f64::from_bits(block[0]), block[1], &mut values);
        for (w, v) in words.iter_mut().zip(&values) {
            *w = v.to_bits();
        }
        writer.write(&words)?;
    }
    Ok(Some(writer.finish()?))
}

/// A range of indices [lo, hi) whose rows sit in `path` in any order.
struct Partition {
    lo: u64,
    hi: u64,
    path: PathBuf,
}

/// Writers for `ranges` of equal width (the last may be shorter).
struct Splitter {
    lo: u64,
    width: u64,
    ranges: Vec<(u64, u64)>,
    writers: Vec<RecordWriter>,
}

impl Splitter {
    fn new(
        lo: u64,
        hi: u64,
        n_methods: usize,
        scratch: &mut ScratchDir,
        budget: &Budget,
    ) -> Result<Self> {
        let leaf = leaf_len(n_methods, budget);
        let len = hi - lo;
        let parts = len.div_ceil(leaf).clamp(1, budget.fan as u64);
        let width = len.div_ceil(parts).max(1);
        let mut ranges = Vec::new();
        let mut writers = Vec::new();
        let mut start = lo;
        while start < hi || ranges.is_empty() {
            let end = (start + width).min(hi);
            ranges.push((start, end));
            writers.push(RecordWriter::create(scratch.new_file_path("part"), budget)?);
            start = end;
        }
        Ok(Splitter {
            lo,
            width,
            ranges,
            writers,
        })
    }

    fn write(&mut self, record: &[u64]) -> Result<()> {
        let part = ((record[0] - self.lo) / self.width) as usize;
        self.writers[part].write(record)
    }

    fn finish(self) -> Result<Vec<Partition>> {
        let mut parts = Vec::with_capacity(self.ranges.len());
        for ((lo, hi), writer) in self.ranges.into_iter().zip(self.writers) {
            parts.push(Partition {
                lo,
                hi,
                path: writer.finish()?,
            });
        }
        Ok(parts)
    }
}

/// Indices whose rows fit in the budget at once.
fn leaf_len(n_methods: usize, budget: &Budget) -> u64 {
    (budget.memory_bytes / (8 * n_methods.max(1))).max(1) as u64
}

#[allow(clippy::too_many_arguments)]
fn scatter_rows(
    runs: &[PathBuf],
    blocks: &Path,
    step_up: Option<&Path>,
    methods: &[Method],
    constants: Constants,
    n_total: u64,
    scratch: &mut ScratchDir,
    budget: &Budget,
) -> Result<Vec<Partition>> {
    let n_up = step_up_methods(methods).len();
    let mut stream = MergeStream::open(runs, budget)?;
    let mut block_reader = RecordReader::open(blocks, budget)?;
    let mut step_up_reader = match step_up {
        Some(path) => Some(ReverseRecordReader::open(path, n_up, budget)?),
        None => None,
    };
    let mut splitter = Splitter::new(0, n_total, methods.len(), scratch, budget)?;
    let mut assembler = RowAssembler::new(constants, methods);
    let mut block = [0u64; 2];
    let mut up_words = vec![0u64; n_up];
    let mut up_values = vec![0.0f64; n_up];
    let mut row = vec![0.0f64; methods.len()];
    let mut record = vec![0u64; 1 + methods.len()];
    let mut current_bits: Option<u64> = None;
    while let Some((p_bits, index)) = stream.next()? {
        if current_bits != Some(p_bits) {
            if !block_reader.read(&mut block)? || block[0] != p_bits {
                return Err(RiffleError::Internal(
                    "tie blocks out of step with the merged p-values".into(),
                ));
            }
            if let Some(reader) = step_up_reader.as_mut() {
                if !reader.read(&mut up_words)? {
                    return Err(RiffleError::Internal(
                        "step-up values out of step with the tie blocks".into(),
                    ));
                }
                for (v, w) in up_values.iter_mut().zip(&up_words) {
                    *v = f64::from_bits(*w);
                }
            }
            assembler.push(f64::from_bits(p_bits), block[1], &up_values, &mut row);
            for (w, v) in record[1..].iter_mut().zip(&row) {
                *w = v.to_bits();
            }
            current_bits = Some(p_bits);
        }
        record[0] = index;
        splitter.write(&record)?;
    }
    splitter.finish()
}

fn emit_partition(
    part: Partition,
    n_methods: usize,
    scratch: &mut ScratchDir,
    budget: &Budget,
    emitter: &mut Emitter<'_>,
) -> Result<()> {
    let len = part.hi - part.lo;
    let mut reader = RecordReader::open(&part.path, budget)?;
    let mut record = vec![0u64; 1 + n_methods];
    if len <= leaf_len(n_methods, budget) {
        // Missing p-values are never written, so they stay NaN here.
        let mut rows = vec![f64::NAN; len as usize * n_methods];
        while reader.read(&mut record)? {
            let offset = (record[0] - part.lo) as usize * n_methods;
            for (slot, w) in rows[offset..offset + n_methods]
                .iter_mut()
                .zip(&record[1..])
            {
                *slot = f64::from_bits(*w);
            }
        }
        drop(reader);
        remove(&part.path)?;
        for (k, row) in rows.chunks_exact(n_methods).enumerate() {
            emitter.emit(part.lo + k as u64, row)?;
        }
        return Ok(());
    }
    let mut splitter = Splitter::new(part.lo, part.hi, n_methods, scratch, budget)?;
    while reader.read(&mut record)? {
        splitter.write(&record)?;
    }
    drop(reader);
    remove(&part.path)?;
    for sub in splitter.finish()? {
        emit_partition(sub, n_methods, scratch, budget, emitter)?;
    }
    Ok(())
}
