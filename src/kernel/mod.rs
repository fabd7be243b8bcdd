//! Kernel stage: one chunk of standardized features against all shared
//! relabelings, as cache-sized single-precision GEMM tiles with the
//! exceedance counting done on each tile while it is hot.
//!
//! f32 is accurate enough for almost every comparison; the few that land
//! within the f32 error bound of the observed statistic (or of a running
//! per-relabelling maximum) are recomputed in f64 from the standardized row,
//! so the counts equal an all-f64 computation.

use crate::design::Relabelings;
use crate::stats::prepare::{Assignment, PrepScratch, Prepared, Status, TestSpec};
use crate::stats::DesignKind;

use crate::stats::TestKind;

mod exact_rows;
mod finish;
mod histogram;
mod masked;
mod micro;
mod reached;
mod sequential;
mod simd;

pub use histogram::{NullHistogram, UpperTail};
pub use micro::PackedWeights;
use micro::RowFlags;
use reached::SortedMaxima;
use simd::orient_all;

/// Features per GEMM tile (rows of the left operand).
const ROW_TILE: usize = 64;
/// Relabelings per GEMM tile (columns of the right operand).
const COL_TILE: usize = 512;
/// Unit roundoff of f32.
const F32_UNIT: f64 = 5.960_464_477_539_063e-8;

/// Everything a worker needs, shared read-only by all workers.
pub struct Kernel {
    spec: TestSpec,
    /// 1 / group size, per class (k-group tests).
    inverse_group_sizes: Vec<f32>,
    /// Whether to count every relabelled statistic into a pooled histogram.
    pooled_null: bool,
    /// Sequential stopping: a feature stops at this many exceedances.
    stop_after: Option<u64>,
    observed: Vec<u8>,
    relabel: Relabelings,
    /// `n x B` (times the width): 1.0 where relabelling b puts sample i in
    /// group B.
    weights: Weights,
    /// The squared weights (Pearson rows with missing values: the permuted
    /// trait's sum of squares over their observed samples), built when
    /// first needed, in the same layout.
    squared_weights: std::sync::OnceLock<Weights>,
}

/// The weights in the layout of the multiply that reads them.
enum Weights {
    /// Row-major, for the general GEMM (`matrixmultiply`).
    RowMajor(Vec<f32>),
    /// Packed once for the kernel's own microkernel (`micro.rs`).
    Panels(micro::Isa, micro::Panels),
}

impl Weights {
    fn squared(&self) -> Weights {
        match self {
            Weights::RowMajor(w) => Weights::RowMajor(w.iter().map(|w| w * w).collect()),
            Weights::Panels(isa, p) => Weights::Panels(*isa, p.map(|w| w * w)),
        }
    }
}

/// Per-feature outcome of a chunk.
#[derive(Debug, Clone, Copy)]
pub struct FeatureOutcome {
    pub prepared: Prepared,
    /// Relabelings at least as extreme as the observed labelling (with
    /// sequential stopping: among the first `relabelings`).
    pub exceed: u64,
    /// Relabelings this feature was compared with: all of them, or fewer
    /// when sequential stopping ended it early.
    pub relabelings: u64,
}

/// What a chunk contributes beyond its features: the largest kernel
/// statistic over its tested features, per relabelling (f64-exact).
#[derive(Default)]
pub struct ChunkOutcome {
    pub features: Vec<FeatureOutcome>,
    pub null_max: Vec<f64>,
    /// Standardized rows (`n` values each) of the tested features, in order.
    pub standardized: Vec<f64>,
    /// Pooled null histogram of this chunk (empty unless asked for).
    pub null_hist: Vec<u64>,
}

/// Per-worker reusable buffers.
#[derive(Default)]
pub struct KernelScratch {
    prep: PrepScratch,
    z64: Vec<f64>,
    /// The tested rows of `z64`, packed.
    packed: Vec<f64>,
    tested: Vec<usize>,
    rows: RowBuffers,
    tiles: TileBuffers,
    /// Running per-relabelling maxima over every chunk this worker ran:
    /// kept across chunks so that few values need an f64 recheck (maxima
    /// merge by max, so the total does not depend on who ran what).
    maxima: Vec<f64>,
    floors: Vec<f32>,
}

