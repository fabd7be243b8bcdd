//! Per-feature preparation: screen the row, standardize it in f64 (mid-ranks
//! first for rank tests), and compute its observed statistic and
//! model-based p-value.

use super::{
    mid_ranks, rank_sum_pvalue, student_t, t_pvalue, welch_t, GroupSums, Side, Sizes, TestKind,
};

/// Why a feature has (or has no) p-value. Stored as one byte in the spill.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[repr(u8)]
pub enum Status {
    Tested = 0,
    Constant = 1,
    MissingValues = 2,
    NonFinite = 3,
    NoWithinVariance = 4,
}

impl Status {
    pub fn from_code(code: u8) -> Option<Self> {
        Some(match code {
            0 => Status::Tested,
            1 => Status::Constant,
            2 => Status::MissingValues,
            3 => Status::NonFinite,
            4 => Status::NoWithinVariance,
            _ => return None,
        })
    }
    /// The reason written beside an untested feature ("" when tested).
    pub fn reason(self) -> &'static str {
        match self {
            Status::Tested => "",
            Status::Constant => "constant",
            Status::MissingValues => "missing values",
            Status::NonFinite => "infinite values",
            Status::NoWithinVariance => "no variance within groups",
        }
    }
}

/// The fixed parts of a two-group test shared by all features.
#[derive(Debug, Clone, Copy)]
pub struct TestSpec {
    pub test: TestKind,
    pub side: Side,
    pub sizes: Sizes,
}

#[derive(Debug, Clone, Copy)]
pub struct Prepared {
    pub status: Status,
    /// Mean of B minus mean of A, in input units.
    pub effect: f64,
    /// The reported statistic (t, difference in means, or U of group B).
    pub statistic: f64,
    pub p_param: f64,
    /// Observed kernel statistic (see `stats` module docs).
    pub kernel_obs: f64,
    /// Sum of |z|, which bounds the f32 rounding error of group sums.
    pub abs_sum: f64,
}

impl Prepared {
    fn untested(status: Status, effect: f64) -> Self {
        Prepared {
            status,
            effect,
            statistic: f64::NAN,
            p_param: f64::NAN,
            kernel_obs: f64::NAN,
            abs_sum: 0.0,
        }
    }
}

/// Reusable buffers so preparation does not allocate per feature.
#[derive(Default)]
pub struct PrepScratch {
    order: Vec<usize>,
    ranks: Vec<f64>,
}

impl TestSpec {
    /// Kernel statistic of a standardized row under `labels`, in f64.
    #[inline]
    pub fn kernel_stat(&self, z: &[f64], labels: &[u8]) -> f64 {
        let sums = GroupSums::of(z, labels);
        match self.test {
            TestKind::Welch => self.side.orient(welch_t(sums, self.sizes).0),
            _ => self.side.orient(sums.s1),
        }
    }

    /// Screens and standardizes `raw` into `z`; `labels` is the observed labelling.
    pub fn prepare(
        &self,
        raw: &[f64],
        labels: &[u8],
        z: &mut [f64],
        scratch: &mut PrepScratch,
    ) -> Prepared {
        let sizes = self.sizes;
        if raw.iter().any(|v| v.is_nan()) {
            return Prepared::untested(Status::MissingValues, f64::NAN);
        }
        if raw.iter().any(|v| v.is_infinite()) {
            return Prepared::untested(Status::NonFinite, f64::NAN);
        }
        let (mut sum_a, mut sum_b) = (0.0, 0.0);
        for (&v, &l) in raw.iter().zip(labels) {
            if l == 1 {
                sum_b += v;
            } else {
                sum_a += v;
            }
        }
        let (mean_a, mean_b) = (sum_a / sizes.n_a as f64, sum_b / sizes.n_b as f64);
        let effect = mean_b - mean_a;
        let first = raw[0];
        if raw.iter().all(|&v| v == first) {
            return Prepared::untested(Status::Constant, effect);
        }
        if self.test != TestKind::RankSum && no_within_variance(raw, labels) {
            return Prepared::untested(Status::NoWithinVariance, effect);
        }
        let mut tie_sum = 0.0;
        let source: &[f64] = if self.test.uses_ranks() {
            scratch.ranks.resize(raw.len(), 0.0);
            tie_sum = mid_ranks(raw, &mut scratch.order, &mut scratch.ranks);
            &scratch.ranks
        } else {
            raw
        };
        let abs_sum = standardize(source, z);
        let sums = GroupSums::of(z, labels);
        let (statistic, p_param) = match self.test {
            TestKind::Welch => {
                let (t, df) = welch_t(sums, sizes);
                (t, t_pvalue(t, df, self.side))
            }
            TestKind::Student => {
                let t = student_t(sums.s1, sizes);
                (t, t_pvalue(t, sizes.n() as f64 - 2.0, self.side))
            }
            TestKind::MeanDiff => {
                let t = student_t(sums.s1, sizes);
                (effect, t_pvalue(t, sizes.n() as f64 - 2.0, self.side))
            }
            TestKind::RankSum => {
                let nb = sizes.n_b as f64;
                let rank_sum_b: f64 = scratch
                    .ranks
                    .iter()
                    .zip(labels)
                    .filter(|(_, &l)| l == 1)
                    .map(|(r, _)| r)
                    .sum();
                let u = rank_sum_b - nb * (nb + 1.0) / 2.0;
                (u, rank_sum_pvalue(u, sizes, tie_sum, self.side))
            }
        };
        Prepared {
            status: Status::Tested,
            effect,
            statistic,
            p_param,
            kernel_obs: self.kernel_stat(z, labels),
            abs_sum,
        }
    }
}

fn no_within_variance(raw: &[f64], labels: &[u8]) -> bool {
    let mut first: [Option<f64>; 2] = [None, None];
    for (&v, &l) in raw.iter().zip(labels) {
        match first[l as usize] {
            None => first[l as usize] = Some(v),
            Some(f) if f != v => return false,
            _ => {}
        }
    }
    true
}

/// Centre and scale to unit sample SD, in f64. Returns sum |z|.
///
/// Values are first divided by a power of two near their largest magnitude
/// (exact in binary, and no sum can overflow even near f64's limits), then
/// shifted by the first value before the mean is taken: for a row such as
/// 1e9 + 1e-3 * u the differences keep all their digits (Sterbenz), where
/// dividing by a non-power-of-two scale first would round away all but four.
/// The mean is refined by a second pass over the residuals.
pub fn standardize(x: &[f64], z: &mut [f64]) -> f64 {
    let n = x.len() as f64;
    let largest = x.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    let scale = if largest > 0.0 && largest.is_finite() {
        // Clamped so that neither the scale nor its reciprocal leaves the normal range.
        2f64.powi((largest.log2().floor() as i32).clamp(-1000, 1000))
    } else {
        1.0
    };
    let first = x.first().map_or(0.0, |v| v / scale);
    for (zi, v) in z.iter_mut().zip(x) {
        *zi = v / scale - first;
    }
    let mut mean = z.iter().sum::<f64>() / n;
    mean += z.iter().map(|d| d - mean).sum::<f64>() / n;
    let ss: f64 = z
        .iter()
        .map(|d| {
            let c = d - mean;
            c * c
        })
        .sum();
    let sd = (ss / (n - 1.0)).sqrt();
    let mut abs_sum = 0.0;
    for zi in z.iter_mut() {
        *zi = (*zi - mean) / sd;
        abs_sum += zi.abs();
    }
    abs_sum
}
