//! Small p-values from few relabelings.
//!
//! * [`tail_pvalue`]: when few relabelled statistics reach the observed one,
//!   extrapolate with a generalized Pareto distribution (GPD) fitted to the
//!   largest null statistics (Knijnenburg, Wessels, Reinders & Shmulevich
//!   2009, "Fewer permutations, more accurate P-values", Bioinformatics
//!   25(12):i161-i168), with the support constraint of Peschel, Boulesteix,
//!   von Mutius & Müller (2026, arXiv:2602.22975) so that the result is never
//!   zero.
//! * [`phipson_smyth_exact`]: the exact p-value for relabelings drawn with
//!   replacement (Phipson & Smyth 2010).

mod exact;
mod goodness;
mod gpd;
mod reference;
mod scan_pass;
#[cfg(test)]
mod tests;

pub use exact::{binomial_cdf, phipson_smyth_exact};
pub use goodness::{ad_critical_value, anderson_darling, gpd_fit_accepted};
pub use gpd::{fit_gpd, fit_gpd_bounded, gpd_cdf, gpd_ln_sf, gpd_log_likelihood, gpd_sf, GpdFit};
pub use reference::Reference;
pub use scan_pass::{tail_pass, TailPassCounts, TailSettings};

/// How the tail is chosen and judged.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TailOptions {
    /// Exceedances used in the first fit (Knijnenburg et al. start at 250),
    /// and never more than `max_share` of the null statistics.
    pub max_exceedances: usize,
    /// Largest share of the null the first fit may take: the GPD describes
    /// excesses over a HIGH threshold (Pickands 1975), so on the raw
    /// statistic the upper quarter is as low as we let it go; on the
    /// reference scale (see `for_reference_scale`) all of it.
    pub max_share: f64,
    /// How many exceedances to drop after a rejected fit (Knijnenburg: 10).
    pub step: usize,
    /// Fewest exceedances worth fitting. Two parameters from fewer than ~30
    /// points extrapolate by orders of magnitude on noise, and the
    /// Anderson–Darling points are asymptotic; 30 is our choice.
    pub min_exceedances: usize,
    /// Level of the Anderson–Darling test (Knijnenburg: 0.05).
    pub gof_level: f64,
    /// Relative margin of the support constraint: a fit whose support ends
    /// before (1 + margin) * (observed - threshold) is refitted with its end
    /// held there. The margin keeps the observed point strictly inside the
    /// support (at the end itself the tail probability is still zero).
    /// Peschel et al. choose their margin from the data; ours is fixed. It
    /// matters: on normal nulls (B = 2000) the fitted tail usually looks
    /// bounded and the constraint decides the far-tail p. 0.5 gave the
    /// smallest errors there (median log10 error -0.1..+0.3 for p 1e-4..1e-6,
    /// erring conservative further out); 0.1 underestimated by ~2 decades.
    pub support_margin: f64,
    /// Level of the likelihood-ratio test of shape = 0 (exponential tail)
    /// against a free shape, at the threshold the goodness-of-fit step
    /// chose; 0 always keeps the free shape. Nested models, one parameter
    /// apart: 2 (l_free - l_exp) is asymptotically chi^2 with 1 df (Wilks
    /// 1938; for the GPD at shape 0 the regularity conditions hold, Smith
    /// 1985, Biometrika 72:67-90). Keeping the exponential unless the data
    /// reject it removes the shape's variance from the extrapolation, which
    /// dominates far beyond the data (see DEVELOPERS.md, tail notes). Off
    /// by default (Knijnenburg's free shape); [`TailOptions::for_reference_scale`]
    /// turns it on at 0.05, where the tail is expected to be exponential.
    pub shape_test_level: f64,
}

impl Default for TailOptions {
    fn default() -> Self {
        TailOptions {
            max_exceedances: 250,
            max_share: 0.25,
            step: 10,
            min_exceedances: 30,
            gof_level: 0.05,
            support_margin: 0.5,
            shape_test_level: 0.0,
        }
    }
}