impl Kernel {
    /// `observed` is the observed class of each unit (group tests; empty
    /// otherwise).
    pub fn new(spec: TestSpec, observed: Vec<u8>, relabel: Relabelings) -> Self {
        let n = spec.units();
        let r = spec.width();
        let b = relabel.count;
        let columns = b * r;
        let mut unit_weights = vec![0f64; n * r];
        // Packed straight away where the microkernel runs, so that the
        // row-major copy is never held beside the packed one.
        let weights = match micro::Isa::detect() {
            Some(isa) => {
                let mut panels = micro::Panels::zeros(n, columns);
                for j in 0..b {
                    spec.weights(assignment(&spec, &relabel, j), &mut unit_weights);
                    for i in 0..n {
                        for c in 0..r {
                            panels.set(i, j * r + c, unit_weights[i * r + c] as f32);
                        }
                    }
                }
                Weights::Panels(isa, panels)
            }
            None => {
                let mut weights = vec![0f32; n * columns];
                for j in 0..b {
                    spec.weights(assignment(&spec, &relabel, j), &mut unit_weights);
                    for i in 0..n {
                        for c in 0..r {
                            weights[i * columns + j * r + c] = unit_weights[i * r + c] as f32;
                        }
                    }
                }
                Weights::RowMajor(weights)
            }
        };
        Kernel {
            inverse_group_sizes: spec.group_sizes.iter().map(|&g| 1.0 / g as f32).collect(),
            spec,
            pooled_null: false,
            stop_after: None,
            observed,
            relabel,
            weights,
            squared_weights: std::sync::OnceLock::new(),
        }
    }

    pub fn with_pooled_null(mut self, pooled_null: bool) -> Self {
        self.pooled_null = pooled_null;
        if pooled_null {
            // The pooled histogram bins the f32 statistics themselves, so
            // its counts depend on the multiply's rounding: it keeps the
            // general GEMM, whose bits earlier versions produced.
            self = self.with_general_multiply();
        }
        self
    }

    /// Uses the general GEMM (`matrixmultiply`) instead of the packed
    /// microkernel: the reference the microkernel is measured and tested
    /// against.
    pub fn with_general_multiply(mut self) -> Self {
        if let Weights::Panels(_, panels) = &self.weights {
            self.weights = Weights::RowMajor(panels.to_row_major());
            self.squared_weights = std::sync::OnceLock::new();
        }
        self
    }

    /// Sequential stopping at `h` exceedances (see `sequential.rs`).
    pub fn with_stop_after(mut self, h: Option<u64>) -> Self {
        self.stop_after = h;
        self
    }

    pub fn pooled_null(&self) -> bool {
        self.pooled_null
    }

    pub fn relabelings(&self) -> &Relabelings {
        &self.relabel
    }

    pub fn spec(&self) -> &TestSpec {
        &self.spec
    }

    /// The exact (f64) kernel statistic of a standardized row under
    /// relabelling `b`; `masked` when the row has missing values (NaN).
    fn exact_stat(&self, z: &[f64], b: usize, masked: bool) -> f64 {
        let relabelling = assignment(&self.spec, &self.relabel, b);
        if masked {
            self.spec.masked_kernel_stat_with(z, relabelling)
        } else {
            self.spec.kernel_stat_with(z, relabelling)
        }
    }

    /// Every relabelled kernel statistic of one standardized row, in f64:
    /// for the few features whose null tail is fitted (`crate::tail`).
    pub fn relabelled_stats(&self, z: &[f64], out: &mut Vec<f64>) {
        let masked = z.iter().any(|v| v.is_nan());
        let mut cache = None;
        out.clear();
        out.extend(
            (0..self.relabel.count).map(|b| self.exact_stat_cached(z, b, masked, &mut cache)),
        );
    }

    /// Units per feature (samples, or pairs).
    fn units(&self) -> usize {
        self.spec.units()
    }

    /// Runs one chunk: `raw` is `rows x raw_width` row-major. Without `count`, only
    /// screens and standardizes.
    pub fn run_chunk(
        &self,
        raw: &[f64],
        rows: usize,
        count: bool,
        s: &mut KernelScratch,
    ) -> ChunkOutcome {
        let mut out = ChunkOutcome::default();
        self.run_chunk_into(raw, rows, count, true, s, &mut out);
        out
    }

