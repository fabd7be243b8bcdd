//! The kernel's own f32 multiply: the weights packed once per run into
//! panels of 16 columns (`n x 16`, one cache line per sample), shared
//! read-only by every worker, and a register-blocked microkernel that
//! reads them directly.
//!
//! Why not a general GEMM: the left operand is thin (n ~ 50 samples), so a
//! general GEMM repacks the weight panel for every tile of rows, and that
//! packing costs a visible share of the multiply itself. Here the packing
//! happens once, in `Kernel::new`.
//!
//! Every output is `acc = fma(a_k, w_k, acc)` for k = 0, 1, ..., n-1 from
//! acc = 0, one rounding per step, whatever the instruction width: the
//! AVX-512 and AVX2+FMA versions give identical bits (tested), so results
//! do not depend on which of the two a machine runs. The error of such a
//! sum is within the usual bound for recursive summation in any fixed order
//! (|fl(sum) - sum| <= gamma_n sum |a_k w_k|, gamma_n = n u / (1 - n u),
//! Higham 2002, "Accuracy and Stability of Numerical Algorithms", 2nd ed.,
//! eq. 3.5; a fused step rounds once where a separate multiply and add
//! round twice, so the bound only tightens), which the kernel's error band
//! `2 (n + 2) u sum |z w|` covers.

use super::simd::WelchConstants;

/// Columns per panel.
pub(super) const PANEL: usize = 16;

/// One sample's 16 weights of a panel, on its own cache line.
#[derive(Clone, Copy, Default)]
#[repr(C, align(64))]
pub(super) struct Line(pub [f32; PANEL]);

/// Which microkernel the CPU runs.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(super) enum Isa {
    Avx512,
    Avx2Fma,
}

impl Isa {
    /// The widest microkernel this CPU has, if any (otherwise the kernel
    /// keeps the general GEMM).
    pub(super) fn detect() -> Option<Isa> {
        #[cfg(target_arch = "x86_64")]
        {
            // POPCNT for the fused pass's counts (every AVX-512 CPU has it).
            if std::arch::is_x86_feature_detected!("avx512f")
                && std::arch::is_x86_feature_detected!("popcnt")
            {
                return Some(Isa::Avx512);
            }
            if std::arch::is_x86_feature_detected!("avx2")
                && std::arch::is_x86_feature_detected!("fma")
            {
                return Some(Isa::Avx2Fma);
            }
        }
        None
    }
}

/// Weights of `n` samples x `total` columns in panels of `PANEL` columns:
/// column j of sample k is `lines[(j / PANEL) * n + k].0[j % PANEL]`; the
/// last panel is padded with zeros.
pub(super) struct Panels {
    pub n: usize,
    pub total: usize,
    pub lines: Vec<Line>,
}

impl Panels {
    pub(super) fn zeros(n: usize, total: usize) -> Self {
        Panels {
            n,
            total,
            lines: vec![Line::default(); total.div_ceil(PANEL) * n],
        }
    }

    #[inline]
    pub(super) fn set(&mut self, k: usize, j: usize, value: f32) {
        self.lines[(j / PANEL) * self.n + k].0[j % PANEL] = value;
    }

    #[inline]
    pub(super) fn get(&self, k: usize, j: usize) -> f32 {
        self.lines[(j / PANEL) * self.n + k].0[j % PANEL]
    }

    pub(super) fn from_row_major(row_major: &[f32], n: usize, total: usize) -> Self {
        let mut panels = Panels::zeros(n, total);
        for k in 0..n {
            for j in 0..total {
                panels.set(k, j, row_major[k * total + j]);
            }
        }
        panels
    }

    pub(super) fn to_row_major(&self) -> Vec<f32> {
        let mut out = vec![0f32; self.n * self.total];
        for k in 0..self.n {
            for j in 0..self.total {
                out[k * self.total + j] = self.get(k, j);
            }
        }
        out
    }

