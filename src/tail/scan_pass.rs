//! The tail pass of a scan: after the exceedance counts are final, every
//! tested feature that ran all B sampled relabelings and was reached fewer
//! than `below` times gets its p-value from a generalized Pareto fit to its
//! own largest relabelled statistics (see [`super::tail_pvalue`]).
//!
//! Such features are rare (they are the strong signals), so the pass
//! re-reads only their rows from the source, recomputes their B relabelled
//! kernel statistics in f64 and rewrites their spill records: `p_perm`
//! becomes the extrapolated p-value, `source` becomes `Tail`, and `exceed`
//! keeps the count, so the counted p-value (exceed + 1) / (B + 1) stays
//! recoverable. A feature whose fit is refused keeps its counted p-value
//! (and `Counted`); the reasons are counted for `run.json`.
//!
//! Each fit depends only on the feature's own row and the shared
//! relabelings, so results do not depend on threads, chunks or the order
//! in which features are visited. The pass is idempotent (a resumed run may
//! repeat it).

use std::collections::BTreeMap;
use std::path::Path;
use std::sync::atomic::{AtomicBool, Ordering};

use crate::error::{Result, RiffleError};
use crate::input::{FeatureBlock, FeatureSource};
use crate::kernel::{Kernel, KernelScratch};
use crate::spill::{self, PSource, SpillReader};
use crate::stats::prepare::Status;

use super::{tail_pvalue_of_top, Reference, TailOptions};

/// What the scan asks of the tail pass.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TailSettings {
    /// Fit features reached by fewer than this many relabelings.
    pub below: u64,
    pub options: TailOptions,
}

/// Tallies for the run record.
#[derive(Debug, Clone, Default, PartialEq, serde::Serialize)]
pub struct TailPassCounts {
    /// Features that qualified (all B relabelings, fewer than `below`).
    pub candidates: u64,
    /// Features whose p-value is now the tail estimate.
    pub extrapolated: u64,
    /// ... of which with the exponential tail (shape test not rejected).
    pub exponential: u64,
    /// ... of which with the support constraint active.
    pub constrained: u64,
    /// Candidates that kept their counted p-value, by reason.
    pub kept_counted: BTreeMap<String, u64>,
}

/// Rows read per seek: candidates close together share one read.
const WINDOW: usize = 256;
/// Features fitted per thread between reads.
const BATCH_PER_THREAD: usize = 64;

/// Runs the tail pass over the spill in `spill_dir` (records in feature
/// order, record i = feature i of `source`). Sampled relabelings only: with
/// an exhaustive listing the counted p-value is exact and is kept.
pub fn tail_pass(
    kernel: &Kernel,
    source: &mut dyn FeatureSource,
    spill_dir: &Path,
    settings: &TailSettings,
    threads: usize,
    stop: &AtomicBool,
) -> Result<TailPassCounts> {
    let b_total = kernel.relabelings().count as u64;
    let mut counts = TailPassCounts::default();
    if kernel.relabelings().exact || b_total == 0 || settings.below == 0 {
        return Ok(counts);
    }
    // Pass 1: which features qualify, with their observed kernel statistic
    // (to check that the re-read row is the one the spill describes).
    let mut candidates: Vec<(u64, f64)> = Vec::new();
    {
        let mut reader = SpillReader::open_unchecked(spill_dir)?;
        let mut index = 0u64;
        while let Some(record) = reader.next_record()? {
            if record.status == Status::Tested
                && record.source != PSource::Exact
                && record.n_relabel == b_total
                && record.exceed < settings.below
            {
                candidates.push((index, record.kernel_obs));
            }
            index += 1;
        }
    }
    counts.candidates = candidates.len() as u64;
    if candidates.is_empty() {
        return Ok(counts);
    }
    let Some(reference) = Reference::for_spec(kernel.spec()) else {
        counts.kept_counted.insert(
            "no reference distribution for this test".into(),
            counts.candidates,
        );
        return Ok(counts);
    };
    let n = kernel.spec().units();
    let mut results: Vec<Option<f64>> = vec![None; candidates.len()];
    let mut scratch = KernelScratch::default();
    let mut block = FeatureBlock::default();
    // Rows waiting for their fits: (candidate slot, standardized row,
    // observed kernel statistic).
    let mut pending: Vec<(usize, Vec<f64>, f64)> = Vec::new();
    let batch = BATCH_PER_THREAD * threads.max(1);
    let mut next = 0;
    while next < candidates.len() {
        if stop.load(Ordering::Relaxed) {
            return Err(RiffleError::Interrupted);
        }
        let first = candidates[next].0;
        let mut last = next;
        while last + 1 < candidates.len() && candidates[last + 1].0 < first + WINDOW as u64 {
            last += 1;
        }
        let rows = (candidates[last].0 - first + 1) as usize;
        source.seek(first)?;
        block.ids.clear();
        block.values.clear();
        let got = source.next_block(rows, &mut block)?;
        if got < rows {
            return Err(RiffleError::Internal(format!(
                "tail pass: feature {} could not be read again",
                candidates[last].0
            )));
        }
        let outcome = kernel.run_chunk(&block.values, got, false, &mut scratch);
        // Tested rows are packed in order in `standardized`.
        let mut tested_position = vec![usize::MAX; got];
        let mut k = 0;
        for (r, f) in outcome.features.iter().enumerate() {
            if f.prepared.status == Status::Tested {
                tested_position[r] = k;
                k += 1;
            }
        }
        for (slot, &(index, kernel_obs)) in candidates[next..=last].iter().enumerate() {
            let r = (index - first) as usize;
            let f = &outcome.features[r];
            if f.prepared.status != Status::Tested
                || f.prepared.kernel_obs.to_bits() != kernel_obs.to_bits()
            {
                return Err(RiffleError::Internal(format!(
                    "tail pass: feature {index} reads differently the second time"
                )));
            }
            let z = &outcome.standardized[tested_position[r] * n..(tested_position[r] + 1) * n];
            pending.push((next + slot, z.to_vec(), kernel_obs));
        }
        next = last + 1;
        if pending.len() >= batch || next == candidates.len() {
            let fits = fit_batch(kernel, &reference, &pending, settings, threads);
            for ((slot, _, _), fit) in pending.iter().zip(fits) {
                match fit {
                    Ok(estimate) => {
                        counts.extrapolated += 1;
                        counts.exponential += estimate.exponential as u64;
                        counts.constrained += estimate.constrained as u64;
                        results[*slot] = Some(estimate.p);
                    }
                    Err(reason) => *counts.kept_counted.entry(reason.into()).or_default() += 1,
                }
            }
            pending.clear();
        }
    }
    let mut position = 0;
    spill::rewrite_records(spill_dir, &mut |index, record| {
        if position < candidates.len() && candidates[position].0 == index {
            if let Some(p) = results[position] {
                record.p_perm = p;
                record.source = PSource::Tail;
            } else {
                record.p_perm = (record.exceed + 1) as f64 / (b_total + 1) as f64;
                record.source = PSource::Counted;
            }
            position += 1;
        }
        Ok(())
    })?;
    Ok(counts)
}