    /// [`Self::run_chunk`] on rows that follow those already in `out`: their
    /// outcomes are appended, null maxima and histogram merged, and their
    /// standardized rows appended only when `keep_rows` (only the step-down
    /// sorter reads them). A chunk run in pieces thus fills one outcome
    /// instead of one per piece that must then be copied into the whole.
    pub fn run_chunk_into(
        &self,
        raw: &[f64],
        rows: usize,
        count: bool,
        keep_rows: bool,
        s: &mut KernelScratch,
        out: &mut ChunkOutcome,
    ) {
        let n = self.units();
        let width = self.spec.raw_width();
        let b_total = self.relabel.count;
        s.z64.resize(rows * n, 0.0);
        s.tested.clear();
        let base = out.features.len();
        out.features.reserve(rows);
        for r in 0..rows {
            let prepared = self.spec.prepare(
                &raw[r * width..(r + 1) * width],
                &self.observed,
                &mut s.z64[r * n..(r + 1) * n],
                &mut s.prep,
            );
            if prepared.status == Status::Tested {
                s.tested.push(r);
            }
            out.features.push(FeatureOutcome {
                prepared,
                exceed: 0,
                relabelings: 0,
            });
        }
        let features = &mut out.features[base..];
        // Tested rows packed together, in order: straight after those of
        // `out` when kept, otherwise in a buffer kept across calls (either
        // taken out so that the scratch buffers stay free to borrow).
        let mut packed = if keep_rows {
            std::mem::take(&mut out.standardized)
        } else {
            let mut packed = std::mem::take(&mut s.packed);
            packed.clear();
            packed
        };
        let from = packed.len();
        for &r in &s.tested {
            packed.extend_from_slice(&s.z64[r * n..(r + 1) * n]);
        }
        let standardized = &packed[from..];
        if s.maxima.len() != b_total {
            s.maxima = vec![f64::NEG_INFINITY; b_total];
            s.floors = vec![f32::NEG_INFINITY; b_total];
        }
        let t = s.tested.len();
        if t > 0 && b_total > 0 && count {
            let obs: Vec<f64> = s
                .tested
                .iter()
                .map(|&r| features[r].prepared.kernel_obs)
                .collect();
            if let Some(h) = self.stop_after {
                let (exceed, used) = self.count_sequential(standardized, &obs, h, s);
                for (k, &r) in s.tested.iter().enumerate() {
                    features[r].exceed = exceed[k];
                    features[r].relabelings = used[k];
                }
                // Per-relabelling maxima would miss the stopped features:
                // none are kept (maxT is not offered with sequential
                // stopping).
            } else {
                let rows_view = self.load_rows(standardized, &obs, &mut s.rows);
                let (floors, null_max) = (&mut s.floors, &mut s.maxima);
                let mut exceed = vec![0u64; t];
                let mut null_hist = if self.pooled_null {
                    vec![0u64; NullHistogram::BINS]
                } else {
                    Vec::new()
                };
                self.for_each_counted_row(
                    &rows_view,
                    &obs,
                    0,
                    b_total,
                    &mut s.tiles,
                    floors,
                    |k, col0, tile, row, flags, floors| {
                        let z = &standardized[k * n..(k + 1) * n];
                        exceed[k] += self.count_row(
                            tile,
                            row,
                            flags,
                            z,
                            col0,
                            floors,
                            &mut null_max[col0..col0 + tile.len()],
                            None,
                            &mut null_hist,
                        );
                    },
                );
                for (k, &r) in s.tested.iter().enumerate() {
                    features[r].exceed = exceed[k];
                    features[r].relabelings = b_total as u64;
                }
                if out.null_hist.is_empty() {
                    out.null_hist = null_hist;
                } else {
                    for (h, v) in out.null_hist.iter_mut().zip(&null_hist) {
                        *h += v;
                    }
                }
            }
        }
        if keep_rows {
            out.standardized = packed;
        } else {
            s.packed = packed;
        }
        // The worker's running maxima: merging by max gives those after
        // the last piece.
        if out.null_max.is_empty() {
            out.null_max.extend_from_slice(&s.maxima);
        } else {
            for (m, v) in out.null_max.iter_mut().zip(&s.maxima) {
                *m = m.max(*v);
            }
        }
    }

    /// Rank-order pass over relabelings `state.col0..state.col0 + state.cols`:
    /// rows come in ascending order of their observed statistic; for each
    /// row, `exceed` counts relabelings at least as extreme as it, and
    /// `reached` counts relabelings whose running maximum over this and all
    /// earlier rows reaches it (the successive maxima of step-down maxT).
    pub fn rank_rows(
        &self,
        standardized: &[f64],
        obs: &[f64],
        state: &mut RankState,
        exceed: &mut [u64],
        reached: &mut [u64],
        scratch: &mut KernelScratch,
    ) {
        let n = self.units();
        let rows_view = self.load_rows(standardized, obs, &mut scratch.rows);
        let base = state.col0;
        self.for_each_counted_row(
            &rows_view,
            obs,
            state.col0,
            state.cols,
            &mut scratch.tiles,
            &mut state.floors,
            |k, col0, tile, row, flags, floors| {
                let z = &standardized[k * n..(k + 1) * n];
                let range = col0 - base..col0 - base + tile.len();
                let mut hits = 0u64;
                let recording = !state.records.is_empty();
                if recording {
                    state.before.clear();
                    state.before.extend_from_slice(&state.maxima[range.clone()]);
                }
                exceed[k] += self.count_row(
                    tile,
                    row,
                    flags,
                    z,
                    col0,
                    floors,
                    &mut state.maxima[range.clone()],
                    Some((
                        &mut hits,
                        SortedMaxima {
                            sorted: &mut state.sorted[range.clone()],
                            below: &mut state.below[(col0 - base) / COL_TILE],
                        },
                    )),
                    &mut state.histogram,
                );
                if recording {
                    for (j, (&old, &new)) in state
                        .before
                        .iter()
                        .zip(&state.maxima[range.clone()])
                        .enumerate()
                    {
                        if new > old {
                            state.records[range.start + j].push((obs[k], new));
                        }
                    }
                }
                reached[k] += hits;
            },
        );
    }

