//! Kernel stage: one chunk of standardized features against all shared
//! relabelings, as cache-sized single-precision GEMM tiles with the
//! exceedance counting done on each tile while it is hot.
//!
//! f32 is accurate enough for almost every comparison; the few that land
//! within the f32 error bound of the observed statistic (or of a running
//! per-relabelling maximum) are recomputed in f64 from the standardized row,
//! so the counts equal an all-f64 computation.

use crate::design::Relabelings;
use crate::stats::prepare::{PrepScratch, Prepared, Status, TestSpec};
use crate::stats::TestKind;

/// Features per GEMM tile (rows of the left operand).
const ROW_TILE: usize = 64;
/// Relabelings per GEMM tile (columns of the right operand).
const COL_TILE: usize = 512;
/// Unit roundoff of f32.
const F32_UNIT: f64 = 5.960_464_477_539_063e-8;

/// Everything a worker needs, shared read-only by all workers.
pub struct Kernel {
    spec: TestSpec,
    observed: Vec<u8>,
    relabel: Relabelings,
    /// `n x B` row-major: 1.0 where relabelling b puts sample i in group B.
    weights: Vec<f32>,
}

/// Per-feature outcome of a chunk.
#[derive(Debug, Clone, Copy)]
pub struct FeatureOutcome {
    pub prepared: Prepared,
    /// Relabelings at least as extreme as the observed labelling.
    pub exceed: u64,
}

/// What a chunk contributes beyond its features: the largest kernel
/// statistic over its tested features, per relabelling (f64-exact).
pub struct ChunkOutcome {
    pub features: Vec<FeatureOutcome>,
    pub null_max: Vec<f64>,
}

/// Per-worker reusable buffers.
#[derive(Default)]
pub struct KernelScratch {
    prep: PrepScratch,
    z64: Vec<f64>,
    z32: Vec<f32>,
    sq32: Vec<f32>,
    sums: Vec<f32>,
    squares: Vec<f32>,
    tested: Vec<usize>,
    band: Vec<f64>,
}

impl Kernel {
    pub fn new(spec: TestSpec, observed: Vec<u8>, relabel: Relabelings) -> Self {
        let n = observed.len();
        let b = relabel.count;
        let mut weights = vec![0f32; n * b];
        for j in 0..b {
            for (i, &l) in relabel.row(j).iter().enumerate() {
                weights[i * b + j] = f32::from(l);
            }
        }
        Kernel {
            spec,
            observed,
            relabel,
            weights,
        }
    }

    pub fn relabelings(&self) -> &Relabelings {
        &self.relabel
    }

    pub fn spec(&self) -> &TestSpec {
        &self.spec
    }

    /// Runs one chunk: `raw` is `rows x n` row-major.
    pub fn run_chunk(&self, raw: &[f64], rows: usize, s: &mut KernelScratch) -> ChunkOutcome {
        let n = self.observed.len();
        let b_total = self.relabel.count;
        s.z64.resize(rows * n, 0.0);
        s.tested.clear();
        let mut features = Vec::with_capacity(rows);
        for r in 0..rows {
            let prepared = self.spec.prepare(
                &raw[r * n..(r + 1) * n],
                &self.observed,
                &mut s.z64[r * n..(r + 1) * n],
                &mut s.prep,
            );
            if prepared.status == Status::Tested {
                s.tested.push(r);
            }
            features.push(FeatureOutcome {
                prepared,
                exceed: 0,
            });
        }
        let mut null_max = vec![f64::NEG_INFINITY; b_total];
        let t = s.tested.len();
        if t == 0 || b_total == 0 {
            return ChunkOutcome { features, null_max };
        }
        let squares = self.spec.test.needs_squares();
        s.z32.resize(t * n, 0.0);
        s.sq32.resize(if squares { t * n } else { 0 }, 0.0);
        s.band.clear();
        for (k, &r) in s.tested.iter().enumerate() {
            let z = &s.z64[r * n..(r + 1) * n];
            for (dst, &v) in s.z32[k * n..(k + 1) * n].iter_mut().zip(z) {
                *dst = v as f32;
            }
            if squares {
                for (dst, &v) in s.sq32[k * n..(k + 1) * n].iter_mut().zip(z) {
                    *dst = (v * v) as f32;
                }
            }
            s.band.push(self.error_band(&features[r].prepared));
        }
        let chunk_band = s.band.iter().cloned().fold(0.0, f64::max);
        s.sums.resize(ROW_TILE * COL_TILE, 0.0);
        s.squares
            .resize(if squares { ROW_TILE * COL_TILE } else { 0 }, 0.0);
        let mut max_floor = vec![f32::NEG_INFINITY; b_total];

        for row0 in (0..t).step_by(ROW_TILE) {
            let rt = ROW_TILE.min(t - row0);
            for col0 in (0..b_total).step_by(COL_TILE) {
                let ct = COL_TILE.min(b_total - col0);
                self.multiply(&s.z32[row0 * n..], rt, col0, ct, &mut s.sums);
                if squares {
                    self.multiply(&s.sq32[row0 * n..], rt, col0, ct, &mut s.squares);
                }
                for i in 0..rt {
                    let k = row0 + i;
                    let r = s.tested[k];
                    let tile = &mut s.sums[i * ct..(i + 1) * ct];
                    if squares {
                        self.welch_tile(tile, &s.squares[i * ct..(i + 1) * ct]);
                    } else {
                        let side = self.spec.side;
                        tile.iter_mut().for_each(|v| *v = side.orient32(*v));
                    }
                    let obs = features[r].prepared.kernel_obs;
                    let band = s.band[k];
                    let z = &s.z64[r * n..(r + 1) * n];
                    let floors = &mut max_floor[col0..col0 + ct];
                    let maxima = &mut null_max[col0..col0 + ct];
                    features[r].exceed +=
                        self.count_row(tile, obs, band, chunk_band, z, col0, floors, maxima);
                }
            }
        }
        ChunkOutcome { features, null_max }
    }

