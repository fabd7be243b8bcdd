//! Family-wise error from the shared relabelings (Westfall & Young 1993,
//! "Resampling-based multiple testing", Wiley): the single-step maxT
//! adjusted p-value of a feature is the share of labelings (the observed
//! one included) whose largest kernel statistic over all features is at
//! least the feature's observed one.

use std::path::Path;

use crate::error::{IoContext, Result, RiffleError};
use crate::spill::temp_name;

pub const NULL_MAX_FILE: &str = "null_max.bin";

pub fn write_null_max(spill_dir: &Path, null_max: &[f64]) -> Result<()> {
    let path = spill_dir.join(NULL_MAX_FILE);
    let temp = temp_name(&path);
    let bytes: Vec<u8> = null_max.iter().flat_map(|v| v.to_le_bytes()).collect();
    std::fs::write(&temp, bytes).at(&temp)?;
    std::fs::rename(&temp, &path).at(&path)
}

pub fn read_null_max(spill_dir: &Path) -> Result<Vec<f64>> {
    let path = spill_dir.join(NULL_MAX_FILE);
    let bytes = std::fs::read(&path).at(&path)?;
    if bytes.len() % 8 != 0 {
        return Err(RiffleError::bad_input(
            &path,
            "end",
            "length is not a multiple of 8",
        ));
    }
    Ok(bytes
        .chunks_exact(8)
        .map(|c| f64::from_le_bytes(c.try_into().unwrap()))
        .collect())
}

/// Single-step maxT from the per-relabelling maxima.
pub struct SingleStep {
    sorted: Vec<f64>,
}

impl SingleStep {
    pub fn new(null_max: &[f64]) -> Self {
        let mut sorted = null_max.to_vec();
        sorted.sort_by(|a, b| a.total_cmp(b));
        SingleStep { sorted }
    }

    /// (1 + #{b : max_b >= observed}) / (B + 1), with the kernel's tie
    /// tolerance so that equal statistics count as reached.
    pub fn adjusted(&self, observed: f64) -> f64 {
        let threshold = observed - crate::kernel::tie_tolerance(observed);
        let below = self.sorted.partition_point(|&m| m < threshold);
        let reached = self.sorted.len() - below;
        (reached + 1) as f64 / (self.sorted.len() + 1) as f64
    }
}

pub const NULL_HISTOGRAM_FILE: &str = "null_hist.bin";

/// The pooled null histogram, kept beside the spill for later merging.
pub fn write_null_histogram(spill_dir: &Path, hist: &crate::kernel::NullHistogram) -> Result<()> {
    let path = spill_dir.join(NULL_HISTOGRAM_FILE);
    let temp = temp_name(&path);
    let bytes: Vec<u8> = hist.counts.iter().flat_map(|v| v.to_le_bytes()).collect();
    std::fs::write(&temp, bytes).at(&temp)?;
    std::fs::rename(&temp, &path).at(&path)
}