    /// f32 copies (and squares, for Welch) and error bands of packed rows.
    fn load_rows<'a>(
        &self,
        standardized: &'a [f64],
        obs: &[f64],
        buffers: &'a mut RowBuffers,
    ) -> RowsView<'a> {
        let squares = self.spec.test.needs_squares();
        let n = self.units();
        // Missing values (NaN, masked rows) enter the sums as 0.
        let f32_or_zero = |v: f64| if v.is_nan() { 0.0 } else { v as f32 };
        buffers.z32.clear();
        if squares {
            // Each row is followed by its squares, so that one GEMM call
            // (sharing the weights) gives both the sums and the sums of
            // squares, and both sit in one register block of the
            // microkernel, which finishes Welch t there.
            for row in standardized.chunks(n.max(1)) {
                buffers.z32.extend(row.iter().map(|&v| f32_or_zero(v)));
                buffers.z32.extend(row.iter().map(|&v| f32_or_zero(v * v)));
            }
        } else {
            buffers
                .z32
                .extend(standardized.iter().map(|&v| f32_or_zero(v)));
        }
        buffers.band.clear();
        buffers.slack.clear();
        buffers.observed.clear();
        for (k, &o) in obs.iter().enumerate() {
            let mut abs_sum = 0.0;
            let mut missing = 0;
            for &v in &standardized[k * n..(k + 1) * n] {
                if v.is_nan() {
                    missing += 1;
                } else {
                    abs_sum += v.abs();
                }
            }
            let (band, slack) = if missing == 0 {
                (self.error_band(o, abs_sum), 0.0)
            } else if self.exact_masked() {
                self.exact_band(o)
            } else {
                self.masked_band(o, abs_sum, n - missing)
            };
            buffers.band.push(band);
            buffers.slack.push(slack);
            buffers.observed.push(n - missing);
        }
        buffers.mask32.clear();
        if buffers.observed.iter().any(|&m| m < n)
            && self.spec.test.design() != DesignKind::Paired
            && !self.exact_masked()
        {
            buffers.mask32.extend(
                standardized
                    .iter()
                    .map(|v| if v.is_nan() { 0.0f32 } else { 1.0 }),
            );
        }
        RowsView {
            rows: obs.len(),
            z64: standardized,
            z32: &buffers.z32,
            mask32: &buffers.mask32,
            band: &buffers.band,
            slack: &buffers.slack,
            observed: &buffers.observed,
        }
    }

    /// GEMM tiles over rows x relabelings `col_start..col_start + cols`;
    /// calls `visit(row, first_column, oriented_statistics)` for every row
    /// of every tile, rows in ascending order within each column range.
    fn for_each_tile_row(
        &self,
        rows: &RowsView<'_>,
        col_start: usize,
        cols: usize,
        tiles: &mut TileBuffers,
        mut visit: impl FnMut(usize, usize, &[f32]),
    ) {
        let r = self.spec.width();
        let stack = if self.spec.test.needs_squares() { 2 } else { 1 };
        let col_end = col_start + cols;
        for row0 in (0..rows.rows).step_by(ROW_TILE) {
            let rt = ROW_TILE.min(rows.rows - row0);
            for col0 in (col_start..col_end).step_by(COL_TILE) {
                let ct = COL_TILE.min(col_end - col0);
                self.finished_tile(rows, row0, rt, col0, ct, tiles);
                for i in 0..rt {
                    let at = stack * i * ct * r;
                    visit(row0 + i, col0, &tiles.sums[at..at + ct]);
                }
            }
        }
    }

    /// `for_each_tile_row` with the fast counting pass done:
    /// `visit(row, first_column, oriented_statistics, check, flags,
    /// floors_of_those_columns)`; `floors` covers `col_start..`. Where the
    /// finisher only orients (one sum per relabelling, complete rows) and
    /// the microkernel has AVX-512, orienting and the pass run on the
    /// registers of the multiply (`micro::multiply_counted`).
    #[allow(clippy::too_many_arguments)]
    fn for_each_counted_row(
        &self,
        rows: &RowsView<'_>,
        obs: &[f64],
        col_start: usize,
        cols: usize,
        tiles: &mut TileBuffers,
        floors: &mut [f32],
        mut visit: impl FnMut(usize, usize, &[f32], &RowCheck, &RowFlags, &mut [f32]),
    ) {
        let n = self.units();
        let r = self.spec.width();
        // Taken out of `tiles` for the loop (the tile buffers are borrowed
        // mutably beside it) and put back for the next call.
        let mut all_checks = std::mem::take(&mut tiles.checks);
        all_checks.clear();
        all_checks.extend(
            obs.iter()
                .enumerate()
                .map(|(k, &o)| RowCheck::new(o, rows.band[k], rows.slack[k])),
        );
        let squares = self.spec.test.needs_squares();
        let stack = if squares { 2 } else { 1 };
        let welch = squares.then(|| self.welch_constants());
        let fusable = match &self.weights {
            Weights::Panels(micro::Isa::Avx512, panels) => Some(panels),
            _ => None,
        }
        .filter(|_| r == 1 && self.spec.model.is_none());
        tiles.flags.resize(ROW_TILE, RowFlags::default());
        let col_end = col_start + cols;
        for row0 in (0..rows.rows).step_by(ROW_TILE) {
            let rt = ROW_TILE.min(rows.rows - row0);
            let checks = &all_checks[row0..row0 + rt];
            let complete = rows.observed[row0..row0 + rt].iter().all(|&m| m == n);
            for col0 in (col_start..col_end).step_by(COL_TILE) {
                let ct = COL_TILE.min(col_end - col0);
                let floors = &mut floors[col0 - col_start..col0 - col_start + ct];
                let fused = fusable.filter(|_| complete);
                if let Some(panels) = fused {
                    tiles.sums.resize(stack * ROW_TILE * COL_TILE, 0.0);
                    tiles.bounds.clear();
                    tiles.bounds.extend(checks.iter().map(|c| micro::Bounds {
                        above: c.above,
                        below: c.below,
                        slack: c.slack,
                    }));
                    micro::multiply_counted(
                        panels,
                        &rows.z32[stack * row0 * n..],
                        stack * rt,
                        col0,
                        ct,
                        &mut tiles.sums,
                        self.spec.side,
                        welch,
                        &tiles.bounds,
                        floors,
                        &mut tiles.flags,
                    );
                } else {
                    self.finished_tile(rows, row0, rt, col0, ct, tiles);
                }
                for (i, check) in checks.iter().enumerate() {
                    let at = stack * i * ct * r;
                    let tile = &tiles.sums[at..at + ct];
                    if fused.is_none() {
                        // Scanned just before the row's visit: the floors
                        // are as high as earlier rows left them.
                        tiles.flags[i] =
                            simd::scan_row(tile, floors, check.above, check.below, check.slack);
                    }
                    visit(row0 + i, col0, tile, check, &tiles.flags[i], floors);
                }
            }
        }
        tiles.checks = all_checks;
    }

    /// One tile's multiply (and mask multiplies) and finisher: row i's
    /// oriented statistics end up in `tiles.sums[i * ct * r..][..ct]`.
    fn finished_tile(
        &self,
        rows: &RowsView<'_>,
        row0: usize,
        rt: usize,
        col0: usize,
        ct: usize,
        tiles: &mut TileBuffers,
    ) {
        let n = self.units();
        let r = self.spec.width();
        let squares = self.spec.test.needs_squares();
        // Welch follows each row with its squares (see `load_rows`): one
        // GEMM of twice the rows.
        let stack = if squares { 2 } else { 1 };
        tiles.sums.resize(stack * ROW_TILE * COL_TILE * r, 0.0);
        self.multiply(
            &rows.z32[stack * row0 * n..],
            stack * rt,
            col0 * r,
            ct * r,
            &mut tiles.sums,
        );
        let observed = &rows.observed[row0..row0 + rt];
        let masked = observed.iter().any(|&m| m < n);
        // Sign flips keep the observed pairs: no mask GEMM; nor for rows
        // computed one by one (`exact_rows`).
        let exact = masked && self.exact_masked();
        let mask_gemm = masked && !exact && self.spec.test.design() != DesignKind::Paired;
        if mask_gemm {
            tiles.masks.resize(ROW_TILE * COL_TILE * r, 0.0);
            let masks = &mut tiles.masks;
            self.multiply(&rows.mask32[row0 * n..], rt, col0 * r, ct * r, masks);
        }
        let trait_masked = mask_gemm && self.spec.test.design() == DesignKind::Trait;
        if trait_masked {
            tiles.mask_squares.resize(ROW_TILE * COL_TILE, 0.0);
            let squared = self.squared_weights.get_or_init(|| self.weights.squared());
            let (a, out) = (&rows.mask32[row0 * n..], &mut tiles.mask_squares);
            self.multiply_with(squared, a, rt, col0, ct, out);
        }
        for (i, &row_observed) in observed.iter().enumerate() {
            let row = &mut tiles.sums[stack * i * ct * r..(stack * i + stack) * ct * r];
            let (wide, sq) = row.split_at_mut(ct * r);
            if exact && row_observed < n {
                let k = row0 + i;
                self.exact_tile(&rows.z64[k * n..(k + 1) * n], col0, &mut wide[..ct]);
            } else if masked && row_observed < n {
                let squares = if squares {
                    &sq[..ct]
                } else if trait_masked {
                    &tiles.mask_squares[i * ct..(i + 1) * ct]
                } else {
                    &[]
                };
                let masks = if mask_gemm {
                    &tiles.masks[i * ct * r..(i + 1) * ct * r]
                } else {
                    &[]
                };
                self.masked_tile(wide, squares, masks, row_observed);
            } else if squares {
                self.welch_tile(wide, &sq[..ct]);
            } else if self.spec.model.is_some() {
                self.model_tile(wide, ct);
            } else if r > 1 {
                self.between_groups_tile(wide, ct);
            } else {
                orient_all(self.spec.side, wide);
            }
        }
    }

    /// Largest possible |f32 - f64| of a kernel statistic for a feature:
    /// each weighted sum errs by at most delta (rounding of z and of the
    /// weights to f32 plus n accumulations, over sum |z w|).
    fn error_band(&self, kernel_obs: f64, abs_sum: f64) -> f64 {
        let n = self.units() as f64;
        let delta = 2.0 * (n + 2.0) * F32_UNIT * abs_sum + 1e-12;
        if self.spec.model.is_some() {
            // F is a ratio of squares: twice the relative error of t.
            let scale = if self.spec.model_f() { 4e-4 } else { 2e-4 };
            return scale * (1.0 + kernel_obs.abs());
        }
        match self.spec.test {
            TestKind::Welch => 2e-4 * (1.0 + kernel_obs.abs()),
            TestKind::Anova | TestKind::Kruskal => {
                // d(s^2/g) <= (2 |s| delta + delta^2) / g with |s| <= sqrt(g (n-1)),
                // and class 0's sum carries the others' errors.
                let k = self.spec.group_sizes.len() as f64;
                let spread: f64 = self
                    .spec
                    .group_sizes
                    .iter()
                    .map(|&g| {
                        let g = g as f64;
                        (2.0 * (g * (n - 1.0)).sqrt() * k * delta + k * k * delta * delta) / g
                    })
                    .sum();
                2.0 * spread + 1e-12
            }
            // |t| <= sqrt(n) for a standardized trait, so sum |z t| <= sqrt(n) sum |z|.
            TestKind::Pearson | TestKind::Spearman => delta * (1.0 + n.sqrt()),
            _ => delta,
        }
    }

    /// An upper bound of `error_band` over all features (sum |z| is at most
    /// sqrt(n (n - 1)) for a standardized row).
    fn global_band(&self) -> f64 {
        let n = self.units() as f64;
        self.error_band(0.0, (n * (n - 1.0)).sqrt())
    }

    /// An f32 value below this cannot belong to an f64 statistic above `max`.
    fn max_floor(&self, max: f64, chunk_band: f64) -> f32 {
        let relative = match self.spec.test {
            _ if self.spec.model_f() => 4e-4 * (1.0 + max.abs()),
            _ if self.spec.model.is_some() => 2e-4 * (1.0 + max.abs()),
            TestKind::Welch => 2e-4 * (1.0 + max.abs()),
            _ => 0.0,
        };
        (max - chunk_band - relative - 1e-6 * (1.0 + max.abs())) as f32
    }

    /// `out = a (rows x n) * weights[:, col0 .. col0 + cols]` in f32, where
    /// columns count weight columns (relabelings times width).
    fn multiply(&self, a: &[f32], rows: usize, col0: usize, cols: usize, out: &mut [f32]) {
        self.multiply_with(&self.weights, a, rows, col0, cols, out);
    }

    /// `multiply` against other weights of the same shape.
    fn multiply_with(
        &self,
        weights: &Weights,
        a: &[f32],
        rows: usize,
        col0: usize,
        cols: usize,
        out: &mut [f32],
    ) {
        let weights = match weights {
            Weights::Panels(isa, panels) => {
                return micro::multiply(*isa, panels, a, rows, col0, cols, out);
            }
            Weights::RowMajor(weights) => weights,
        };
        let n = self.units();
        let total = self.relabel.count * self.spec.width();
        assert!(weights.len() == n * total);
        // SAFETY: the slices cover rows x n, n x cols (at stride total) and
        // rows x cols elements with the strides given.
        unsafe {
            matrixmultiply::sgemm(
                rows,
                n,
                cols,
                1.0,
                a.as_ptr(),
                n as isize,
                1,
                weights.as_ptr().add(col0),
                total as isize,
                1,
                0.0,
                out.as_mut_ptr(),
                cols as isize,
                1,
            );
        }
    }

    /// Counts relabelings at least as extreme as the row's observed
    /// statistic in one row of a tile, and folds the row into the running
    /// per-relabelling maxima; with `reached`, also counts relabelings whose
    /// maximum (after this row) reaches the observed statistic.
    #[allow(clippy::too_many_arguments)]
    fn count_row(
        &self,
        tile: &[f32],
        row: &RowCheck,
        flags: &RowFlags,
        z: &[f64],
        col0: usize,
        floors: &mut [f32],
        maxima: &mut [f64],
        mut reached: Option<(&mut u64, SortedMaxima<'_>)>,
        histogram: &mut [u64],
    ) -> u64 {
        if !histogram.is_empty() {
            for &v in tile.iter().filter(|v| !v.is_nan()) {
                histogram[NullHistogram::bin(v)] += 1;
            }
        }
        // The fast pass (`flags`) counted the clear exceedances and flagged
        // the blocks where a value needs f64: near the observed one, or
        // above a running maximum.
        let mut count = u64::from(flags.clear);
        if flags.near == 0 && flags.over == 0 {
            if let Some((hits, mut sorted)) = reached {
                *hits += sorted.count_at_least(row.threshold);
            }
            return count;
        }
        let mut cache = None;
        let mut exact_at =
            |j: usize| self.exact_stat_cached(z, col0 + j, row.slack > 0.0, &mut cache);
        for range in flags.ranges(flags.near, tile.len()) {
            for j in range {
                let v = tile[j];
                if !(v > row.above || v < row.below) {
                    let e = exact_at(j);
                    count += u64::from(e >= row.threshold);
                    if v.is_nan() {
                        if !histogram.is_empty() {
                            histogram[NullHistogram::bin(e as f32)] += 1;
                        }
                        if e > maxima[j] {
                            if let Some((_, sorted)) = reached.as_mut() {
                                sorted.replace(maxima[j], e);
                            }
                            maxima[j] = e;
                            floors[j] = self.max_floor(e, self.global_band());
                        }
                    }
                }
            }
        }
        for range in flags.ranges(flags.over, tile.len()) {
            for j in range {
                if tile[j] + row.slack > floors[j] {
                    let e = exact_at(j);
                    if e > maxima[j] {
                        if let Some((_, sorted)) = reached.as_mut() {
                            sorted.replace(maxima[j], e);
                        }
                        maxima[j] = e;
                        floors[j] = self.max_floor(e, self.global_band());
                    }
                }
            }
        }
        if let Some((hits, mut sorted)) = reached {
            *hits += sorted.count_at_least(row.threshold);
        }
        count
    }
}

