//! `riffle merge`: shard folders -> the results a single process would
//! have written, byte for byte.
//!
//! First-pass records, exceedance counts, per-relabelling maxima (single-
//! step maxT) and the pooled-null histogram are per feature or combine by
//! max and sum. Step-down maxT needs, for feature j and relabelling b, the
//! maximum of T_kb over every feature k with T_k <= T_j, across all shards.
//! Each shard keeps, per b, the step function u^s_b(t) = max over its
//! features k with T_k <= t of T_kb (the points where its running maximum
//! rose). The maximum over shards of running maxima is the running maximum
//! of all their points in t order, so u_b(t) = max over every point (t_i,
//! m_i) of every shard with t_i <= t of m_i. Relabelling b reaches feature
//! j when u_b(T_j) >= T_j - tol(T_j), the kernel's own test; on each
//! constant piece of u_b the features it reaches form a prefix of that
//! piece in ascending T, because T - tol(T) never decreases as T grows (it
//! is t(1 -+ 1e-10) - 1e-10 up to rounding, and rounding is monotone). So
//! every piece adds 1 to a range of rank positions: a difference array
//! over the merged rank order, summed once, gives reached_j for all j.
//!
//! Ties: a single process ranks features of equal statistic by index, and
//! the earlier ones see a running maximum without the later ones, while
//! here every tied feature sees the whole tie group. Their p~ differ, but
//! the reverse pass takes the running maximum of p~ from the most extreme
//! feature down, and within a tie group the last (largest) p~ is the one
//! that already includes the whole group, identical in both orders; so
//! every member ends with the same p_maxt either way.

use std::cmp::Ordering as CmpOrdering;
use std::collections::BinaryHeap;
use std::fs::File;
use std::io::{BufReader, BufWriter, Read, Write};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::Instant;

use crate::error::{IoContext, Result, RiffleError};
use crate::input::MatrixInfo;
use crate::kernel::{tie_tolerance, NullHistogram};
use crate::multitest::Method;
use crate::pipeline::PipelineStats;
use crate::scan::{self, MaxtMode, ScanOptions, ScanSummary};
use crate::shard::{self, ShardRecord, RANK_KEY_LEN};
use crate::spill::{SpillReader, SpillWriter};

#[derive(Debug, Clone)]
pub struct MergeOptions {
    pub shards: Vec<PathBuf>,
    pub out: PathBuf,
    pub memory_bytes: u64,
    pub quiet: bool,
}