impl TailOptions {
    /// The settings `scan --tail-fit` uses on the reference scale (see
    /// `reference`): the first fit takes the whole null (all but its
    /// smallest value) instead of Knijnenburg's 250 exceedances. On that
    /// scale the excesses of an adequate reference are exponential over any
    /// threshold (memorylessness), so a lower threshold costs no bias there,
    /// and the goodness-of-fit step still raises the threshold (10 fewer
    /// exceedances at a time) wherever the data say otherwise; what it buys
    /// is variance: the scale's relative standard error is 1/sqrt(N),
    /// multiplied by the excess of the observed statistic when
    /// extrapolating (BENCHMARKS.md, tail accuracy).
    ///
    /// And the likelihood-ratio test of an exponential tail at level 0.01:
    /// on this scale shape 0 is what an adequate reference predicts, and the
    /// costs are lopsided — a wrongly kept exponential errs by the small
    /// curvature the test could not see, a wrongly freed shape extrapolates
    /// with the shape's full variance (often by orders of magnitude), so
    /// the exponential is given up only on strong evidence.
    pub fn for_reference_scale() -> Self {
        TailOptions {
            max_exceedances: usize::MAX,
            max_share: 1.0,
            shape_test_level: 0.01,
            ..TailOptions::default()
        }
    }

    /// Most exceedances the first fit of `total` null statistics may take.
    pub fn largest_fit(&self, total: usize) -> usize {
        // At most total - 1: the threshold lies below the fitted values.
        self.max_exceedances
            .min((total as f64 * self.max_share) as usize)
            .min(total.saturating_sub(1))
    }
}

/// A tail-approximated p-value and the fit behind it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TailEstimate {
    /// (exceedances / B) * P_gpd(Y > observed - threshold), floored at the
    /// smallest normal f64 so it is never zero.
    pub p: f64,
    pub shape: f64,
    pub scale: f64,
    pub threshold: f64,
    pub exceedances: usize,
    /// Whether the support constraint changed the fit.
    pub constrained: bool,
    /// Whether the likelihood-ratio step kept the exponential (shape 0).
    pub exponential: bool,
}

/// Tail p-value for one feature ("larger = more extreme"). `null` holds its
/// B relabelled statistics in any order and is reordered in place. `None`
/// (keep the counted p-value) when there are too few statistics, a NaN is
/// present, the observed value is not beyond the threshold, or no fit passes
/// the goodness-of-fit test down to `min_exceedances`.
///
/// Procedure (Knijnenburg et al. 2009): threshold midway between the N-th
/// and (N+1)-th largest null statistics, fit a GPD by maximum likelihood to
/// the N excesses, accept it if Anderson–Darling does not reject at
/// `gof_level`, else N -= step. Thresholds that would split tied values are
/// moved down to the next gap, so no excess is zero.
pub fn tail_pvalue(null: &mut [f64], observed: f64, opts: &TailOptions) -> Option<TailEstimate> {
    let total = null.len();
    if !observed.is_finite() || null.iter().any(|v| v.is_nan()) {
        return None;
    }
    let min_exceedances = opts.min_exceedances.max(3);
    let largest_fit = opts.largest_fit(total);
    if largest_fit < min_exceedances {
        return None;
    }
    // The top largest_fit + 1 values, descending. Sorting only these keeps
    // the cost O(B) and makes every later sum independent of input order.
    let keep = largest_fit + 1;
    let split = total - keep;
    if split > 0 {
        null.select_nth_unstable_by(split - 1, f64::total_cmp);
    }
    let top = &mut null[split..];
    top.sort_unstable_by(|a, b| b.total_cmp(a));
    if !top[0].is_finite() {
        return None;
    }
    let top: &[f64] = top;
    tail_pvalue_of_top(top, total, observed, opts)
}

