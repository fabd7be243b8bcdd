//! Statistics stage: the tests riffle offers, their observed statistics and
//! model-based p-values, all in f64.
//!
//! Inside the kernel every test is reduced to a "kernel statistic" that is
//! larger when more extreme on the chosen side and comparable across
//! features (same function of the standardized data for every feature):
//! S1 (the group-B sum of standardized values or mid-ranks) for Student,
//! mean difference and rank-sum, and the Welch t itself for Welch.

pub mod masked;
pub mod masked_exact;
mod masked_paired;
mod masked_trait;
pub mod prepare;
pub mod relabelled;

pub use relabelled::relabelled_statistics;

use statrs::distribution::{ContinuousCDF, Normal, StudentsT};

#[derive(
    Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize, clap::ValueEnum,
)]
#[serde(rename_all = "kebab-case")]
pub enum TestKind {
    /// Welch t (two groups).
    Welch,
    /// Pooled-variance t (two groups).
    Student,
    /// Difference in means (two groups).
    MeanDiff,
    /// Wilcoxon–Mann–Whitney rank-sum (two groups).
    RankSum,
    /// One-way F (k groups).
    Anova,
    /// Kruskal–Wallis H (k groups).
    Kruskal,
    /// Pearson correlation with a numeric trait.
    Pearson,
    /// Spearman rank correlation with a numeric trait.
    Spearman,
    /// Paired t on within-pair differences (sign flips).
    PairedT,
    /// Wilcoxon signed-rank on within-pair differences (sign flips).
    SignedRank,
}

/// What kind of sample sheet information a test needs.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum DesignKind {
    Groups,
    Trait,
    Paired,
}

impl TestKind {
    pub fn name(self) -> &'static str {
        match self {
            TestKind::Welch => "welch",
            TestKind::Student => "student",
            TestKind::MeanDiff => "mean-diff",
            TestKind::RankSum => "rank-sum",
            TestKind::Anova => "anova",
            TestKind::Kruskal => "kruskal",
            TestKind::Pearson => "pearson",
            TestKind::Spearman => "spearman",
            TestKind::PairedT => "paired-t",
            TestKind::SignedRank => "signed-rank",
        }
    }
    pub fn design(self) -> DesignKind {
        match self {
            TestKind::Pearson | TestKind::Spearman => DesignKind::Trait,
            TestKind::PairedT | TestKind::SignedRank => DesignKind::Paired,
            _ => DesignKind::Groups,
        }
    }
    /// Tests of k >= 2 groups by a between-group sum of squares.
    pub fn is_k_group(self) -> bool {
        matches!(self, TestKind::Anova | TestKind::Kruskal)
    }
    pub fn uses_ranks(self) -> bool {
        self == TestKind::RankSum
    }
    /// Whether the kernel also needs group sums of squares.
    pub fn needs_squares(self) -> bool {
        self == TestKind::Welch
    }
}

#[derive(
    Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize, clap::ValueEnum,
)]
#[serde(rename_all = "kebab-case")]
pub enum Side {
    Both,
    Greater,
    Less,
}

impl Side {
    pub fn name(self) -> &'static str {
        match self {
            Side::Both => "both",
            Side::Greater => "greater",
            Side::Less => "less",
        }
    }
    /// Maps a signed statistic (B minus A) to "larger is more extreme".
    #[inline(always)]
    pub fn orient(self, t: f64) -> f64 {
        match self {
            Side::Both => t.abs(),
            Side::Greater => t,
            Side::Less => -t,
        }
    }
    #[inline(always)]
    pub fn orient32(self, t: f32) -> f32 {
        match self {
            Side::Both => t.abs(),
            Side::Greater => t,
            Side::Less => -t,
        }
    }
}

/// Group sums of one standardized feature (sum 0, sum of squares n-1)
/// under one labelling.
#[derive(Debug, Clone, Copy)]
pub struct GroupSums {
    pub s1: f64,
    pub q1: f64,
}

impl GroupSums {
    pub fn of(z: &[f64], labels: &[u8]) -> Self {
        let mut s1 = 0.0;
        let mut q1 = 0.0;
        for (&v, &l) in z.iter().zip(labels) {
            if l == 1 {
                s1 += v;
                q1 += v * v;
            }
        }
        GroupSums { s1, q1 }
    }
}

/// Sizes of a two-group design.
#[derive(Debug, Clone, Copy)]
pub struct Sizes {
    pub n_a: usize,
    pub n_b: usize,
}

impl Sizes {
    pub fn n(self) -> usize {
        self.n_a + self.n_b
    }
}