pub fn run_merge(options: &MergeOptions, stop: &AtomicBool) -> Result<ScanSummary> {
    let started = Instant::now();
    if options.shards.is_empty() {
        return Err(RiffleError::options(
            "merge: name at least one shard folder",
        ));
    }
    let mut shards = Vec::new();
    for dir in &options.shards {
        shards.push((dir.clone(), ShardRecord::read(dir)?));
    }
    check_shards_belong_together(&mut shards)?;
    let first = &shards[0].1;
    let mut scan_options: ScanOptions = first.options.clone();
    scan_options.out = options.out.clone();
    scan_options.memory_bytes = options.memory_bytes;
    scan_options.quiet = options.quiet;
    scan_options.shard = None;
    scan_options.skip_if_unchanged = false;
    let b_total = first.relabelings;
    let n_features = first.n_features;

    std::fs::create_dir_all(&options.out).at(&options.out)?;
    let spill_dir = options.out.join(scan::SPILL_DIR);
    concatenate_spills(&shards, &spill_dir)?;
    if stop.load(Ordering::Relaxed) {
        return Err(RiffleError::Interrupted);
    }

    let mut null_max = vec![f64::NEG_INFINITY; b_total];
    let mut histogram = scan_options.pooled_null.then(NullHistogram::empty);
    for (dir, record) in &shards {
        let shard_spill = shard::spill_dir(dir);
        let maxima = crate::maxt::read_null_max(&shard_spill)?;
        if maxima.len() != b_total {
            return Err(RiffleError::bad_input(
                &shard_spill.join(crate::maxt::NULL_MAX_FILE),
                "length",
                format!(
                    "{} maxima, {} relabelings expected ({})",
                    maxima.len(),
                    b_total,
                    shard::describe(dir, record)
                ),
            ));
        }
        for (m, v) in null_max.iter_mut().zip(&maxima) {
            *m = m.max(*v);
        }
        if let Some(hist) = histogram.as_mut() {
            hist.add(&read_histogram(&shard_spill)?);
        }
    }
    let stepdown_started = Instant::now();
    if scan_options.maxt_computed() == Some(MaxtMode::StepDown) {
        let mut p_rule =
            crate::perm_p::PermPRule::for_scan(&scan_options, &first.design, b_total, first.exact);
        merge_step_down(
            &shards,
            &spill_dir,
            b_total,
            n_features,
            options.memory_bytes,
            &mut p_rule,
        )?;
    }
    let stepdown_seconds = stepdown_started.elapsed().as_secs_f64();
    crate::maxt::write_null_max(&spill_dir, &null_max)?;
    if let Some(hist) = &histogram {
        crate::maxt::write_null_histogram(&spill_dir, hist)?;
    }
    let pooled = histogram.map(|h| h.into_upper_tail());
    let finalized = scan::finalize(&scan_options, &spill_dir, &null_max, pooled.as_ref())?;

    let tested: u64 = shards.iter().map(|(_, r)| r.tested).sum();
    let mut untested = std::collections::BTreeMap::<String, u64>::new();
    for (_, r) in &shards {
        for (reason, n) in &r.untested {
            *untested.entry(reason.clone()).or_default() += n;
        }
    }
    // Shards ran one after another or side by side; their summed seconds
    // are the work done, which is what the throughput should reflect.
    let stats = PipelineStats {
        features: n_features,
        chunks: shards.iter().map(|(_, r)| r.pipeline.chunks).sum(),
        read_seconds: shards.iter().map(|(_, r)| r.pipeline.read_seconds).sum(),
        kernel_seconds: shards.iter().map(|(_, r)| r.pipeline.kernel_seconds).sum(),
        wall_seconds: shards
            .iter()
            .map(|(_, r)| r.pipeline.wall_seconds)
            .sum::<f64>()
            + stepdown_seconds,
    };
    let design = &first.design;
    let summary = ScanSummary {
        features: n_features,
        tested,
        untested: untested.into_iter().collect(),
        relabelings: b_total,
        exact: first.exact,
        n_a: design
            .group_sizes
            .first()
            .copied()
            .unwrap_or(design.units()),
        n_b: design.group_sizes.get(1).copied().unwrap_or(0),
        level_a: design.levels.first().cloned().unwrap_or_default(),
        level_b: design.levels.get(1).cloned().unwrap_or_default(),
        pi0: finalized.perm.pi0,
        bh_hits: scan::hits(&finalized.perm, Method::Bh),
        fwer_hits_05: finalized.fwer_hits_05,
        results_path: finalized.results_path.clone(),
        seconds: started.elapsed().as_secs_f64(),
        feature_relabelings_per_second: finalized.relabelings_used as f64
            / stats.wall_seconds.max(1e-9),
        relabelings_used: finalized.relabelings_used,
        maxt_computed: scan_options.maxt_computed().is_some(),
    };
    let info = MatrixInfo {
        path: scan_options.matrix.clone(),
        format: first.matrix_format,
        n_features,
        sample_columns: first.sample_columns.clone(),
        id_column: scan_options.id_column.clone(),
    };
    let shard_list: Vec<serde_json::Value> = shards
        .iter()
        .map(|(dir, r)| {
            serde_json::json!({
                "shard": r.shard.to_string(), "folder": dir, "features": [r.range.0, r.range.1],
                "seconds": r.seconds, "hash_seconds": r.provenance.hash_seconds,
            })
        })
        .collect();
    scan::write_run_record(
        &scan_options,
        &info,
        design,
        &stats,
        &finalized,
        &summary,
        &first.provenance,
        serde_json::Value::Array(shard_list),
    )?;
    Ok(summary)
}