    pub(super) fn map(&self, f: impl Fn(f32) -> f32) -> Self {
        let lines = self.lines.iter().map(|line| Line(line.0.map(&f))).collect();
        Panels {
            n: self.n,
            total: self.total,
            lines,
        }
    }
}

/// The packed multiply on its own, for benchmarks that compare it with a
/// general GEMM on the same product.
pub struct PackedWeights {
    isa: Isa,
    panels: Panels,
}

impl PackedWeights {
    /// `None` where the CPU has no microkernel.
    pub fn new(row_major: &[f32], n: usize, total: usize) -> Option<Self> {
        Some(PackedWeights {
            isa: Isa::detect()?,
            panels: Panels::from_row_major(row_major, n, total),
        })
    }

    /// `out (rows x cols) = a (rows x n) * weights[:, col0..col0 + cols]`.
    pub fn multiply(&self, a: &[f32], rows: usize, col0: usize, cols: usize, out: &mut [f32]) {
        multiply(self.isa, &self.panels, a, rows, col0, cols, out);
    }
}

/// `out[i * cols + j] = sum_k a[i * n + k] * w(k, col0 + j)` for `i < rows`,
/// `j < cols`, in f32 with one fused multiply-add per k in order.
pub(super) fn multiply(
    isa: Isa,
    w: &Panels,
    a: &[f32],
    rows: usize,
    col0: usize,
    cols: usize,
    out: &mut [f32],
) {
    let n = w.n;
    assert!(a.len() >= rows * n, "left operand too short");
    assert!(out.len() >= rows * cols, "output too short");
    assert!(col0 + cols <= w.total, "columns out of range");
    if rows == 0 || cols == 0 {
        return;
    }
    #[cfg(target_arch = "x86_64")]
    {
        let job = Job {
            lines: w.lines.as_ptr(),
            n,
            a: a.as_ptr(),
            rows,
            col0,
            cols,
            out: out.as_mut_ptr(),
        };
        // SAFETY: `Isa::detect` found the instructions on this CPU (an
        // `Isa` is only made there and in tests that check the same), and
        // the asserts above keep every read and write in bounds.
        unsafe {
            match isa {
                Isa::Avx512 => avx512::run(&job),
                Isa::Avx2Fma => avx2::run(&job),
            }
        }
    }
    #[cfg(not(target_arch = "x86_64"))]
    {
        let _ = isa;
        unreachable!("no microkernel off x86-64")
    }
}

/// A row's f32 decision bounds, as `count_row` uses them.
#[derive(Clone, Copy, Debug)]
pub(super) struct Bounds {
    pub above: f32,
    pub below: f32,
    pub slack: f32,
}

/// What the fast pass over one tile row finds, per block of columns: bit b
/// of `near`/`over` covers tile columns `b * block - offset .. (b + 1) *
/// block - offset` (clipped to the row).
#[derive(Clone, Copy, Debug, Default)]
pub(super) struct RowFlags {
    /// Values clearly above the observed statistic (beyond its error band).
    pub clear: u32,
    /// Blocks with a value within the band (or NaN): those need f64.
    pub near: u64,
    /// Blocks with a value that may exceed its relabelling's running
    /// maximum (against the floors as they were before the tile).
    pub over: u64,
    pub block: usize,
    pub offset: usize,
}

impl RowFlags {
    /// Tile columns of the blocks flagged in `bits`, for a row of `len`.
    pub(super) fn ranges(
        &self,
        bits: u64,
        len: usize,
    ) -> impl Iterator<Item = std::ops::Range<usize>> + '_ {
        (0..64usize)
            .filter(move |b| bits >> b & 1 == 1)
            .map(move |b| {
                let lo = (b * self.block).saturating_sub(self.offset).min(len);
                let hi = ((b + 1) * self.block).saturating_sub(self.offset).min(len);
                lo..hi
            })
    }
}