/// [`tail_pvalue`] from the `max_exceedances + 1` largest of `total` null
/// statistics, sorted DESCENDING (callers that can select them cheaply, or
/// transform only them, come in here). `None` as for [`tail_pvalue`].
pub fn tail_pvalue_of_top(
    top: &[f64],
    total: usize,
    observed: f64,
    opts: &TailOptions,
) -> Option<TailEstimate> {
    let min_exceedances = opts.min_exceedances.max(3);
    let largest_fit = opts.largest_fit(total);
    if largest_fit < min_exceedances
        || top.len() <= largest_fit
        || !observed.is_finite()
        || !top[0].is_finite()
        || top.iter().any(|v| v.is_nan())
    {
        return None;
    }
    let step = opts.step.max(1);
    let mut excesses = Vec::with_capacity(largest_fit);
    let mut target = largest_fit;
    while target >= min_exceedances {
        let mut count = target;
        while count >= min_exceedances && top[count - 1] == top[count] {
            count -= 1;
        }
        if count < min_exceedances {
            break;
        }
        let threshold = 0.5 * (top[count - 1] + top[count]);
        if observed <= threshold {
            return None;
        }
        // Ascending order, as the Anderson–Darling sum wants.
        excesses.clear();
        excesses.extend(top[..count].iter().rev().map(|v| v - threshold));
        if let Some(estimate) = fit_and_judge(&excesses, observed - threshold, opts) {
            let (fit, constrained, exponential) = estimate;
            let tail = gpd_sf(observed - threshold, fit.shape, fit.scale);
            let p = (count as f64 / total as f64 * tail).max(f64::MIN_POSITIVE);
            return Some(TailEstimate {
                p,
                shape: fit.shape,
                scale: fit.scale,
                threshold,
                exceedances: count,
                constrained,
                exponential,
            });
        }
        target = count.saturating_sub(step);
    }
    None
}

/// Knijnenburg's acceptance step and the model inside the GPD family:
/// Anderson–Darling judges the free fit (does the GPD family describe these
/// excesses?); the likelihood-ratio test then keeps the exponential unless
/// it is rejected; a free fit with a negative shape whose support ends
/// before the observed excess is refitted with the support constraint.
fn fit_and_judge(
    ascending_excesses: &[f64],
    observed_excess: f64,
    opts: &TailOptions,
) -> Option<(GpdFit, bool, bool)> {
    let free = fit_gpd(ascending_excesses)?;
    if !gpd_fit_accepted(ascending_excesses, free.shape, free.scale, opts.gof_level) {
        return None;
    }
    if opts.shape_test_level > 0.0 && opts.shape_test_level < 1.0 {
        let n = ascending_excesses.len() as f64;
        let mean = ascending_excesses.iter().sum::<f64>() / n;
        let exponential = GpdFit {
            shape: 0.0,
            scale: mean,
            log_likelihood: gpd_log_likelihood(ascending_excesses, 0.0, mean),
        };
        let statistic = 2.0 * (free.log_likelihood - exponential.log_likelihood);
        if statistic <= chi_squared_1_quantile(1.0 - opts.shape_test_level) {
            return Some((exponential, false, true));
        }
    }
    let needed_end = observed_excess * (1.0 + opts.support_margin.max(0.0));
    if free.upper_endpoint() < needed_end {
        let bounded = fit_gpd_bounded(ascending_excesses, needed_end)?;
        // The constrained fit must still describe the data.
        gpd_fit_accepted(
            ascending_excesses,
            bounded.shape,
            bounded.scale,
            opts.gof_level,
        )
        .then_some((bounded, true, false))
    } else {
        Some((free, false, false))
    }
}

/// Quantile of chi^2 with 1 df: the square of the normal quantile at
/// (1 + q) / 2.
fn chi_squared_1_quantile(q: f64) -> f64 {
    use statrs::distribution::{ContinuousCDF, Normal};
    let z = Normal::new(0.0, 1.0)
        .map(|n| n.inverse_cdf(0.5 + 0.5 * q))
        .unwrap_or(f64::NAN);
    z * z
}