/// Same inputs, options, seed and version; shards 1..N of one N, each once.
/// Sorts `shards` by range.
fn check_shards_belong_together(shards: &mut [(PathBuf, ShardRecord)]) -> Result<()> {
    let (first_dir, first) = &shards[0];
    for (dir, record) in shards.iter().skip(1) {
        let differences = first.provenance.differences(&record.provenance);
        if !differences.is_empty() {
            return Err(RiffleError::options(format!(
                "{} does not belong with {}: {}",
                shard::describe(dir, record),
                shard::describe(first_dir, first),
                differences.join("; ")
            )));
        }
        if record.shard.count != first.shard.count || record.n_features != first.n_features {
            return Err(RiffleError::options(format!(
                "{} is one of {} shards over {} features, {} one of {} over {}",
                shard::describe(dir, record),
                record.shard.count,
                record.n_features,
                shard::describe(first_dir, first),
                first.shard.count,
                first.n_features
            )));
        }
    }
    for (dir, record) in shards.iter() {
        if record.range != record.shard.range(record.n_features) {
            return Err(RiffleError::bad_input(
                &dir.join(shard::SHARD_RECORD),
                "range",
                format!(
                    "features {}..{} do not match shard {}",
                    record.range.0, record.range.1, record.shard
                ),
            ));
        }
    }
    shards.sort_by_key(|(_, r)| (r.range, r.shard.index));
    let count = first_count(shards);
    let n_features = shards[0].1.n_features;
    let mut problems = Vec::new();
    for pair in shards.windows(2) {
        if pair[0].1.shard.index == pair[1].1.shard.index {
            problems.push(format!(
                "shard {} given twice ({} and {}): features {}..{} would be counted twice",
                pair[0].1.shard,
                pair[0].0.display(),
                pair[1].0.display(),
                pair[0].1.range.0,
                pair[0].1.range.1
            ));
        }
    }
    for k in 1..=count {
        if !shards.iter().any(|(_, r)| r.shard.index == k) {
            let spec = shard::ShardSpec { index: k, count };
            let (a, b) = spec.range(n_features);
            problems.push(format!("shard {spec} is missing (features {a}..{b})"));
        }
    }
    if problems.is_empty() {
        Ok(())
    } else {
        Err(RiffleError::options(format!(
            "the shards do not cover features 0..{n_features} exactly once: {}",
            problems.join("; ")
        )))
    }
}

fn first_count(shards: &[(PathBuf, ShardRecord)]) -> u64 {
    shards[0].1.shard.count
}

fn concatenate_spills(shards: &[(PathBuf, ShardRecord)], spill_dir: &Path) -> Result<()> {
    let mut writer = SpillWriter::create(spill_dir)?;
    let mut id = String::new();
    for (dir, record) in shards {
        let shard_spill = shard::spill_dir(dir);
        let mut reader = SpillReader::open(&shard_spill)?;
        let expected = record.range.1 - record.range.0;
        if reader.count != expected {
            return Err(RiffleError::bad_input(
                &shard_spill.join(crate::spill::RECORDS_FILE),
                "trailer",
                format!(
                    "{} records, {} expected for {}",
                    reader.count,
                    expected,
                    shard::describe(dir, record)
                ),
            ));
        }
        while let Some(r) = reader.next_record()? {
            reader.next_id(&mut id)?;
            writer.push(&id, &r)?;
        }
    }
    writer.finish()
}