/// The AVX-512 multiply with the orienting and the fast counting pass done
/// on the registers: `out` gets the oriented values (as `multiply` then
/// `orient_all` would give), `flags[i]` the pass of row i against
/// `bounds[i]` and `floors` (indexed from `col0`). Floors only rise, so
/// flags found against earlier floors can only be too many, never too few.
/// With `welch`, rows come in pairs (a feature's values, then their
/// squares): feature i's Welch t (as `welch_row` computes it, same
/// operations in the same order) goes to output row 2 i, its flags to
/// `flags[i]`.
#[allow(clippy::too_many_arguments)]
pub(super) fn multiply_counted(
    w: &Panels,
    a: &[f32],
    rows: usize,
    col0: usize,
    cols: usize,
    out: &mut [f32],
    side: crate::stats::Side,
    welch: Option<WelchConstants>,
    bounds: &[Bounds],
    floors: &[f32],
    flags: &mut [RowFlags],
) {
    let n = w.n;
    let features = if welch.is_some() { rows / 2 } else { rows };
    assert!(
        welch.is_none() || rows.is_multiple_of(2),
        "Welch rows come in pairs"
    );
    assert!(a.len() >= rows * n, "left operand too short");
    assert!(out.len() >= rows * cols, "output too short");
    assert!(col0 + cols <= w.total, "columns out of range");
    assert!(bounds.len() >= features && flags.len() >= features && floors.len() >= cols);
    assert!(cols + PANEL <= 64 * PANEL, "too many columns for the flags");
    for f in flags[..features].iter_mut() {
        *f = RowFlags {
            block: PANEL,
            offset: col0 % PANEL,
            ..RowFlags::default()
        };
    }
    if rows == 0 || cols == 0 {
        return;
    }
    assert!(
        Isa::detect() == Some(Isa::Avx512),
        "multiply_counted needs AVX-512"
    );
    #[cfg(target_arch = "x86_64")]
    {
        let job = Job {
            lines: w.lines.as_ptr(),
            n,
            a: a.as_ptr(),
            rows,
            col0,
            cols,
            out: out.as_mut_ptr(),
        };
        let count = avx512::Count {
            side,
            welch,
            bounds,
            floors,
            flags,
        };
        // SAFETY: AVX-512F was just checked for, and the asserts above keep
        // every read and write in bounds.
        unsafe { avx512::run_counted(&job, count) };
    }
}

/// One multiply, as raw parts for the microkernels.
struct Job {
    lines: *const Line,
    n: usize,
    a: *const f32,
    rows: usize,
    col0: usize,
    cols: usize,
    out: *mut f32,
}

impl Job {
    /// Writes the 16 values of panel `p` for output row `i`, keeping only
    /// the columns inside `col0..col0 + cols`.
    ///
    /// # Safety
    /// `i < rows` and panel `p` overlaps the column range.
    #[inline(always)]
    unsafe fn store(&self, i: usize, p: usize, values: &[f32; PANEL]) {
        let start = p * PANEL;
        let end = self.col0 + self.cols;
        let row = self.out.add(i * self.cols);
        if start >= self.col0 && start + PANEL <= end {
            std::ptr::copy_nonoverlapping(values.as_ptr(), row.add(start - self.col0), PANEL);
        } else {
            let lo = self.col0.max(start);
            let hi = end.min(start + PANEL);
            for j in lo..hi {
                *row.add(j - self.col0) = values[j - start];
            }
        }
    }

    fn panels(&self) -> std::ops::Range<usize> {
        self.col0 / PANEL..(self.col0 + self.cols).div_ceil(PANEL)
    }

    /// Lanes of panel `p` inside the column range, as a bit mask.
    #[inline(always)]
    fn lanes(&self, p: usize) -> u16 {
        let start = p * PANEL;
        let lo = self.col0.saturating_sub(start).min(PANEL);
        let hi = (self.col0 + self.cols - start).min(PANEL);
        (((1u32 << hi) - 1) & !((1u32 << lo) - 1)) as u16
    }
}

