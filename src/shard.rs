//! Shards: one scan split into N contiguous feature ranges, each run as its
//! own process (a Slurm array task, say), later combined by `merge` into
//! results byte-identical to a single-process run.
//!
//! A shard folder (the shard run's `--out`) holds:
//! - `spill/records.bin`, `spill/ids.bin`: the first-pass records of its
//!   range (as a single run writes them, before the step-down rewrite);
//! - `spill/null_max.bin`: per relabelling, the largest statistic over the
//!   range; `spill/null_hist.bin` with `--pooled-null`;
//! - step-down only: `spill/rank-keys.bin`, the range's tested features in
//!   ascending (statistic, index) order with their exceedance counts, and
//!   `spill/step-functions.bin`, per relabelling the points at which the
//!   running maximum over the range (in that order) rose;
//! - `shard.json`, written last: shard K/N, the range, the design, the
//!   options and the provenance fingerprint. Its presence marks the shard
//!   as complete.

use std::fs::File;
use std::io::{BufReader, BufWriter, Read, Write};
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::error::{IoContext, Result, RiffleError};
use crate::input::{FeatureBlock, FeatureSource, MatrixInfo};
use crate::spill::temp_name;

pub const SHARD_RECORD: &str = "shard.json";
pub const RANK_KEYS_FILE: &str = "rank-keys.bin";
pub const STEP_FUNCTIONS_FILE: &str = "step-functions.bin";
/// Bytes of one rank-keys entry: statistic f64, index u64, exceed u64.
pub const RANK_KEY_LEN: usize = 24;
const STEP_MAGIC: &[u8; 8] = b"RIFSTEP1";

/// Shard K of N (K counts from 1).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct ShardSpec {
    pub index: u64,
    pub count: u64,
}

impl ShardSpec {
    /// Parses "K/N" with 1 <= K <= N.
    pub fn parse(text: &str) -> std::result::Result<Self, String> {
        let bad = || format!("--shard '{text}': expected K/N with 1 <= K <= N, e.g. 2/8");
        let (k, n) = text.split_once('/').ok_or_else(bad)?;
        let index: u64 = k.trim().parse().map_err(|_| bad())?;
        let count: u64 = n.trim().parse().map_err(|_| bad())?;
        if index == 0 || count == 0 || index > count {
            return Err(bad());
        }
        Ok(ShardSpec { index, count })
    }

    /// From a Slurm array task's environment: K = (TASK_ID - TASK_MIN) /
    /// TASK_STEP + 1 and N = TASK_COUNT, so `--array=1-4` and `--array=0-3`
    /// both give shards 1/4..4/4. None outside an array job.
    pub fn from_slurm_env() -> Result<Option<Self>> {
        let var = |name: &str| std::env::var(name).ok();
        let (Some(id), Some(count)) = (var("SLURM_ARRAY_TASK_ID"), var("SLURM_ARRAY_TASK_COUNT"))
        else {
            return Ok(None);
        };
        let number = |name: &str, value: &str| -> Result<u64> {
            value.trim().parse().map_err(|_| {
                RiffleError::options(format!("{name}='{value}' is not a whole number"))
            })
        };
        let id = number("SLURM_ARRAY_TASK_ID", &id)?;
        let count = number("SLURM_ARRAY_TASK_COUNT", &count)?;
        let min = match var("SLURM_ARRAY_TASK_MIN") {
            Some(v) => number("SLURM_ARRAY_TASK_MIN", &v)?,
            None => 0,
        };
        let step = match var("SLURM_ARRAY_TASK_STEP") {
            Some(v) => number("SLURM_ARRAY_TASK_STEP", &v)?.max(1),
            None => 1,
        };
        let index = id.checked_sub(min).map(|d| d / step + 1);
        match index {
            Some(index) if index <= count && count > 0 => Ok(Some(ShardSpec { index, count })),
            _ => Err(RiffleError::options(format!(
                "Slurm array task {id} (min {min}, step {step}, count {count}) does not map to \
                 a shard K/N; use a contiguous array such as --array=1-{count}, or pass --shard K/N"
            ))),
        }
    }

    /// The feature range [start, end) of this shard among `n_features`:
    /// start = floor(F (K - 1) / N).
    pub fn range(&self, n_features: u64) -> (u64, u64) {
        let at = |k: u64| (n_features as u128 * k as u128 / self.count as u128) as u64;
        (at(self.index - 1), at(self.index))
    }
}

impl std::fmt::Display for ShardSpec {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{}/{}", self.index, self.count)
    }
}

/// A source limited to a range of features, with global feature indices.
pub struct RangeSource {
    inner: Box<dyn FeatureSource>,
    end: u64,
    next: u64,
}

impl RangeSource {
    pub fn new(mut inner: Box<dyn FeatureSource>, (start, end): (u64, u64)) -> Result<Self> {
        inner.seek(start)?;
        Ok(RangeSource {
            inner,
            end,
            next: start,
        })
    }
}

impl FeatureSource for RangeSource {
    fn info(&self) -> &MatrixInfo {
        self.inner.info()
    }

    fn seek(&mut self, feature_index: u64) -> Result<()> {
        self.inner.seek(feature_index)?;
        self.next = feature_index;
        Ok(())
    }

