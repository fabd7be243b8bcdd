//! Tile finishers: turn the GEMM's weighted sums into oriented kernel
//! statistics in place, in f32, with ill-conditioned entries set to NaN so
//! that the counting pass recomputes them in f64.

use super::simd::{orient_all, welch_row, WelchConstants};
use super::Kernel;

impl Kernel {
    /// Compacts `cols` groups of `width` class sums into between-group sums
    /// of squares, in place (entry j is read before it is overwritten).
    pub(super) fn between_groups_tile(&self, wide: &mut [f32], cols: usize) {
        let r = self.spec.width();
        let inverse = &self.inverse_group_sizes;
        for j in 0..cols {
            let mut rest = 0.0f32;
            let mut ssb = 0.0f32;
            for c in 0..r {
                let s = wide[j * r + c];
                rest += s;
                ssb += s * s * inverse[c + 1];
            }
            wide[j] = ssb + rest * rest * inverse[0];
        }
    }

    /// Compacts `cols` groups of sums against the model basis into oriented
    /// t statistics (or F, for an effect of several columns), in place;
    /// ill-conditioned ones (residual sum of squares lost to cancellation)
    /// become NaN so that they are recomputed in f64.
    pub(super) fn model_tile(&self, wide: &mut [f32], cols: usize) {
        let r = self.spec.width();
        let n = self.units() as f32;
        let model = self.spec.model.as_ref();
        let df = model.map_or(1.0, |m| m.df) as f32;
        let effects = model.map_or(1, |m| m.effect_columns());
        let f_test = self.spec.model_f();
        let side = self.spec.side;
        for j in 0..cols {
            let sums = &wide[j * r..(j + 1) * r];
            let explained: f32 = sums.iter().map(|s| s * s).sum();
            let rss = (n - 1.0) - explained;
            wide[j] = if rss <= 1e-2 * (n - 1.0) {
                f32::NAN
            } else if f_test {
                let effect: f32 = sums[..effects].iter().map(|s| s * s).sum();
                (effect / effects as f32) / (rss / df)
            } else {
                side.orient32(sums[0] / (rss / df).sqrt())
            };
        }
    }

    /// Turns group sums and sums of squares into oriented Welch t in place;
    /// ill-conditioned entries (variance lost to cancellation) become NaN so
    /// that they are recomputed in f64.
    pub(super) fn welch_tile(&self, sums: &mut [f32], squares: &[f32]) {
        welch_row(sums, squares, self.welch_constants());
        orient_all(self.spec.side, sums);
    }

    /// Constants of the Welch finisher, from the group sizes.
    pub(super) fn welch_constants(&self) -> WelchConstants {
        let sizes = self.spec.sizes;
        let (na, nb) = (sizes.n_a as f32, sizes.n_b as f32);
        let (inv_na, inv_nb) = (1.0 / na, 1.0 / nb);
        WelchConstants {
            total_sq: na + nb - 1.0,
            inv_na,
            inv_nb,
            var_a: 1.0 / ((na - 1.0) * na),
            var_b: 1.0 / ((nb - 1.0) * nb),
            diff: inv_na + inv_nb,
        }
    }
}