#[cfg(target_arch = "x86_64")]
mod avx512 {
    use super::{Job, WelchConstants, PANEL};
    use std::arch::x86_64::*;

    /// Rows per register block.
    const MR: usize = 6;
    /// Panels (16-lane vectors) per register block: 6 x 4 accumulators,
    /// 4 weight vectors and a broadcast fit the 32 registers.
    const NV: usize = 4;

    #[target_feature(enable = "avx512f")]
    pub(super) unsafe fn run(job: &Job) {
        let panels = job.panels();
        let mut p = panels.start;
        // Columns outside, rows inside: the weights of one column block
        // (n x 64 floats) stay in L1 while every row block passes over them.
        while p < panels.end {
            let nv = NV.min(panels.end - p);
            let mut i = 0;
            while i < job.rows {
                let mr = MR.min(job.rows - i);
                match (mr, nv) {
                    (6, 4) => block::<6, 4>(job, i, p),
                    (6, 3) => block::<6, 3>(job, i, p),
                    (6, 2) => block::<6, 2>(job, i, p),
                    (6, _) => block::<6, 1>(job, i, p),
                    (5, 4) => block::<5, 4>(job, i, p),
                    (5, 3) => block::<5, 3>(job, i, p),
                    (5, 2) => block::<5, 2>(job, i, p),
                    (5, _) => block::<5, 1>(job, i, p),
                    (4, 4) => block::<4, 4>(job, i, p),
                    (4, 3) => block::<4, 3>(job, i, p),
                    (4, 2) => block::<4, 2>(job, i, p),
                    (4, _) => block::<4, 1>(job, i, p),
                    (3, 4) => block::<3, 4>(job, i, p),
                    (3, 3) => block::<3, 3>(job, i, p),
                    (3, 2) => block::<3, 2>(job, i, p),
                    (3, _) => block::<3, 1>(job, i, p),
                    (2, 4) => block::<2, 4>(job, i, p),
                    (2, 3) => block::<2, 3>(job, i, p),
                    (2, 2) => block::<2, 2>(job, i, p),
                    (2, _) => block::<2, 1>(job, i, p),
                    (_, 4) => block::<1, 4>(job, i, p),
                    (_, 3) => block::<1, 3>(job, i, p),
                    (_, 2) => block::<1, 2>(job, i, p),
                    (_, _) => block::<1, 1>(job, i, p),
                }
                i += mr;
            }
            p += nv;
        }
    }

    /// Rows `i..i + R` against panels `p..p + V`.
    #[target_feature(enable = "avx512f")]
    #[inline]
    unsafe fn accumulate<const R: usize, const V: usize>(
        job: &Job,
        i: usize,
        p: usize,
    ) -> [[__m512; V]; R] {
        let n = job.n;
        let mut acc = [[_mm512_setzero_ps(); V]; R];
        let a = job.a.add(i * n);
        for k in 0..n {
            let mut w = [_mm512_setzero_ps(); V];
            for (v, w) in w.iter_mut().enumerate() {
                *w = _mm512_load_ps(job.lines.add((p + v) * n + k) as *const f32);
            }
            for (r, acc) in acc.iter_mut().enumerate() {
                let x = _mm512_set1_ps(*a.add(r * n + k));
                for (acc, &w) in acc.iter_mut().zip(&w) {
                    *acc = _mm512_fmadd_ps(x, w, *acc);
                }
            }
        }
        acc
    }