    fn next_block(&mut self, max_rows: usize, block: &mut FeatureBlock) -> Result<usize> {
        let remaining = self.end.saturating_sub(self.next);
        if remaining == 0 {
            return Ok(0);
        }
        let got = self
            .inner
            .next_block(max_rows.min(remaining as usize).max(1), block)?;
        self.next += got as u64;
        Ok(got)
    }
}

/// What `shard.json` records.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct ShardRecord {
    pub shard: ShardSpec,
    /// Feature range [start, end) of this shard.
    pub range: (u64, u64),
    /// Features in the whole matrix.
    pub n_features: u64,
    pub tested: u64,
    pub untested: Vec<(String, u64)>,
    pub relabelings: usize,
    pub exact: bool,
    pub design: crate::design::StudyDesign,
    pub matrix_format: crate::input::MatrixFormat,
    pub sample_columns: Vec<String>,
    pub options: crate::scan::ScanOptions,
    pub provenance: crate::provenance::Provenance,
    pub seconds: f64,
    pub pipeline: ShardTiming,
}

#[derive(Debug, Clone, Default, Serialize, Deserialize)]
pub struct ShardTiming {
    pub chunks: u64,
    pub read_seconds: f64,
    pub kernel_seconds: f64,
    pub wall_seconds: f64,
}

impl ShardRecord {
    pub fn write(&self, dir: &Path) -> Result<()> {
        let path = dir.join(SHARD_RECORD);
        let temp = temp_name(&path);
        let text = serde_json::to_string_pretty(self)
            .map_err(|e| RiffleError::Internal(format!("shard record: {e}")))?;
        std::fs::write(&temp, text + "\n").at(&temp)?;
        std::fs::rename(&temp, &path).at(&path)
    }

    pub fn read(dir: &Path) -> Result<Self> {
        let path = dir.join(SHARD_RECORD);
        if !path.is_file() {
            return Err(RiffleError::bad_input(
                dir,
                SHARD_RECORD,
                "no shard.json: not a shard folder, or the shard run did not finish",
            ));
        }
        let text = std::fs::read_to_string(&path).at(&path)?;
        serde_json::from_str(&text).map_err(|e| {
            RiffleError::bad_input(
                &path,
                format!("line {}, column {}", e.line(), e.column()),
                format!("not a riffle shard record: {e}"),
            )
        })
    }
}

/// Per relabelling, the (observed statistic, new maximum) points at which
/// the running maximum rose, statistics ascending.
pub type StepFunctions = Vec<Vec<(f64, f64)>>;

/// Layout: magic, u64 relabelings, then per relabelling a u64 count and
/// that many (f64 statistic, f64 maximum) pairs, little-endian.
pub fn write_step_functions(path: &Path, functions: &StepFunctions) -> Result<()> {
    let temp = temp_name(path);
    let mut out = BufWriter::with_capacity(1 << 20, File::create(&temp).at(&temp)?);
    out.write_all(STEP_MAGIC).at(&temp)?;
    out.write_all(&(functions.len() as u64).to_le_bytes())
        .at(&temp)?;
    for points in functions {
        out.write_all(&(points.len() as u64).to_le_bytes())
            .at(&temp)?;
        for &(t, m) in points {
            out.write_all(&t.to_le_bytes()).at(&temp)?;
            out.write_all(&m.to_le_bytes()).at(&temp)?;
        }
    }
    let file = out
        .into_inner()
        .map_err(|e| RiffleError::io(&temp, e.into_error()))?;
    file.sync_all().at(&temp)?;
    std::fs::rename(&temp, path).at(path)
}

pub fn read_step_functions(path: &Path, expected: usize) -> Result<StepFunctions> {
    let bad = |msg: String| RiffleError::bad_input(path, "step functions", msg);
    let mut input = BufReader::with_capacity(1 << 20, File::open(path).at(path)?);
    let mut word = [0u8; 8];
    let mut read_word = |input: &mut BufReader<File>| -> Result<[u8; 8]> {
        input
            .read_exact(&mut word)
            .map_err(|_| bad("file ends early".into()))?;
        Ok(word)
    };
    if &read_word(&mut input)? != STEP_MAGIC {
        return Err(bad("not a riffle step-function file".into()));
    }
    let count = u64::from_le_bytes(read_word(&mut input)?) as usize;
    if count != expected {
        return Err(bad(format!(
            "{count} relabelings, the shard record says {expected}"
        )));
    }
    let mut functions = Vec::with_capacity(count);
    for _ in 0..count {
        let points = u64::from_le_bytes(read_word(&mut input)?) as usize;
        let mut list = Vec::with_capacity(points.min(1 << 20));
        for _ in 0..points {
            let t = f64::from_le_bytes(read_word(&mut input)?);
            let m = f64::from_le_bytes(read_word(&mut input)?);
            list.push((t, m));
        }
        functions.push(list);
    }
    Ok(functions)
}

/// The shard folder paths named in error messages.
pub fn describe(dir: &Path, record: &ShardRecord) -> String {
    format!("shard {} ({})", record.shard, dir.display())
}

pub fn spill_dir(dir: &Path) -> PathBuf {
    dir.join(crate::scan::SPILL_DIR)
}