fn read_histogram(shard_spill: &Path) -> Result<Vec<u64>> {
    let path = shard_spill.join(crate::maxt::NULL_HISTOGRAM_FILE);
    let bytes = std::fs::read(&path).at(&path)?;
    if bytes.len() != NullHistogram::BINS * 8 {
        return Err(RiffleError::bad_input(
            &path,
            "length",
            format!(
                "{} bytes, {} expected",
                bytes.len(),
                NullHistogram::BINS * 8
            ),
        ));
    }
    Ok(bytes
        .chunks_exact(8)
        .map(|c| u64::from_le_bytes(c.try_into().unwrap()))
        .collect())
}

/// Step-down maxT across shards (see the module notes); ends with the spill
/// records rewritten exactly as a single process's step-down does.
fn merge_step_down(
    shards: &[(PathBuf, ShardRecord)],
    spill_dir: &Path,
    b_total: usize,
    n_features: u64,
    memory_bytes: u64,
    p_rule: &mut crate::perm_p::PermPRule,
) -> Result<()> {
    let keys_path = spill_dir.join("merged-keys.bin");
    let key_files: Vec<PathBuf> = shards
        .iter()
        .map(|(dir, _)| shard::spill_dir(dir).join(shard::RANK_KEYS_FILE))
        .collect();
    merge_key_files(&key_files, &keys_path)?;
    let file = File::open(&keys_path).at(&keys_path)?;
    let len = file.metadata().at(&keys_path)?.len() as usize;
    let tested = len / RANK_KEY_LEN;
    // SAFETY: the file was written above and nothing else writes it.
    let map = if tested > 0 {
        Some(unsafe { memmap2::Mmap::map(&file) }.at(&keys_path)?)
    } else {
        None
    };
    let bytes: &[u8] = map.as_deref().unwrap_or(&[]);
    let word = |p: usize, i: usize| -> [u8; 8] {
        let at = p * RANK_KEY_LEN + i * 8;
        bytes[at..at + 8].try_into().unwrap()
    };
    let statistic = |p: usize| f64::from_le_bytes(word(p, 0));
    let first_at_or_above = |t: f64| {
        partition(0, tested, |p| {
            statistic(p).total_cmp(&t) == CmpOrdering::Less
        })
    };

    let functions: Vec<shard::StepFunctions> = shards
        .iter()
        .map(|(dir, _)| {
            shard::read_step_functions(
                &shard::spill_dir(dir).join(shard::STEP_FUNCTIONS_FILE),
                b_total,
            )
        })
        .collect::<Result<_>>()?;
    // Counts are at most B; wrapping arithmetic keeps the -1 entries exact.
    let mut difference = vec![0u32; tested + 1];
    let mut points: Vec<(f64, f64)> = Vec::new();
    let mut pieces: Vec<(f64, f64)> = Vec::new();
    for b in 0..b_total {
        points.clear();
        for f in &functions {
            points.extend_from_slice(&f[b]);
        }
        points.sort_by(|x, y| x.0.total_cmp(&y.0));
        pieces.clear();
        let mut running = f64::NEG_INFINITY;
        for &(t, m) in &points {
            if m > running {
                running = m;
                match pieces.last_mut() {
                    Some(last) if last.0.total_cmp(&t) == CmpOrdering::Equal => last.1 = m,
                    _ => pieces.push((t, m)),
                }
            }
        }
        for (i, &(t, m)) in pieces.iter().enumerate() {
            let lo = first_at_or_above(t);
            let hi = match pieces.get(i + 1) {
                Some(&(next, _)) => first_at_or_above(next),
                None => tested,
            };
            let covered_end = partition(lo, hi, |p| {
                let s = statistic(p);
                m >= s - tie_tolerance(s)
            });
            if covered_end > lo {
                difference[lo] = difference[lo].wrapping_add(1);
                difference[covered_end] = difference[covered_end].wrapping_sub(1);
            }
        }
    }
    let rank_file = spill_dir.join("rank.bin");
    let mut out = BufWriter::with_capacity(1 << 20, File::create(&rank_file).at(&rank_file)?);
    let mut reached = 0u32;
    for (p, d) in difference.iter().take(tested).enumerate() {
        reached = reached.wrapping_add(*d);
        out.write_all(&word(p, 1)).at(&rank_file)?;
        out.write_all(&word(p, 2)).at(&rank_file)?;
        out.write_all(&(reached as u64).to_le_bytes())
            .at(&rank_file)?;
    }
    out.flush().at(&rank_file)?;
    drop(out);
    drop(map);
    let _ = std::fs::remove_file(&keys_path);
    scan::apply_step_down(
        &rank_file,
        spill_dir,
        b_total,
        n_features,
        memory_bytes,
        p_rule,
    )
}