    #[target_feature(enable = "avx512f")]
    #[inline]
    unsafe fn block<const R: usize, const V: usize>(job: &Job, i: usize, p: usize) {
        let acc = accumulate::<R, V>(job, i, p);
        for (v, lanes) in (0..V).map(|v| (v, job.lanes(p + v))) {
            let shift = ((p + v) * PANEL) as isize - job.col0 as isize;
            for (r, acc) in acc.iter().enumerate() {
                let row = job.out.add((i + r) * job.cols);
                // Only the lanes inside the column range are written; the
                // (slower) masked store only where some lanes are outside.
                if lanes == u16::MAX {
                    _mm512_storeu_ps(row.offset(shift), acc[v]);
                } else {
                    _mm512_mask_storeu_ps(row.wrapping_offset(shift), lanes, acc[v]);
                }
            }
        }
    }

    /// `welch_row` on 16 lanes: the same IEEE operations in the same order
    /// (division and square root are correctly rounded in both), so the
    /// same bits.
    #[target_feature(enable = "avx512f")]
    #[inline]
    unsafe fn welch(s1: __m512, q1: __m512, c: WelchConstants) -> __m512 {
        let s1sq = _mm512_mul_ps(s1, s1);
        let q0 = _mm512_sub_ps(_mm512_set1_ps(c.total_sq), q1);
        let ss_b = _mm512_sub_ps(q1, _mm512_mul_ps(s1sq, _mm512_set1_ps(c.inv_nb)));
        let ss_a = _mm512_sub_ps(q0, _mm512_mul_ps(s1sq, _mm512_set1_ps(c.inv_na)));
        let hundredth = _mm512_set1_ps(1e-2);
        let conditioned = _mm512_cmp_ps_mask::<_CMP_GT_OQ>(ss_b, _mm512_mul_ps(hundredth, q1))
            & _mm512_cmp_ps_mask::<_CMP_GT_OQ>(ss_a, _mm512_mul_ps(hundredth, q0));
        let spread = _mm512_add_ps(
            _mm512_mul_ps(ss_a, _mm512_set1_ps(c.var_a)),
            _mm512_mul_ps(ss_b, _mm512_set1_ps(c.var_b)),
        );
        let t = _mm512_div_ps(
            _mm512_mul_ps(s1, _mm512_set1_ps(c.diff)),
            _mm512_sqrt_ps(spread),
        );
        _mm512_mask_blend_ps(conditioned, _mm512_set1_ps(f32::NAN), t)
    }

