//! Rows with missing values in Spearman and covariate designs: no fixed
//! weights give their relabelled statistics (`stats::masked_exact`), so each
//! is computed directly in f64, O(n) (Spearman) or O(n p) (model) per
//! relabelling. The tile then holds those values rounded to f32, and the
//! usual counting (`count_row`: error band, f64 recheck near the observed
//! value and above the running maxima' floors) runs unchanged, so maxT,
//! step-down, sequential stopping, the pooled null and the tail pass see
//! these rows like any other. The rechecks rebuild the same `ExactRow`
//! (deterministic), so a recomputed value equals the one rounded into the
//! tile bit for bit.

use super::{assignment, Kernel};
use crate::stats::masked_exact::ExactRow;
use crate::stats::prepare::Assignment;

/// Relative band of an f32-rounded f64 value (f32 rounding is 6e-8).
const ROUNDING: f64 = 1e-6;

impl Kernel {
    /// Whether a row with missing values takes the per-row f64 path.
    pub(super) fn exact_masked(&self) -> bool {
        self.spec.exact_masked()
    }

    /// Kernel statistics of the masked row `z` for relabelings
    /// `col0..col0 + out.len()`, rounded to f32.
    pub(super) fn exact_tile(&self, z: &[f64], col0: usize, out: &mut [f32]) {
        let mut row = self.spec.exact_row(z);
        for (j, v) in out.iter_mut().enumerate() {
            *v = self.exact_row_stat(&mut row, col0 + j) as f32;
        }
    }

    /// Error band (around the observed value) and slack (against the
    /// maxima' floors) of a tile row filled by `exact_tile`: only the
    /// rounding to f32; the slack also marks the row as masked.
    pub(super) fn exact_band(&self, kernel_obs: f64) -> (f64, f32) {
        let band = ROUNDING * (1.0 + kernel_obs.abs());
        (band, band as f32)
    }

    fn exact_row_stat(&self, row: &mut ExactRow, b: usize) -> f64 {
        let sources = match assignment(&self.spec, &self.relabel, b) {
            Assignment::Sources(s) => Some(s),
            _ => None,
        };
        row.kernel_stat(&self.spec, sources)
    }

    /// `exact_stat`, keeping a masked row's `ExactRow` in `cache` between
    /// calls for the same row.
    pub(super) fn exact_stat_cached(
        &self,
        z: &[f64],
        b: usize,
        masked: bool,
        cache: &mut Option<ExactRow>,
    ) -> f64 {
        if masked && self.exact_masked() {
            let row = cache.get_or_insert_with(|| self.spec.exact_row(z));
            return self.exact_row_stat(row, b);
        }
        self.exact_stat(z, b, masked)
    }
}
