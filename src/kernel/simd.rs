//! The streaming passes over each tile row, compiled twice: for the
//! baseline x86-64 target (SSE2, four f32 lanes) and with AVX2, chosen at
//! run time. With n around 50 the GEMM does only ~50 multiply-adds per
//! statistic, so a pass over the tile row at four lanes costs a sizeable
//! fraction of the multiply itself; eight lanes halve that.
//!
//! Only the instruction width changes: every operation is an IEEE
//! comparison, add, multiply, divide or square root on the same operands in
//! the same order (Rust never contracts to fused multiply-add on its own),
//! so both versions give identical bits.

use super::micro::RowFlags;
use crate::stats::Side;

/// Defines `$name` that runs `$body` compiled with AVX2 where the CPU has
/// it, and as compiled for the baseline target otherwise.
macro_rules! multiversion {
    ($(#[$meta:meta])* $vis:vis fn $name:ident($($arg:ident: $ty:ty),* $(,)?) $(-> $ret:ty)? $body:block) => {
        $(#[$meta])*
        $vis fn $name($($arg: $ty),*) $(-> $ret)? {
            #[inline(always)]
            fn body($($arg: $ty),*) $(-> $ret)? $body
            #[cfg(target_arch = "x86_64")]
            {
                #[target_feature(enable = "avx2")]
                unsafe fn wide($($arg: $ty),*) $(-> $ret)? {
                    body($($arg),*)
                }
                if std::arch::is_x86_feature_detected!("avx2") {
                    // SAFETY: the CPU has just been checked for AVX2.
                    return unsafe { wide($($arg),*) };
                }
            }
            body($($arg),*)
        }
    };
}

/// Columns per flag bit of `scan_row`.
pub(super) const SCAN_BLOCK: usize = 32;

multiversion! {
    /// One branch-free pass per block of `SCAN_BLOCK` columns: counts and
    /// flags as `RowFlags` describes; `slack` widens the comparison with the
    /// floors (masked rows' extra f32 error, 0 for complete rows).
    pub(super) fn scan_row(tile: &[f32], floors: &[f32], above: f32, below: f32, slack: f32) -> RowFlags {
        assert!(tile.len() <= 64 * SCAN_BLOCK, "too many columns for the flags");
        let mut flags = RowFlags {
            block: SCAN_BLOCK,
            ..RowFlags::default()
        };
        for (b, (tile, floors)) in tile.chunks(SCAN_BLOCK).zip(floors.chunks(SCAN_BLOCK)).enumerate() {
            let mut clear = 0u32;
            let mut near = 0u32;
            let mut over = 0u32;
            for (&v, &floor) in tile.iter().zip(floors) {
                clear += u32::from(v > above);
                // NaN compares false both ways, so it lands here.
                near |= u32::from(!((v > above) | (v < below)));
                over |= u32::from(v + slack > floor);
            }
            flags.clear += clear;
            flags.near |= u64::from(near) << b;
            flags.over |= u64::from(over) << b;
        }
        flags
    }
}

multiversion! {
    /// "Larger is more extreme" for a whole slice, the side chosen once.
    pub(super) fn orient_all(side: Side, values: &mut [f32]) {
        match side {
            Side::Both => values.iter_mut().for_each(|v| *v = v.abs()),
            Side::Greater => {}
            Side::Less => values.iter_mut().for_each(|v| *v = -*v),
        }
    }
}

/// Constants of the Welch finisher, from the group sizes.
#[derive(Clone, Copy, Default)]
pub(super) struct WelchConstants {
    pub total_sq: f32,
    pub inv_na: f32,
    pub inv_nb: f32,
    pub var_a: f32,
    pub var_b: f32,
    pub diff: f32,
}

multiversion! {
    /// Group sums and sums of squares to Welch t, in place; ill-conditioned
    /// entries (variance lost to cancellation) become NaN so that they are
    /// recomputed in f64. Branch-free so that it vectorizes.
    pub(super) fn welch_row(sums: &mut [f32], squares: &[f32], c: WelchConstants) {
        for (v, &q1) in sums.iter_mut().zip(squares) {
            let s1 = *v;
            let s1sq = s1 * s1;
            let q0 = c.total_sq - q1;
            let ss_b = q1 - s1sq * c.inv_nb;
            let ss_a = q0 - s1sq * c.inv_na;
            let conditioned = (ss_b > 1e-2 * q1) & (ss_a > 1e-2 * q0);
            let t = s1 * c.diff / (ss_a * c.var_a + ss_b * c.var_b).sqrt();
            *v = if conditioned { t } else { f32::NAN };
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The same pass written with plain branches, element by element.
    fn scan_by_hand(
        tile: &[f32],
        floors: &[f32],
        above: f32,
        below: f32,
        slack: f32,
    ) -> (u32, bool, bool) {
        let mut clear = 0;
        let (mut near, mut over) = (false, false);
        for (j, &v) in tile.iter().enumerate() {
            if v > above {
                clear += 1;
            } else if v.is_nan() || v >= below {
                near = true;
            }
            if v + slack > floors[j] {
                over = true;
            }
        }
        (clear, near, over)
    }

    #[test]
    fn scan_row_matches_a_branchy_loop() {
        // Lengths not a multiple of any vector width, NaN and edge values.
        let base = [0.5f32, 2.0, 1.0, 1.5, f32::NAN, -3.0, 1.25, 0.99];
        for len in [0, 1, 7, 8, 9, 33, 515] {
            let tile: Vec<f32> = (0..len)
                .map(|j| base[j % 8] * (1.0 + (j / 8) as f32 * 0.1))
                .collect();
            let floors: Vec<f32> = (0..len)
                .map(|j| if j % 5 == 0 { 1.9 } else { 100.0 })
                .collect();
            for slack in [0.0, 0.2] {
                let got = scan_row(&tile, &floors, 1.5, 1.0, slack);
                let want = scan_by_hand(&tile, &floors, 1.5, 1.0, slack);
                let (mut near, mut over) = (false, false);
                for b in 0..64 {
                    let range = b * SCAN_BLOCK..((b + 1) * SCAN_BLOCK).min(len);
                    if range.is_empty() {
                        assert_eq!((got.near >> b, got.over >> b), (0, 0), "length {len}");
                        break;
                    }
                    let (_, n, o) =
                        scan_by_hand(&tile[range.clone()], &floors[range], 1.5, 1.0, slack);
                    assert_eq!(got.near >> b & 1 == 1, n, "length {len} block {b}");
                    assert_eq!(got.over >> b & 1 == 1, o, "length {len} block {b}");
                    near |= n;
                    over |= o;
                }
                assert_eq!((got.clear, near, over), want, "length {len}");
            }
        }
    }

    /// The Welch finisher written out once more as plain scalar f32
    /// arithmetic: whichever version `welch_row` runs (AVX2 on this CPU or
    /// the baseline), its bits must equal these, or results would depend
    /// on the machine.
    #[test]
    fn welch_row_bits_equal_plain_scalar_arithmetic() {
        let (na, nb) = (7.0f32, 9.0f32);
        let c = WelchConstants {
            total_sq: na + nb - 1.0,
            inv_na: 1.0 / na,
            inv_nb: 1.0 / nb,
            var_a: 1.0 / ((na - 1.0) * na),
            var_b: 1.0 / ((nb - 1.0) * nb),
            diff: 1.0 / na + 1.0 / nb,
        };
        let len = 1027;
        let sums: Vec<f32> = (0..len)
            .map(|j| ((j * 7919) % 2001) as f32 / 500.0 - 2.0)
            .collect();
        let squares: Vec<f32> = (0..len)
            .map(|j| ((j * 104_729) % 1501) as f32 / 100.0)
            .collect();
        let mut got = sums.clone();
        welch_row(&mut got, &squares, c);
        for j in 0..len {
            let (s1, q1) = (sums[j], squares[j]);
            let ss_b = q1 - s1 * s1 * c.inv_nb;
            let ss_a = (c.total_sq - q1) - s1 * s1 * c.inv_na;
            let want = if ss_b > 1e-2 * q1 && ss_a > 1e-2 * (c.total_sq - q1) {
                s1 * c.diff / (ss_a * c.var_a + ss_b * c.var_b).sqrt()
            } else {
                f32::NAN
            };
            assert_eq!(got[j].to_bits(), want.to_bits(), "element {j}");
        }
    }
}