    /// The counting half of `multiply_counted`.
    pub(super) struct Count<'a> {
        pub side: crate::stats::Side,
        pub welch: Option<WelchConstants>,
        pub bounds: &'a [super::Bounds],
        pub floors: &'a [f32],
        pub flags: &'a mut [super::RowFlags],
    }

    #[target_feature(enable = "avx512f,popcnt")]
    pub(super) unsafe fn run_counted(job: &Job, mut count: Count<'_>) {
        let panels = job.panels();
        let mut p = panels.start;
        while p < panels.end {
            let nv = NV.min(panels.end - p);
            let mut i = 0;
            while i < job.rows {
                let mr = MR.min(job.rows - i);
                let c = &mut count;
                match (mr, nv) {
                    (6, 4) => counted::<6, 4>(job, i, p, c),
                    (6, 3) => counted::<6, 3>(job, i, p, c),
                    (6, 2) => counted::<6, 2>(job, i, p, c),
                    (6, _) => counted::<6, 1>(job, i, p, c),
                    (5, 4) => counted::<5, 4>(job, i, p, c),
                    (5, 3) => counted::<5, 3>(job, i, p, c),
                    (5, 2) => counted::<5, 2>(job, i, p, c),
                    (5, _) => counted::<5, 1>(job, i, p, c),
                    (4, 4) => counted::<4, 4>(job, i, p, c),
                    (4, 3) => counted::<4, 3>(job, i, p, c),
                    (4, 2) => counted::<4, 2>(job, i, p, c),
                    (4, _) => counted::<4, 1>(job, i, p, c),
                    (3, 4) => counted::<3, 4>(job, i, p, c),
                    (3, 3) => counted::<3, 3>(job, i, p, c),
                    (3, 2) => counted::<3, 2>(job, i, p, c),
                    (3, _) => counted::<3, 1>(job, i, p, c),
                    (2, 4) => counted::<2, 4>(job, i, p, c),
                    (2, 3) => counted::<2, 3>(job, i, p, c),
                    (2, 2) => counted::<2, 2>(job, i, p, c),
                    (2, _) => counted::<2, 1>(job, i, p, c),
                    (_, 4) => counted::<1, 4>(job, i, p, c),
                    (_, 3) => counted::<1, 3>(job, i, p, c),
                    (_, 2) => counted::<1, 2>(job, i, p, c),
                    (_, _) => counted::<1, 1>(job, i, p, c),
                }
                i += mr;
            }
            p += nv;
        }
    }

    /// `block`, then per value: orient, count clear exceedances, flag values
    /// near the observed statistic or over the floor, as `scan_row` does
    /// (the same IEEE comparisons and add, so the same decisions).
    #[target_feature(enable = "avx512f,popcnt")]
    #[inline]
    unsafe fn counted<const R: usize, const V: usize>(
        job: &Job,
        i: usize,
        p: usize,
        count: &mut Count<'_>,
    ) {
        let acc = accumulate::<R, V>(job, i, p);
        // The row step a constant, so that the pass below unrolls (with it
        // a run-time value, the pass was a loop over spilled accumulators
        // and a third of this function's time).
        match count.welch {
            Some(c) => pass::<R, V, 2>(job, i, p, count, &acc, c),
            None => pass::<R, V, 1>(job, i, p, count, &acc, WelchConstants::default()),
        }
    }

    // Welch reads two rows of `acc` per statistic, so the rows are indexed.
    #[allow(clippy::needless_range_loop)]
    #[target_feature(enable = "avx512f,popcnt")]
    #[inline]
    unsafe fn pass<const R: usize, const V: usize, const STEP: usize>(
        job: &Job,
        i: usize,
        p: usize,
        count: &mut Count<'_>,
        acc: &[[__m512; V]; R],
        welch_constants: WelchConstants,
    ) {
        use crate::stats::Side;
        let first = job.col0 / PANEL;
        // |x| and -x as integer masks, branch-free and with the same bits
        // as `orient_all` (the float forms would need AVX-512DQ).
        let (keep, flip) = match count.side {
            Side::Both => (i32::MAX, 0),
            Side::Greater => (-1, 0),
            Side::Less => (-1, i32::MIN),
        };
        let (keep, flip) = (_mm512_set1_epi32(keep), _mm512_set1_epi32(flip));
        // Plain rows: one statistic per row. Welch: rows in pairs, the
        // statistic of pair j written over its first row.
        let feature0 = i / STEP;
        // Flags of the block's rows gathered here and added to the rows'
        // flags once (updating them in memory per panel chained every
        // update on the previous store).
        let mut clear = [0u32; R];
        let mut near = [0u64; R];
        let mut over = [0u64; R];
        for v in 0..V {
            let lanes = job.lanes(p + v);
            // Lane l of panel p + v is output column start + l - col0; the
            // masked loads and stores touch only the lanes inside the range.
            let shift = ((p + v) * PANEL) as isize - job.col0 as isize;
            let full = lanes == u16::MAX;
            // Masked loads and stores cost ~10% of a Student run here:
            // only the partial panels at the ends of the range use them.
            let floor = if full {
                _mm512_loadu_ps(count.floors.as_ptr().offset(shift))
            } else {
                _mm512_mask_loadu_ps(
                    _mm512_set1_ps(f32::INFINITY),
                    lanes,
                    count.floors.as_ptr().wrapping_offset(shift),
                )
            };
            let at = p + v - first;
            for r in (0..R).step_by(STEP) {
                let value = if STEP == 2 {
                    welch(acc[r][v], acc[r + 1][v], welch_constants)
                } else {
                    acc[r][v]
                };
                let bits = _mm512_and_si512(_mm512_castps_si512(value), keep);
                let x = _mm512_castsi512_ps(_mm512_xor_si512(bits, flip));
                let b = *count.bounds.get_unchecked(feature0 + r / STEP);
                let above =
                    _mm512_mask_cmp_ps_mask::<_CMP_GT_OQ>(lanes, x, _mm512_set1_ps(b.above));
                let below = _mm512_cmp_ps_mask::<_CMP_LT_OQ>(x, _mm512_set1_ps(b.below));
                let over_floor = _mm512_mask_cmp_ps_mask::<_CMP_GT_OQ>(
                    lanes,
                    _mm512_add_ps(x, _mm512_set1_ps(b.slack)),
                    floor,
                );
                clear[r] += above.count_ones();
                near[r] |= u64::from(!(above | below) & lanes != 0) << at;
                over[r] |= u64::from(over_floor != 0) << at;
                let row = job.out.add((i + r) * job.cols);
                if full {
                    _mm512_storeu_ps(row.offset(shift), x);
                } else {
                    _mm512_mask_storeu_ps(row.wrapping_offset(shift), lanes, x);
                }
            }
        }
        for r in (0..R).step_by(STEP) {
            let flags = count.flags.get_unchecked_mut(feature0 + r / STEP);
            flags.clear += clear[r];
            flags.near |= near[r];
            flags.over |= over[r];
        }
    }
}