/// The observed statistic of a row and its f32 decision bounds.
#[derive(Clone, Copy)]
struct RowCheck {
    above: f32,
    below: f32,
    threshold: f64,
    /// Extra f32 error of a masked row against the maxima's floors (0 for
    /// complete rows; positive marks a masked row).
    slack: f32,
}

impl RowCheck {
    fn new(obs: f64, band: f64, slack: f32) -> Self {
        RowCheck {
            above: (obs + band) as f32,
            below: (obs - band) as f32,
            threshold: obs - tie_tolerance(obs),
            slack,
        }
    }
}

/// Running maxima of a rank-order pass over one range of relabelings.
pub struct RankState {
    pub col0: usize,
    pub cols: usize,
    /// Exact (f64) running maximum per relabelling.
    pub maxima: Vec<f64>,
    /// `maxima` sorted ascending within each tile's columns (`reached.rs`).
    sorted: Vec<f64>,
    /// Per column tile, the position of the last row's threshold in `sorted`.
    below: Vec<u32>,
    floors: Vec<f32>,
    /// Pooled null histogram over this range (empty unless asked for).
    pub histogram: Vec<u64>,
    /// With `record_maxima`: per relabelling, every (observed statistic,
    /// new maximum) at which its running maximum rose — the whole step
    /// function, so that shards can be combined exactly.
    pub records: Vec<Vec<(f64, f64)>>,
    before: Vec<f64>,
}