/// First position in `lo..hi` where `holds` is false (it must hold on a
/// prefix of the range and fail on the rest).
fn partition(mut lo: usize, mut hi: usize, holds: impl Fn(usize) -> bool) -> usize {
    while lo < hi {
        let mid = lo + (hi - lo) / 2;
        if holds(mid) {
            lo = mid + 1;
        } else {
            hi = mid;
        }
    }
    lo
}

struct KeyHead {
    statistic: f64,
    index: u64,
    entry: [u8; RANK_KEY_LEN],
    source: usize,
}

impl PartialEq for KeyHead {
    fn eq(&self, other: &Self) -> bool {
        self.cmp(other) == CmpOrdering::Equal
    }
}
impl Eq for KeyHead {}
impl PartialOrd for KeyHead {
    fn partial_cmp(&self, other: &Self) -> Option<CmpOrdering> {
        Some(self.cmp(other))
    }
}
impl Ord for KeyHead {
    // Reversed: BinaryHeap is a max-heap and the smallest key comes first.
    fn cmp(&self, other: &Self) -> CmpOrdering {
        other
            .statistic
            .total_cmp(&self.statistic)
            .then(other.index.cmp(&self.index))
    }
}

/// Merges the shards' rank-ordered (statistic, index, exceed) files into
/// one, in ascending (statistic, index): the single-process rank order.
fn merge_key_files(inputs: &[PathBuf], output: &Path) -> Result<()> {
    let mut readers = Vec::new();
    let mut heap = BinaryHeap::new();
    let next =
        |reader: &mut BufReader<File>, path: &Path, source: usize| -> Result<Option<KeyHead>> {
            let mut entry = [0u8; RANK_KEY_LEN];
            match reader.read_exact(&mut entry) {
                Ok(()) => Ok(Some(KeyHead {
                    statistic: f64::from_le_bytes(entry[0..8].try_into().unwrap()),
                    index: u64::from_le_bytes(entry[8..16].try_into().unwrap()),
                    entry,
                    source,
                })),
                Err(e) if e.kind() == std::io::ErrorKind::UnexpectedEof => Ok(None),
                Err(e) => Err(RiffleError::io(path, e)),
            }
        };
    for (s, path) in inputs.iter().enumerate() {
        let len = std::fs::metadata(path).at(path)?.len();
        if len % RANK_KEY_LEN as u64 != 0 {
            return Err(RiffleError::bad_input(
                path,
                "length",
                format!("{len} bytes is not a whole number of {RANK_KEY_LEN}-byte entries"),
            ));
        }
        let mut reader = BufReader::with_capacity(256 << 10, File::open(path).at(path)?);
        if let Some(head) = next(&mut reader, path, s)? {
            heap.push(head);
        }
        readers.push(reader);
    }
    let mut out = BufWriter::with_capacity(1 << 20, File::create(output).at(output)?);
    while let Some(head) = heap.pop() {
        out.write_all(&head.entry).at(output)?;
        let s = head.source;
        if let Some(h) = next(&mut readers[s], &inputs[s], s)? {
            heap.push(h);
        }
    }
    out.flush().at(output)
}
