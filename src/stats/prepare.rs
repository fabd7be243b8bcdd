//! Per-feature preparation: screen the row, standardize it in f64 (mid-ranks
//! first for rank tests), and compute its observed statistic and
//! model-based p-value.

use crate::design::model::LinearModel;

use super::{
    chi2_pvalue, f_pvalue, mid_ranks, normal_pvalue, rank_sum_pvalue, student_t, t_pvalue, welch_t,
    DesignKind, GroupSums, Side, Sizes, TestKind,
};

/// Why a feature has (or has no) p-value. Stored as one byte in the spill.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[repr(u8)]
pub enum Status {
    Tested = 0,
    Constant = 1,
    // Code 2 (missing values in a design without masking) is retired, not
    // reused: a spill written by an older version fails to read instead of
    // being misread.
    NonFinite = 3,
    NoWithinVariance = 4,
    /// Fewer observed (non-missing) values than `--min-observed` in a group.
    TooFewObserved = 5,
    /// Covariate designs: on the observed units the effect is explained by
    /// the covariates.
    Confounded = 6,
}

impl Status {
    pub fn from_code(code: u8) -> Option<Self> {
        Some(match code {
            0 => Status::Tested,
            1 => Status::Constant,
            3 => Status::NonFinite,
            4 => Status::NoWithinVariance,
            5 => Status::TooFewObserved,
            6 => Status::Confounded,
            _ => return None,
        })
    }
    /// The reason written beside an untested feature ("" when tested).
    pub fn reason(self) -> &'static str {
        match self {
            Status::Tested => "",
            Status::Constant => "constant",
            Status::NonFinite => "infinite values",
            Status::NoWithinVariance => "no variance within groups",
            Status::TooFewObserved => "too few observed values",
            Status::Confounded => "effect explained by the covariates on the observed values",
        }
    }
}

/// The fixed parts of a test shared by all features.
#[derive(Debug, Clone)]
pub struct TestSpec {
    pub test: TestKind,
    pub side: Side,
    /// Two groups: sizes of A and B. Paired: pairs in both. Other designs:
    /// `n_a` is the number of samples, `n_b` 0.
    pub sizes: Sizes,
    /// Samples per class (group tests, two groups included).
    pub group_sizes: Vec<usize>,
    /// Correlation tests: the standardized trait (Pearson) or its
    /// standardized mid-ranks (Spearman), per unit.
    pub trait_weights: Vec<f64>,
    /// With covariates: the linear model (Freedman–Lane permutation of
    /// residuals; kernel sums are against the permuted model basis).
    pub model: Option<LinearModel>,
    /// Fewest observed values per group a feature with missing values
    /// needs to be tested (two-group tests; see `masked`).
    pub min_observed: usize,
}