impl RankState {
    /// Keep the running-maximum step functions (see `records`).
    pub fn record_maxima(mut self) -> Self {
        self.records = vec![Vec::new(); self.cols];
        self
    }

    pub fn new(col0: usize, cols: usize, pooled_null: bool) -> Self {
        RankState {
            col0,
            cols,
            records: Vec::new(),
            before: Vec::new(),
            maxima: vec![f64::NEG_INFINITY; cols],
            sorted: vec![f64::NEG_INFINITY; cols],
            below: vec![0; cols.div_ceil(COL_TILE)],
            floors: vec![f32::NEG_INFINITY; cols],
            histogram: if pooled_null {
                vec![0; NullHistogram::BINS]
            } else {
                Vec::new()
            },
        }
    }
}

#[derive(Default)]
struct RowBuffers {
    /// f32 rows; for Welch, each block of `ROW_TILE` rows followed by
    /// their squares.
    z32: Vec<f32>,
    /// 1 where observed (only when some row has missing values).
    mask32: Vec<f32>,
    band: Vec<f64>,
    slack: Vec<f32>,
    /// Observed units per row.
    observed: Vec<usize>,
}

#[derive(Default)]
struct TileBuffers {
    /// One GEMM tile: sums (and, stacked below them, sums of squares).
    sums: Vec<f32>,
    masks: Vec<f32>,
    /// Masks against the squared weights (Pearson).
    mask_squares: Vec<f32>,
    /// Per row of the rows loaded: observed statistic and bounds.
    checks: Vec<RowCheck>,
    /// The same bounds for the microkernel, per row of a tile.
    bounds: Vec<micro::Bounds>,
    /// Fast-pass results per row of a tile.
    flags: Vec<RowFlags>,
}

