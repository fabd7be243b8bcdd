//! Resume: a scan killed at any point (SIGKILL included) and started again
//! with the same inputs and result-defining options continues from its last
//! checkpoint and ends with the same bytes.
//!
//! `checkpoint.json` in the output folder is replaced atomically (temporary
//! file, then rename) and only after the data it vouches for is on disk:
//! - `scanning`: the first pass has committed `features_done` features: the
//!   spill files (under their stable `.partial` names) are valid up to
//!   `records_len` / `ids_len` bytes, the sorter's first `sorter_runs` run
//!   files are complete, and the per-relabelling maxima, histogram and
//!   counts so far are stored here. A restart truncates the spill files to
//!   those lengths (recomputing their running checksum over the kept
//!   prefix), drops later run files, seeks the matrix to `features_done`
//!   and goes on. Chunk and run boundaries then differ from an
//!   uninterrupted run, which changes nothing: records are per feature and
//!   the rank order is a total order on (statistic, index).
//! - `sorted`: the first pass is complete (spill renamed into place, every
//!   sorted run written); a restart redoes the rank pass from the runs.
//! - `ranked`: the rank pass is complete (`rank.bin`, maxima and histogram
//!   kept); a restart redoes the step-down rewrite, which is idempotent,
//!   unless it had finished (then `rank.bin` is gone), and the tables.
//!
//! The checkpoint is removed once `run.json` (or `shard.json`) is written.

use std::collections::BTreeMap;
use std::path::Path;
use std::time::{Duration, Instant};

use serde::{Deserialize, Serialize};

use crate::error::{IoContext, Result, RiffleError};
use crate::kernel::NullHistogram;
use crate::shard::ShardSpec;
use crate::spill::temp_name;

pub const CHECKPOINT_FILE: &str = "checkpoint.json";

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Phase {
    Scanning,
    Sorted,
    Ranked,
}

#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct Checkpoint {
    pub fingerprint: String,
    pub shard: Option<ShardSpec>,
    pub phase: Phase,
    /// Global index of the next feature the first pass reads.
    pub features_done: u64,
    /// Records (= ids) committed to the spill.
    pub records_count: u64,
    pub records_len: u64,
    pub ids_len: u64,
    pub sorter_runs: usize,
    pub tested: u64,
    pub untested: BTreeMap<String, u64>,
    /// Per-relabelling maxima as f64 bit patterns (exact in JSON).
    pub null_max_bits: Vec<u64>,
    /// Non-zero bins of the pooled-null histogram, when kept.
    pub histogram: Option<Vec<(u32, u64)>>,
}

impl Checkpoint {
    pub fn null_max(&self) -> Vec<f64> {
        self.null_max_bits
            .iter()
            .map(|&b| f64::from_bits(b))
            .collect()
    }

    pub fn set_null_max(&mut self, null_max: &[f64]) {
        self.null_max_bits = null_max.iter().map(|v| v.to_bits()).collect();
    }

    pub fn null_histogram(&self) -> Option<NullHistogram> {
        self.histogram.as_ref().map(|bins| {
            let mut h = NullHistogram::empty();
            for &(bin, count) in bins {
                h.counts[bin as usize] = count;
            }
            h
        })
    }

    pub fn set_histogram(&mut self, hist: Option<&NullHistogram>) {
        self.histogram = hist.map(|h| {
            h.counts
                .iter()
                .enumerate()
                .filter(|(_, &c)| c > 0)
                .map(|(b, &c)| (b as u32, c))
                .collect()
        });
    }

    /// Atomically replaces the checkpoint in `out`.
    pub fn save(&self, out: &Path) -> Result<()> {
        let path = out.join(CHECKPOINT_FILE);
        let temp = temp_name(&path);
        let text = serde_json::to_string(self)
            .map_err(|e| RiffleError::Internal(format!("checkpoint: {e}")))?;
        std::fs::write(&temp, text).at(&temp)?;
        std::fs::rename(&temp, &path).at(&path)
    }

    /// The checkpoint in `out` if it belongs to this run (same fingerprint
    /// and shard); a foreign or unreadable one is removed with a note.
    pub fn load_matching(
        out: &Path,
        fingerprint: &str,
        shard: Option<ShardSpec>,
        quiet: bool,
    ) -> Option<Checkpoint> {
        let path = out.join(CHECKPOINT_FILE);
        let text = std::fs::read_to_string(&path).ok()?;
        match serde_json::from_str::<Checkpoint>(&text) {
            Ok(c) if c.fingerprint == fingerprint && c.shard == shard => {
                if !quiet {
                    eprintln!(
                        "riffle: resuming the interrupted run in {} ({} features done, {:?})",
                        out.display(),
                        c.features_done,
                        c.phase
                    );
                }
                Some(c)
            }
            _ => {
                if !quiet {
                    eprintln!(
                        "riffle: {} holds a checkpoint of a different run; starting afresh",
                        out.display()
                    );
                }
                let _ = std::fs::remove_file(&path);
                None
            }
        }
    }

    pub fn remove(out: &Path) {
        let _ = std::fs::remove_file(out.join(CHECKPOINT_FILE));
    }
}

/// When the first pass should commit: every `interval`.
pub struct Schedule {
    interval: Duration,
    last: Instant,
}

impl Schedule {
    pub fn new(seconds: f64) -> Self {
        Schedule {
            interval: Duration::from_secs_f64(seconds.max(0.0)),
            last: Instant::now(),
        }
    }

    pub fn due(&mut self) -> bool {
        if self.last.elapsed() >= self.interval {
            self.last = Instant::now();
            true
        } else {
            false
        }
    }
}