#[cfg(target_arch = "x86_64")]
mod avx2 {
    use super::{Job, PANEL};
    use std::arch::x86_64::*;

    /// Rows per register block: 6 x 2 accumulators (one panel), 2 weight
    /// vectors and a broadcast fit the 16 registers.
    const MR: usize = 6;

    #[target_feature(enable = "avx2,fma")]
    pub(super) unsafe fn run(job: &Job) {
        for p in job.panels() {
            let mut i = 0;
            while i < job.rows {
                let mr = MR.min(job.rows - i);
                match mr {
                    6 => block::<6>(job, i, p),
                    5 => block::<5>(job, i, p),
                    4 => block::<4>(job, i, p),
                    3 => block::<3>(job, i, p),
                    2 => block::<2>(job, i, p),
                    _ => block::<1>(job, i, p),
                }
                i += mr;
            }
        }
    }

    /// Rows `i..i + R` against panel `p`.
    #[target_feature(enable = "avx2,fma")]
    #[inline]
    unsafe fn block<const R: usize>(job: &Job, i: usize, p: usize) {
        let n = job.n;
        let mut acc = [[_mm256_setzero_ps(); 2]; R];
        let a = job.a.add(i * n);
        for k in 0..n {
            let line = job.lines.add(p * n + k) as *const f32;
            let w = [_mm256_load_ps(line), _mm256_load_ps(line.add(8))];
            for (r, acc) in acc.iter_mut().enumerate() {
                let x = _mm256_set1_ps(*a.add(r * n + k));
                acc[0] = _mm256_fmadd_ps(x, w[0], acc[0]);
                acc[1] = _mm256_fmadd_ps(x, w[1], acc[1]);
            }
        }
        let mut values = [0f32; PANEL];
        for (r, acc) in acc.iter().enumerate() {
            _mm256_storeu_ps(values.as_mut_ptr(), acc[0]);
            _mm256_storeu_ps(values.as_mut_ptr().add(8), acc[1]);
            job.store(i + r, p, &values);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Plain f64 product, written independently of the microkernels.
    fn f64_product(a: &[f32], w: &[f32], rows: usize, n: usize, total: usize) -> Vec<f64> {
        let mut out = vec![0f64; rows * total];
        for i in 0..rows {
            for j in 0..total {
                out[i * total + j] = (0..n)
                    .map(|k| a[i * n + k] as f64 * w[k * total + j] as f64)
                    .sum();
            }
        }
        out
    }

    /// Odd sizes: n not a multiple of 8 or 16, partial row blocks and
    /// panels, a column window starting inside a panel; rows like the
    /// kernel's (standardized values with 0 where missing, their squares
    /// stacked below for Welch, 0/1 masks) against 0/1 and real weights.
    #[test]
    fn microkernels_match_an_f64_product_within_the_band() {
        let Some(best) = Isa::detect() else {
            return;
        };
        let mut isas = vec![best];
        if best == Isa::Avx512
            && std::arch::is_x86_feature_detected!("avx2")
            && std::arch::is_x86_feature_detected!("fma")
        {
            isas.push(Isa::Avx2Fma);
        }
        let u = 5.960_464_477_539_063e-8f64;
        for &(n, total, rows) in &[
            (1, 5, 1),
            (7, 37, 13),
            (13, 100, 7),
            (48, 530, 67),
            (33, 17, 128),
        ] {
            // Rows: values, zeroed where "missing" (every 5th), then the
            // squares of those rows (Welch's stacking), then the masks.
            let half = rows / 3 + 1;
            let mut a = vec![0f32; rows * n];
            for i in 0..rows {
                for k in 0..n {
                    let v = (((i * 31 + k * 17) % 97) as f32 - 48.0) / 23.0;
                    let missing = (i + 2 * k) % 5 == 0;
                    a[i * n + k] = if i < half {
                        if missing {
                            0.0
                        } else {
                            v
                        }
                    } else if i < 2 * half {
                        if missing {
                            0.0
                        } else {
                            v * v
                        }
                    } else if missing {
                        0.0
                    } else {
                        1.0
                    };
                }
            }
            for real in [false, true] {
                let w: Vec<f32> = (0..n * total)
                    .map(|x| {
                        if real {
                            ((x * 7919 % 211) as f32 - 105.0) / 61.0
                        } else {
                            ((x * 104_729 / 3) % 2) as f32
                        }
                    })
                    .collect();
                let panels = Panels::from_row_major(&w, n, total);
                assert_eq!(panels.to_row_major(), w);
                let exact = f64_product(&a, &w, rows, n, total);
                for (col0, cols) in [
                    (0, total),
                    (total / 3, total - total / 3),
                    (3, 1.min(total - 3)),
                ] {
                    if col0 + cols > total {
                        continue;
                    }
                    let mut outs = Vec::new();
                    for &isa in &isas {
                        let mut out = vec![f32::NAN; rows * cols + 3];
                        multiply(isa, &panels, &a, rows, col0, cols, &mut out);
                        assert!(out[rows * cols..].iter().all(|v| v.is_nan()), "wrote past");
                        for i in 0..rows {
                            for j in 0..cols {
                                let got = out[i * cols + j] as f64;
                                let want = exact[i * total + col0 + j];
                                let abs: f64 = (0..n)
                                    .map(|k| {
                                        (a[i * n + k] as f64 * w[k * total + col0 + j] as f64).abs()
                                    })
                                    .sum();
                                let bound = n as f64 * u * abs / (1.0 - n as f64 * u);
                                assert!(
                                    (got - want).abs() <= bound,
                                    "{isa:?} n {n} row {i} col {}: {got} vs {want} (bound {bound})",
                                    col0 + j
                                );
                                // 0/1 masks against 0/1 weights: exact counts.
                                if !real && i >= 2 * half {
                                    assert_eq!(got, want);
                                }
                            }
                        }
                        outs.push(out);
                    }
                    // Identical bits from every instruction width.
                    for other in &outs[1..] {
                        let bits = |o: &Vec<f32>| o.iter().map(|v| v.to_bits()).collect::<Vec<_>>();
                        assert_eq!(bits(other), bits(&outs[0]), "n {n} cols {col0}+{cols}");
                    }
                }
            }
        }
    }
}