    /// Largest possible |f32 - f64| of a kernel statistic for this feature.
    fn error_band(&self, p: &Prepared) -> f64 {
        let n = self.observed.len() as f64;
        match self.spec.test {
            // Group sums: rounding of each z to f32 plus n accumulations.
            TestKind::Welch => 1e-3 * (1.0 + p.kernel_obs.abs()),
            _ => 2.0 * (n + 2.0) * F32_UNIT * p.abs_sum + 1e-12,
        }
    }

    /// An f32 value below this cannot belong to an f64 statistic above `max`.
    fn max_floor(&self, max: f64, chunk_band: f64) -> f32 {
        let relative = match self.spec.test {
            TestKind::Welch => 1e-3 * (1.0 + max.abs()),
            _ => 0.0,
        };
        (max - chunk_band - relative - 1e-6 * (1.0 + max.abs())) as f32
    }

    fn multiply(&self, a: &[f32], rows: usize, col0: usize, cols: usize, out: &mut [f32]) {
        let n = self.observed.len();
        let b_total = self.relabel.count;
        // SAFETY: the slices cover rows x n, n x cols (at stride b_total) and
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
                self.weights.as_ptr().add(col0),
                b_total as isize,
                1,
                0.0,
                out.as_mut_ptr(),
                cols as isize,
                1,
            );
        }
    }

    /// Turns group sums and sums of squares into oriented Welch t in place;
    /// ill-conditioned entries (variance lost to cancellation) become NaN so
    /// that they are recomputed in f64.
    fn welch_tile(&self, sums: &mut [f32], squares: &[f32]) {
        let sizes = self.spec.sizes;
        let (na, nb) = (sizes.n_a as f32, sizes.n_b as f32);
        let total_sq = na + nb - 1.0;
        let side = self.spec.side;
        for (v, &q1) in sums.iter_mut().zip(squares) {
            let s1 = *v;
            let q0 = total_sq - q1;
            let ss_b = q1 - s1 * s1 / nb;
            let ss_a = q0 - s1 * s1 / na;
            let t = if ss_b > 1e-2 * q1 && ss_a > 1e-2 * q0 {
                let se2 = ss_a / ((na - 1.0) * na) + ss_b / ((nb - 1.0) * nb);
                (s1 / nb + s1 / na) / se2.sqrt()
            } else {
                f32::NAN
            };
            *v = side.orient32(t);
        }
    }

    /// Counts relabelings at least as extreme as `obs` in one row of a tile
    /// and folds the row into the per-relabelling maxima.
    #[allow(clippy::too_many_arguments)]
    fn count_row(
        &self,
        tile: &[f32],
        obs: f64,
        band: f64,
        chunk_band: f64,
        z: &[f64],
        col0: usize,
        floors: &mut [f32],
        maxima: &mut [f64],
    ) -> u64 {
        let above = (obs + band) as f32;
        let below = (obs - band) as f32;
        // Fast pass: clear exceedances, and whether anything needs f64.
        let mut clear = 0u32;
        let mut unsure = false;
        for (&v, &floor) in tile.iter().zip(floors.iter()) {
            clear += u32::from(v > above);
            unsure |= !(v > above || v < below) | (v > floor);
        }
        if !unsure {
            return u64::from(clear);
        }
        let mut count = 0u64;
        let tie_tol = tie_tolerance(obs);
        for (j, &v) in tile.iter().enumerate() {
            let exact = if v > above {
                count += 1;
                None
            } else if v < below {
                None
            } else {
                let e = self.spec.kernel_stat(z, self.relabel.row(col0 + j));
                if e >= obs - tie_tol {
                    count += 1;
                }
                Some(e)
            };
            if v > floors[j] || v.is_nan() {
                let e =
                    exact.unwrap_or_else(|| self.spec.kernel_stat(z, self.relabel.row(col0 + j)));
                if e > maxima[j] {
                    maxima[j] = e;
                    floors[j] = self.max_floor(e, chunk_band);
                }
            }
        }
        count
    }
}

/// Statistics this close to the observed one count as reached: equal
/// statistics computed in a different order differ only in the last bits.
pub fn tie_tolerance(observed: f64) -> f64 {
    1e-10 * (1.0 + observed.abs())
}