struct RowsView<'a> {
    rows: usize,
    /// The standardized rows (f64), for rows computed one by one.
    z64: &'a [f64],
    z32: &'a [f32],
    mask32: &'a [f32],
    band: &'a [f64],
    slack: &'a [f32],
    observed: &'a [usize],
}

/// Relabelling `b` in the form the test's statistic needs.
fn assignment<'a>(spec: &TestSpec, relabel: &'a Relabelings, b: usize) -> Assignment<'a> {
    if relabel.sign_flips {
        Assignment::Flips(relabel.row(b))
    } else if spec.test.design() == DesignKind::Trait || spec.model.is_some() {
        Assignment::Sources(relabel.source_row(b))
    } else {
        Assignment::Classes(relabel.row(b))
    }
}

/// Statistics this close to the observed one count as reached: equal
/// statistics computed in a different order differ only in the last bits.
pub fn tie_tolerance(observed: f64) -> f64 {
    1e-10 * (1.0 + observed.abs())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::stats::{Side, Sizes};

    /// The three multiplies a machine may run (AVX-512 with the fused
    /// pass, AVX2+FMA with the separate passes, the general GEMM) give the
    /// same counts and the same f64 running maxima, bit for bit, on rows
    /// with missing values and partial tiles. (Counts against f64 brute
    /// force are in tests/kernel_tiles.rs and tests/missing.rs; this one
    /// makes sure the AVX2 path, which this CPU would otherwise never run
    /// inside the kernel, is exercised too.)
    #[test]
    fn every_multiply_gives_the_same_counts_and_maxima() {
        let Some(best) = micro::Isa::detect() else {
            return;
        };
        let (n_a, n_b) = (11, 10);
        let n = n_a + n_b;
        let features = 77;
        let labels: Vec<u8> = (0..n).map(|i| u8::from(i >= n_a)).collect();
        let raw: Vec<f64> = (0..features * n)
            .map(|k| {
                if k % 23 == 5 {
                    f64::NAN
                } else {
                    ((k * 7919 % 1009) as f64) / 1009.0 + if k / n % 3 == 0 { 0.5 } else { 0.0 }
                }
            })
            .collect();
        for test in [TestKind::Student, TestKind::Welch, TestKind::RankSum] {
            for side in [Side::Both, Side::Less] {
                let relabel = Relabelings::draw(&labels, 600, 4);
                let spec = TestSpec::two_group(test, side, Sizes { n_a, n_b });
                let mut kernels = vec![Kernel::new(spec.clone(), labels.clone(), relabel.clone())];
                let avx2 = std::arch::is_x86_feature_detected!("avx2")
                    && std::arch::is_x86_feature_detected!("fma");
                if best == micro::Isa::Avx512 && avx2 {
                    let mut k = Kernel::new(spec.clone(), labels.clone(), relabel.clone());
                    if let Weights::Panels(isa, _) = &mut k.weights {
                        *isa = micro::Isa::Avx2Fma;
                    }
                    kernels.push(k);
                }
                kernels.push(Kernel::new(spec, labels.clone(), relabel).with_general_multiply());
                let outcomes: Vec<(Vec<u64>, Vec<u64>)> = kernels
                    .iter()
                    .map(|k| {
                        let mut scratch = KernelScratch::default();
                        let out = k.run_chunk(&raw, features, true, &mut scratch);
                        let exceed = out.features.iter().map(|f| f.exceed).collect();
                        (exceed, out.null_max.iter().map(|m| m.to_bits()).collect())
                    })
                    .collect();
                assert!(outcomes[0].0.iter().any(|&e| e > 0));
                for other in &outcomes[1..] {
                    assert_eq!(other, &outcomes[0], "{test:?} {side:?}");
                }
            }
        }
    }
}