/// Which relabelling a kernel statistic is computed for.
#[derive(Debug, Clone, Copy)]
pub enum Assignment<'a> {
    /// Class of each unit (group tests).
    Classes(&'a [u8]),
    /// Unit whose trait value each unit takes (correlation tests).
    Sources(&'a [u32]),
    /// 1 where a unit's sign is flipped (paired tests).
    Flips(&'a [u8]),
    /// The observed design: observed classes, trait order, no flips.
    Observed(&'a [u8]),
}

/// What `two_group_core` finds for a testable row.
pub(crate) struct TwoGroupCore {
    pub effect: f64,
    pub statistic: f64,
    pub p_param: f64,
    pub abs_sum: f64,
    /// The kernel statistic under the labels given.
    pub kernel_obs: f64,
}

/// Default of `--min-observed`: observed values per group a feature with
/// missing values needs (see the option's help for why three).
pub const DEFAULT_MIN_OBSERVED: usize = 3;

/// Most classes a group test may have.
pub const MAX_GROUPS: usize = 32;

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
    /// Observed (non-missing) values per group when the row has missing
    /// values; `None` for complete rows.
    pub observed: Option<Sizes>,
}

impl Prepared {
    pub(crate) fn untested(status: Status, effect: f64) -> Self {
        Prepared {
            status,
            effect,
            statistic: f64::NAN,
            p_param: f64::NAN,
            kernel_obs: f64::NAN,
            abs_sum: 0.0,
            observed: None,
        }
    }
}

/// Reusable buffers so preparation does not allocate per feature.
#[derive(Default)]
pub struct PrepScratch {
    pub(crate) observed_raw: Vec<f64>,
    pub(crate) observed_labels: Vec<u8>,
    pub(crate) observed_z: Vec<f64>,
    order: Vec<usize>,
    ranks: Vec<f64>,
    diffs: Vec<f64>,
    magnitudes: Vec<f64>,
    signed: Vec<f64>,
}

impl PrepScratch {
    /// Standardizes `raw`, or its mid-ranks for rank tests, into `z`;
    /// returns sum |z|.
    fn standardize(&mut self, raw: &[f64], ranks: bool, z: &mut [f64]) -> f64 {
        if !ranks {
            return standardize(raw, z);
        }
        self.ranks.resize(raw.len(), 0.0);
        mid_ranks(raw, &mut self.order, &mut self.ranks);
        standardize(&self.ranks, z)
    }
}

impl TestSpec {
    pub fn two_group(test: TestKind, side: Side, sizes: Sizes) -> Self {
        TestSpec {
            test,
            side,
            sizes,
            group_sizes: vec![sizes.n_a, sizes.n_b],
            trait_weights: Vec::new(),
            model: None,
            min_observed: DEFAULT_MIN_OBSERVED,
        }
    }

    /// With covariates, whether the model's statistic is an F (k groups)
    /// rather than a t.
    pub fn model_f(&self) -> bool {
        self.model.is_some() && self.test.is_k_group()
    }

    /// Units the kernel sees per feature: samples, or pairs.
    pub fn units(&self) -> usize {
        if let Some(model) = &self.model {
            return model.effect_direction.len();
        }
        match self.test.design() {
            DesignKind::Paired => self.sizes.n_a,
            DesignKind::Groups => self.group_sizes.iter().sum(),
            DesignKind::Trait => self.trait_weights.len(),
        }
    }

    /// Matrix values read per feature (pairs read both of their samples).
    pub fn raw_width(&self) -> usize {
        match self.test.design() {
            DesignKind::Paired => 2 * self.sizes.n_a,
            _ => self.units(),
        }
    }

    /// Weight columns per relabelling in the kernel's GEMM.
    pub fn width(&self) -> usize {
        if let Some(model) = &self.model {
            return model.basis_len();
        }
        match self.test.design() {
            DesignKind::Groups if self.test.is_k_group() => self.group_sizes.len() - 1,
            _ => 1,
        }
    }

    /// The `units x width` weights of one relabelling, row-major.
    pub fn weights(&self, assignment: Assignment<'_>, out: &mut [f64]) {
        let r = self.width();
        let n = self.units();
        out[..n * r].fill(0.0);
        if let Some(model) = &self.model {
            // Unit j's residual moves to the unit that takes it: weights are
            // the model basis at the inverse permutation.
            for (c, basis) in model.columns().enumerate() {
                match assignment {
                    Assignment::Sources(src) => {
                        for (i, &s) in src.iter().enumerate() {
                            out[s as usize * r + c] = basis[i];
                        }
                    }
                    _ => {
                        for (j, &v) in basis.iter().enumerate() {
                            out[j * r + c] = v;
                        }
                    }
                }
            }
            return;
        }
        match assignment {
            Assignment::Classes(classes) | Assignment::Observed(classes)
                if self.test.design() == DesignKind::Groups =>
            {
                for (i, &c) in classes.iter().enumerate().take(n) {
                    if c >= 1 {
                        out[i * r + (c as usize - 1)] = 1.0;
                    }
                }
            }
            Assignment::Sources(src) => {
                for (i, &s) in src.iter().enumerate().take(n) {
                    out[i] = self.trait_weights[s as usize];
                }
            }
            Assignment::Flips(flips) => {
                for (i, &f) in flips.iter().enumerate().take(n) {
                    out[i] = if f == 1 { -1.0 } else { 1.0 };
                }
            }
            Assignment::Observed(_) if self.test.design() == DesignKind::Trait => {
                out[..n].copy_from_slice(&self.trait_weights);
            }
            Assignment::Observed(_) => out[..n].fill(1.0),
            Assignment::Classes(_) => {}
        }
    }

    /// Kernel statistic of a standardized row under an assignment, in f64.
    pub fn kernel_stat_with(&self, z: &[f64], assignment: Assignment<'_>) -> f64 {
        let mut sums = [0.0f64; MAX_GROUPS];
        if let Some(model) = &self.model {
            for (c, basis) in model.columns().enumerate() {
                sums[c] = match assignment {
                    Assignment::Sources(src) => src
                        .iter()
                        .enumerate()
                        .map(|(i, &s)| basis[i] * z[s as usize])
                        .sum(),
                    _ => basis.iter().zip(z).map(|(a, b)| a * b).sum(),
                };
            }
            return self.finish(&sums[..self.width()], 0.0);
        }
        let mut q1 = 0.0;
        match assignment {
            Assignment::Classes(classes) | Assignment::Observed(classes)
                if self.test.design() == DesignKind::Groups =>
            {
                if self.width() == 1 {
                    // Two groups: the sums in registers (through `sums`,
                    // each add waited for the previous store), without a
                    // branch (relabelled classes are random: the f64
                    // rechecks of Welch t were 7% of a scan). The same
                    // sums bit for bit: adding v * 0 = +-0 leaves a sum
                    // unchanged, as it never is -0 (it starts at +0 and
                    // round-to-nearest gives +0 to x + (-x)); z is finite.
                    let mut s1 = 0.0;
                    for (&v, &c) in z.iter().zip(classes) {
                        // Classes are 0 or 1 here, so w is the indicator
                        // of class 1 (a compare, a mask or a select of
                        // floats, the compiler turns into a branch).
                        debug_assert!(c <= 1);
                        let w = f64::from(c);
                        s1 += v * w;
                        q1 += v * v * w;
                    }
                    sums[0] = s1;
                } else {
                    for (&v, &c) in z.iter().zip(classes) {
                        if c >= 1 {
                            sums[c as usize - 1] += v;
                            if c == 1 {
                                q1 += v * v;
                            }
                        }
                    }
                }
            }
            Assignment::Sources(src) => {
                for (&v, &s) in z.iter().zip(src) {
                    sums[0] += v * self.trait_weights[s as usize];
                }
            }
            Assignment::Flips(flips) => {
                for (&v, &f) in z.iter().zip(flips) {
                    sums[0] += if f == 1 { -v } else { v };
                }
            }
            Assignment::Observed(_) if self.test.design() == DesignKind::Trait => {
                for (&v, &t) in z.iter().zip(&self.trait_weights) {
                    sums[0] += v * t;
                }
            }
            Assignment::Observed(_) => sums[0] = z.iter().sum(),
            Assignment::Classes(_) => {}
        }
        self.finish(&sums[..self.width()], q1)
    }

    /// Two-group shorthand of `kernel_stat_with`.
    #[inline]
    pub fn kernel_stat(&self, z: &[f64], labels: &[u8]) -> f64 {
        self.kernel_stat_with(z, Assignment::Classes(labels))
    }

    /// Kernel statistic from the weighted sums of one relabelling (and the
    /// group-B sum of squares, Welch only).
    #[inline]
    pub fn finish(&self, sums: &[f64], q1: f64) -> f64 {
        if let Some(model) = &self.model {
            if self.model_f() {
                return model_f(sums, model.effect_columns(), self.units(), model.df);
            }
            return self.side.orient(model_t(sums, self.units(), model.df));
        }
        match self.test {
            TestKind::Welch => self
                .side
                .orient(welch_t(GroupSums { s1: sums[0], q1 }, self.sizes).0),
            TestKind::Anova | TestKind::Kruskal => self.between_groups(sums),
            _ => self.side.orient(sums[0]),
        }
    }

    /// Between-group sum of squares of a standardized row (total sum 0, so
    /// class 0's sum is minus the others').
    #[inline]
    pub fn between_groups(&self, sums: &[f64]) -> f64 {
        let mut rest = 0.0;
        let mut ssb = 0.0;
        for (c, &s) in sums.iter().enumerate() {
            rest += s;
            ssb += s * s / self.group_sizes[c + 1] as f64;
        }
        ssb + rest * rest / self.group_sizes[0] as f64
    }

    /// Screens and standardizes `raw` into `z` (units long); `labels` is
    /// the observed class of each unit (group tests; ignored otherwise).
    pub fn prepare(
        &self,
        raw: &[f64],
        labels: &[u8],
        z: &mut [f64],
        scratch: &mut PrepScratch,
    ) -> Prepared {
        if raw.iter().any(|v| v.is_infinite()) {
            return Prepared::untested(Status::NonFinite, f64::NAN);
        }
        if raw.iter().any(|v| v.is_nan()) {
            return self.prepare_masked(raw, labels, z, scratch);
        }
        if let Some(model) = &self.model {
            return self.prepare_model(model, raw, labels, z);
        }
        match self.test.design() {
            DesignKind::Groups if self.test.is_k_group() => {
                self.prepare_k_groups(raw, labels, z, scratch)
            }
            DesignKind::Groups => self.prepare_two_groups(raw, labels, z, scratch),
            DesignKind::Trait => self.prepare_trait(raw, z, scratch),
            DesignKind::Paired => self.prepare_paired(raw, z, scratch),
        }
    }

    fn finish_prepared(
        &self,
        z: &[f64],
        labels: &[u8],
        abs_sum: f64,
        effect: f64,
        statistic: f64,
        p_param: f64,
    ) -> Prepared {
        Prepared {
            status: Status::Tested,
            effect,
            statistic,
            p_param,
            kernel_obs: self.kernel_stat_with(z, Assignment::Observed(labels)),
            abs_sum,
            observed: None,
        }
    }

    fn prepare_two_groups(
        &self,
        raw: &[f64],
        labels: &[u8],
        z: &mut [f64],
        scratch: &mut PrepScratch,
    ) -> Prepared {
        match self.two_group_core(raw, labels, self.sizes, z, scratch) {
            Ok(c) => Prepared {
                status: Status::Tested,
                effect: c.effect,
                statistic: c.statistic,
                p_param: c.p_param,
                kernel_obs: c.kernel_obs,
                abs_sum: c.abs_sum,
                observed: None,
            },
            Err(untested) => untested,
        }
    }

    /// Effect, statistic and model-based p-value of two groups of the given
    /// sizes (all of `raw` observed), with `z` the standardized values or
    /// mid-ranks.
    pub(crate) fn two_group_core(
        &self,
        raw: &[f64],
        labels: &[u8],
        sizes: Sizes,
        z: &mut [f64],
        scratch: &mut PrepScratch,
    ) -> Result<TwoGroupCore, Prepared> {
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
            return Err(Prepared::untested(Status::Constant, effect));
        }
        if self.test != TestKind::RankSum && no_within_variance(raw, labels) {
            return Err(Prepared::untested(Status::NoWithinVariance, effect));
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
        // The kernel statistic from these sums: the same additions in the
        // same order as `kernel_stat_with` under these labels (0 and 1
        // only), so the same bits, without another pass over the row.
        let mut kernel_obs = self.side.orient(sums.s1);
        let (statistic, p_param) = match self.test {
            TestKind::Welch => {
                let (t, df) = welch_t(sums, sizes);
                kernel_obs = self.side.orient(t);
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
            _ => {
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
        Ok(TwoGroupCore {
            effect,
            statistic,
            p_param,
            abs_sum,
            kernel_obs,
        })
    }

    /// The model's t for the effect of interest after the covariates, on
    /// residuals scaled to sum of squares n - 1; effect = the coefficient
    /// (adjusted difference B minus A, or slope per trait unit).
    fn prepare_model(
        &self,
        model: &LinearModel,
        raw: &[f64],
        labels: &[u8],
        z: &mut [f64],
    ) -> Prepared {
        let first = raw[0];
        if raw.iter().all(|&v| v == first) {
            return Prepared::untested(Status::Constant, f64::NAN);
        }
        let coefficient = model
            .effect_direction
            .iter()
            .zip(raw)
            .map(|(a, y)| a * y)
            .sum::<f64>()
            / model.effect_norm;
        model.residualize(raw, z);
        let n = z.len() as f64;
        let ss: f64 = z.iter().map(|v| v * v).sum();
        let raw_ss: f64 = raw.iter().map(|v| v * v).sum();
        if ss <= 1e-24 * raw_ss {
            return Prepared::untested(Status::NoWithinVariance, coefficient);
        }
        let scale = (ss / (n - 1.0)).sqrt();
        let mut abs_sum = 0.0;
        for v in z.iter_mut() {
            *v /= scale;
            abs_sum += v.abs();
        }
        let effects = model.effect_columns();
        let sums: Vec<f64> = model
            .columns()
            .take(effects)
            .map(|basis| basis.iter().zip(z.iter()).map(|(a, b)| a * b).sum())
            .collect();
        if self.model_f() {
            let f = model_f(&sums, effects, z.len(), model.df);
            if !f.is_finite() {
                return Prepared::untested(Status::NoWithinVariance, f64::NAN);
            }
            // Partial eta squared: the effect's share of what the
            // covariates leave (n - 1 after standardization).
            let partial_eta2 = sums.iter().map(|s| s * s).sum::<f64>() / (n - 1.0);
            let p = f_pvalue(f, effects as f64, model.df);
            return self.finish_prepared(z, labels, abs_sum, partial_eta2, f, p);
        }
        let t = model_t(&sums, z.len(), model.df);
        if !t.is_finite() {
            return Prepared::untested(Status::NoWithinVariance, coefficient);
        }
        let p = t_pvalue(t, model.df, self.side);
        self.finish_prepared(z, labels, abs_sum, coefficient, t, p)
    }

    /// One-way F or Kruskal–Wallis H; effect = eta squared (share of the
    /// total sum of squares, of values or mid-ranks, between groups).
    pub(super) fn prepare_k_groups(
        &self,
        raw: &[f64],
        labels: &[u8],
        z: &mut [f64],
        scratch: &mut PrepScratch,
    ) -> Prepared {
        let first = raw[0];
        if raw.iter().all(|&v| v == first) {
            return Prepared::untested(Status::Constant, f64::NAN);
        }
        if self.test == TestKind::Anova && no_within_variance(raw, labels) {
            return Prepared::untested(Status::NoWithinVariance, f64::NAN);
        }
        let abs_sum = scratch.standardize(raw, self.test == TestKind::Kruskal, z);
        let k = self.group_sizes.len();
        let n = z.len() as f64;
        let mut sums = [0.0f64; MAX_GROUPS];
        for (&v, &c) in z.iter().zip(labels) {
            if c >= 1 {
                sums[c as usize - 1] += v;
            }
        }
        let ssb = self.between_groups(&sums[..k - 1]);
        let eta2 = ssb / (n - 1.0);
        let (statistic, p_param) = if self.test == TestKind::Anova {
            let f = (ssb / (k as f64 - 1.0)) / (((n - 1.0) - ssb).max(0.0) / (n - k as f64));
            (f, f_pvalue(f, k as f64 - 1.0, n - k as f64))
        } else {
            // Standardized mid-ranks: H = (n - 1) SSB / SST with SST = n - 1.
            (ssb, chi2_pvalue(ssb, k as f64 - 1.0))
        };
        self.finish_prepared(z, labels, abs_sum, eta2, statistic, p_param)
    }

    /// Pearson or Spearman correlation with the trait; effect = r (rho).
    fn prepare_trait(&self, raw: &[f64], z: &mut [f64], scratch: &mut PrepScratch) -> Prepared {
        let first = raw[0];
        if raw.iter().all(|&v| v == first) {
            return Prepared::untested(Status::Constant, f64::NAN);
        }
        let abs_sum = scratch.standardize(raw, self.test == TestKind::Spearman, z);
        let n = z.len() as f64;
        let s: f64 = z.iter().zip(&self.trait_weights).map(|(a, b)| a * b).sum();
        let r = (s / (n - 1.0)).clamp(-1.0, 1.0);
        let t = r * ((n - 2.0) / (1.0 - r * r)).sqrt();
        let p = t_pvalue(t, n - 2.0, self.side);
        self.finish_prepared(z, &[], abs_sum, r, r, p)
    }

    /// Paired t or signed-rank on the within-pair differences B minus A
    /// (raw holds the A samples of all pairs, then their B samples).
    pub(super) fn prepare_paired(
        &self,
        raw: &[f64],
        z: &mut [f64],
        scratch: &mut PrepScratch,
    ) -> Prepared {
        let m = self.sizes.n_a;
        let (a, b) = raw.split_at(m);
        scratch.diffs.clear();
        scratch.diffs.extend(b.iter().zip(a).map(|(y, x)| y - x));
        let d = &scratch.diffs;
        let mean = d.iter().sum::<f64>() / m as f64;
        if d.iter().all(|&v| v == 0.0) {
            return Prepared::untested(Status::Constant, 0.0);
        }
        let mf = m as f64;
        let (statistic, p_param, weights): (f64, f64, &[f64]) = if self.test == TestKind::PairedT {
            let var = d.iter().map(|v| (v - mean) * (v - mean)).sum::<f64>() / (mf - 1.0);
            if var == 0.0 {
                return Prepared::untested(Status::NoWithinVariance, mean);
            }
            let t = mean / (var / mf).sqrt();
            (t, t_pvalue(t, mf - 1.0, self.side), d)
        } else {
            // Wilcoxon signed-rank: zero differences dropped, mid-ranks of |d|.
            scratch.magnitudes.clear();
            scratch
                .magnitudes
                .extend(d.iter().filter(|v| **v != 0.0).map(|v| v.abs()));
            let nz = scratch.magnitudes.len();
            scratch.ranks.resize(nz, 0.0);
            let tie_sum = mid_ranks(&scratch.magnitudes, &mut scratch.order, &mut scratch.ranks);
            scratch.signed.clear();
            let mut k = 0;
            let mut w_plus = 0.0;
            for &v in d.iter() {
                if v == 0.0 {
                    scratch.signed.push(0.0);
                } else {
                    let r = scratch.ranks[k];
                    k += 1;
                    if v > 0.0 {
                        w_plus += r;
                    }
                    scratch.signed.push(r * v.signum());
                }
            }
            let nzf = nz as f64;
            let mu = nzf * (nzf + 1.0) / 4.0;
            let sd = (nzf * (nzf + 1.0) * (2.0 * nzf + 1.0) / 24.0 - tie_sum / 48.0).sqrt();
            let zscore = (w_plus - mu) / sd;
            (w_plus, normal_pvalue(zscore, self.side), &scratch.signed)
        };
        // Scale only (sign flips must keep zero at zero): sum of squares n - 1.
        let ss: f64 = weights.iter().map(|v| v * v).sum();
        let scale = (ss / (mf - 1.0)).sqrt();
        let mut abs_sum = 0.0;
        for (zi, &v) in z.iter_mut().zip(weights) {
            *zi = v / scale;
            abs_sum += zi.abs();
        }
        self.finish_prepared(z, &[], abs_sum, mean, statistic, p_param)
    }
}

/// F of an effect of `effects` columns from the sums against the model
/// basis (effect directions first) of residuals whose sum of squares is
/// n - 1: the effect's sum of squares per column over the residual mean
/// square.
#[inline]
pub fn model_f(sums: &[f64], effects: usize, n: usize, df: f64) -> f64 {
    let explained: f64 = sums.iter().map(|s| s * s).sum();
    let effect: f64 = sums[..effects].iter().map(|s| s * s).sum();
    let rss = (n as f64 - 1.0) - explained;
    (effect / effects as f64) / (rss.max(0.0) / df)
}

/// t of the effect from the sums against the model basis (effect direction
/// first) of residuals whose sum of squares is n - 1.
#[inline]
pub fn model_t(sums: &[f64], n: usize, df: f64) -> f64 {
    let explained: f64 = sums.iter().map(|s| s * s).sum();
    let rss = (n as f64 - 1.0) - explained;
    sums[0] / (rss.max(0.0) / df).sqrt()
}

fn no_within_variance(raw: &[f64], labels: &[u8]) -> bool {
    let mut first: [Option<f64>; MAX_GROUPS] = [None; MAX_GROUPS];
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
    // Multiplying by the reciprocal of a power of two rounds exactly as
    // dividing by it (both are the one correctly rounded x / 2^k), and
    // costs a multiply instead of a division per value.
    let inverse = 1.0 / scale;
    let first = x.first().map_or(0.0, |v| v * inverse);
    for (zi, v) in z.iter_mut().zip(x) {
        *zi = v * inverse - first;
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
