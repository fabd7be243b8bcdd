//! Sequential stopping (Besag & Clifford 1991, "Sequential Monte Carlo
//! p-values", Biometrika 78(2), 301-304): a feature leaves the relabelings
//! at its h-th exceedance, after L of them, with p = h / L; features that
//! never reach h run through all B and keep (b + 1) / (B + 1).
//!
//! Most features of an omics scan are null and reach h within a few dozen
//! relabelings, so the GEMM tiles run in batches and the rows still open are
//! packed together between batches: later, wider batches multiply only the
//! few features that are still in doubt.
//!
//! L is the position of the h-th exceedance in the shared relabelling
//! sequence, found column by column inside the tile where the count crosses
//! h (with the same f32 / f64 decision as the counting), so it does not
//! depend on the batch boundaries, the chunking or the threads: the batches
//! only decide how much GEMM work is spent past a feature's stopping point.

use super::{Kernel, KernelScratch, RowCheck, COL_TILE};

/// Relabelings in the first batch; each later batch doubles the number
/// done. With h = 10 a null feature with p = u stops near L = 10 / u, so
/// half the nulls are gone after ~20 relabelings and each doubling keeps
/// roughly half of those left: GEMM work per null feature grows only with
/// log(B), not with B.
const FIRST_BATCH: usize = 32;

impl Kernel {
    /// Exceedances and relabelings used per packed row (`obs.len()` rows of
    /// `n` standardized values). A row that stopped has exactly `h`
    /// exceedances; one that did not has fewer and used every relabelling.
    pub(super) fn count_sequential(
        &self,
        standardized: &[f64],
        obs: &[f64],
        h: u64,
        s: &mut KernelScratch,
    ) -> (Vec<u64>, Vec<u64>) {
        let n = self.units();
        let b_total = self.relabel.count;
        let t = obs.len();
        let mut exceed = vec![0u64; t];
        let mut used = vec![b_total as u64; t];
        // Open rows (indices into the chunk's tested rows) and their packed
        // standardized values and observed statistics.
        let mut open: Vec<usize> = (0..t).collect();
        let mut z_open = standardized.to_vec();
        let mut obs_open = obs.to_vec();
        // No per-relabelling maxima are kept: +inf floors make `count_row`
        // skip that work entirely.
        let mut floors = vec![f32::INFINITY; COL_TILE];
        let mut maxima = vec![f64::INFINITY; COL_TILE];
        let mut start = 0;
        let mut end = FIRST_BATCH.min(b_total);
        while start < b_total && !open.is_empty() {
            let mut stopped = vec![false; open.len()];
            let rows_view = self.load_rows(&z_open, &obs_open, &mut s.rows);
            self.for_each_tile_row(
                &rows_view,
                start,
                end - start,
                &mut s.tiles,
                |k, col0, tile| {
                    if stopped[k] {
                        return;
                    }
                    let g = open[k];
                    let z = &z_open[k * n..(k + 1) * n];
                    let row = RowCheck::new(obs_open[k], rows_view.band[k], rows_view.slack[k]);
                    let width = tile.len();
                    let flags = super::simd::scan_row(
                        tile,
                        &floors[..width],
                        row.above,
                        row.below,
                        row.slack,
                    );
                    let hits = self.count_row(
                        tile,
                        &row,
                        &flags,
                        z,
                        col0,
                        &mut floors[..width],
                        &mut maxima[..width],
                        None,
                        &mut [],
                    );
                    if exceed[g] + hits >= h {
                        let j = self.nth_exceedance(tile, &row, z, col0, h - exceed[g]);
                        exceed[g] = h;
                        used[g] = (col0 + j + 1) as u64;
                        stopped[k] = true;
                    } else {
                        exceed[g] += hits;
                    }
                },
            );
            let mut kept = 0;
            for k in 0..open.len() {
                if !stopped[k] {
                    open[kept] = open[k];
                    z_open.copy_within(k * n..(k + 1) * n, kept * n);
                    obs_open[kept] = obs_open[k];
                    kept += 1;
                }
            }
            open.truncate(kept);
            z_open.truncate(kept * n);
            obs_open.truncate(kept);
            start = end;
            end = (end * 2).min(b_total);
        }
        (exceed, used)
    }

    /// Index within `tile` of the row's `need`-th exceedance (1-based
    /// `need`), deciding each column exactly as `count_row` counts it: f32
    /// where clear, f64 within the error band.
    fn nth_exceedance(
        &self,
        tile: &[f32],
        row: &RowCheck,
        z: &[f64],
        col0: usize,
        need: u64,
    ) -> usize {
        let mut seen = 0u64;
        let mut cache = None;
        for (j, &v) in tile.iter().enumerate() {
            // NaN is neither above nor below: decided in f64, as in count_row.
            let near = !(v > row.above || v < row.below);
            let hit = v > row.above
                || (near
                    && self.exact_stat_cached(z, col0 + j, row.slack > 0.0, &mut cache)
                        >= row.threshold);
            seen += u64::from(hit);
            if seen == need {
                return j;
            }
        }
        // count_row found at least `need` in this tile by the same rule.
        tile.len() - 1
    }
}