/// Welch t and its Welch–Satterthwaite df on standardized data.
pub fn welch_t(sums: GroupSums, sizes: Sizes) -> (f64, f64) {
    let (na, nb) = (sizes.n_a as f64, sizes.n_b as f64);
    let n = na + nb;
    let s0 = -sums.s1;
    let ss_b = (sums.q1 - sums.s1 * sums.s1 / nb).max(0.0);
    let ss_a = ((n - 1.0 - sums.q1) - s0 * s0 / na).max(0.0);
    let va = ss_a / (na - 1.0) / na;
    let vb = ss_b / (nb - 1.0) / nb;
    let se2 = va + vb;
    let t = (sums.s1 / nb - s0 / na) / se2.sqrt();
    let df = se2 * se2 / (va * va / (na - 1.0) + vb * vb / (nb - 1.0));
    (t, df)
}

/// Pooled-variance (Student) t on standardized data; df = n - 2.
pub fn student_t(s1: f64, sizes: Sizes) -> f64 {
    let (na, nb) = (sizes.n_a as f64, sizes.n_b as f64);
    let n = na + nb;
    let between = s1 * s1 * n / (na * nb);
    let within = ((n - 1.0) - between).max(0.0);
    let diff = s1 * n / (na * nb);
    diff / (within / (n - 2.0) * (1.0 / na + 1.0 / nb)).sqrt()
}

/// Two-sided or one-sided tail probability of a t statistic.
pub fn t_pvalue(t: f64, df: f64, side: Side) -> f64 {
    if !t.is_finite() {
        return match (side, t > 0.0) {
            (Side::Both, _) | (Side::Greater, true) | (Side::Less, false) => 0.0,
            _ => 1.0,
        };
    }
    let dist = match StudentsT::new(0.0, 1.0, df) {
        Ok(d) => d,
        Err(_) => return f64::NAN,
    };
    match side {
        Side::Both => (2.0 * dist.sf(t.abs())).min(1.0),
        Side::Greater => dist.sf(t),
        Side::Less => dist.cdf(t),
    }
}

/// Upper tail of the F distribution.
pub fn f_pvalue(f: f64, df1: f64, df2: f64) -> f64 {
    if f.is_infinite() {
        return 0.0;
    }
    match statrs::distribution::FisherSnedecor::new(df1, df2) {
        Ok(d) => d.sf(f),
        Err(_) => f64::NAN,
    }
}

/// Upper tail of the chi-squared distribution.
pub fn chi2_pvalue(x: f64, df: f64) -> f64 {
    match statrs::distribution::ChiSquared::new(df) {
        Ok(d) => d.sf(x),
        Err(_) => f64::NAN,
    }
}

/// Tail probability of a standard normal score.
pub fn normal_pvalue(z: f64, side: Side) -> f64 {
    let normal = Normal::new(0.0, 1.0).expect("standard normal");
    match side {
        Side::Both => (2.0 * normal.sf(z.abs())).min(1.0),
        Side::Greater => normal.sf(z),
        Side::Less => normal.cdf(z),
    }
}

/// Normal approximation of the rank-sum test with tie and continuity
/// correction. `u` is the Mann–Whitney U of group B, `tie_sum` is
/// sum(t^3 - t) over tie groups.
pub fn rank_sum_pvalue(u: f64, sizes: Sizes, tie_sum: f64, side: Side) -> f64 {
    let (na, nb) = (sizes.n_a as f64, sizes.n_b as f64);
    let n = na + nb;
    let mu = na * nb / 2.0;
    let sigma = (na * nb / 12.0 * ((n + 1.0) - tie_sum / (n * (n - 1.0)))).sqrt();
    if sigma <= 0.0 || !sigma.is_finite() {
        return f64::NAN;
    }
    let normal = Normal::new(0.0, 1.0).expect("standard normal");
    match side {
        Side::Both => (2.0 * normal.sf(((u - mu).abs() - 0.5) / sigma)).clamp(0.0, 1.0),
        Side::Greater => normal.sf((u - mu - 0.5) / sigma),
        Side::Less => normal.cdf((u - mu + 0.5) / sigma),
    }
}

/// Mid-ranks (1-based, ties share the mean rank) and sum(t^3 - t) over ties.
pub fn mid_ranks(values: &[f64], order: &mut Vec<usize>, ranks: &mut [f64]) -> f64 {
    order.clear();
    order.extend(0..values.len());
    order.sort_by(|&a, &b| values[a].total_cmp(&values[b]));
    let mut tie_sum = 0.0;
    let mut i = 0;
    while i < order.len() {
        let mut j = i + 1;
        while j < order.len() && values[order[j]] == values[order[i]] {
            j += 1;
        }
        let rank = (i + j + 1) as f64 / 2.0;
        for &k in &order[i..j] {
            ranks[k] = rank;
        }
        let t = (j - i) as f64;
        tie_sum += t * t * t - t;
        i = j;
    }
    tie_sum
}

#[cfg(test)]
mod tests;