type FitResult = std::result::Result<super::TailEstimate, &'static str>;

/// Fits of `pending` features on up to `threads` threads, in order. Each
/// fit depends only on its own row, so the split does not matter.
fn fit_batch(
    kernel: &Kernel,
    reference: &Reference,
    pending: &[(usize, Vec<f64>, f64)],
    settings: &TailSettings,
    threads: usize,
) -> Vec<FitResult> {
    let fit_part = |part: &[(usize, Vec<f64>, f64)]| -> Vec<FitResult> {
        let mut null = Vec::new();
        let mut top = Vec::new();
        part.iter()
            .map(|(_, z, observed)| {
                kernel.relabelled_stats(z, &mut null);
                fit_one(reference, &mut null, &mut top, *observed, settings)
            })
            .collect()
    };
    let threads = threads.max(1).min(pending.len().max(1));
    if threads == 1 {
        return fit_part(pending);
    }
    let per = pending.len().div_ceil(threads);
    std::thread::scope(|scope| {
        let handles: Vec<_> = pending
            .chunks(per)
            .map(|part| scope.spawn(move || fit_part(part)))
            .collect();
        handles
            .into_iter()
            .flat_map(|h| {
                h.join()
                    .unwrap_or_else(|_| vec![Err("a fitting thread failed"); per])
            })
            .collect()
    })
}

/// One feature: select its largest relabelled statistics on the kernel
/// scale (the reference map is monotone, so the order is the same), map
/// only those, fit. `Err` names why the counted p-value is kept.
fn fit_one(
    reference: &Reference,
    null: &mut [f64],
    top: &mut Vec<f64>,
    observed: f64,
    settings: &TailSettings,
) -> FitResult {
    let total = null.len();
    let keep = (settings.options.largest_fit(total) + 1).min(total);
    if null.iter().any(|v| v.is_nan()) {
        return Err("relabelled statistic not a number");
    }
    let split = total - keep;
    if split > 0 {
        null.select_nth_unstable_by(split - 1, f64::total_cmp);
    }
    top.clear();
    top.extend(null[split..].iter().map(|&s| reference.score(s)));
    top.sort_unstable_by(|a, b| b.total_cmp(a));
    let x_observed = reference.score(observed);
    if !x_observed.is_finite() {
        return Err("reference tail underflows at the observed statistic");
    }
    if top.first().is_none_or(|v| !v.is_finite()) {
        return Err("reference tail underflows at a relabelled statistic");
    }
    tail_pvalue_of_top(top, total, x_observed, &settings.options)
        .ok_or("no generalized Pareto fit accepted")
}
