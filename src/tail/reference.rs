//! The scale on which tails are fitted: x = -ln P_ref(S >= s), the upper
//! tail of the test's own textbook reference distribution at a kernel
//! statistic s. The map is monotone in s (the same for every relabelling of
//! a feature), so exceedance order and counts are unchanged; what changes
//! is the shape of the tail. Where the reference distribution describes
//! the permutation null well, x is close to a standard exponential over the
//! whole range (the probability integral transform), so the GPD fitted to
//! its excesses has a shape near 0 and the extrapolation rests on one scale
//! parameter (see `tail_pvalue`'s likelihood-ratio step). Where it does not
//! (heavy tails, outliers), the fitted shape and scale absorb the
//! difference, as they would on any other monotone scale.
//!
//! The map uses the same distributions as the model-based p-values
//! (`crate::stats`), one-sided on the oriented kernel statistic: the
//! two-sided factor 2 only shifts x, which cancels in every excess.

use statrs::distribution::{ChiSquared, ContinuousCDF, FisherSnedecor, Normal, StudentsT};

use crate::stats::prepare::TestSpec;
use crate::stats::{student_t, TestKind};

/// The fixed reference distribution of one test.
#[derive(Debug, Clone)]
pub struct Reference {
    map: Map,
}

#[derive(Debug, Clone)]
enum Map {
    /// Pooled t from the group-B sum of a standardized row.
    StudentFromSum {
        dist: StudentsT,
        sizes: crate::stats::Sizes,
    },
    /// The kernel statistic is already a t (Welch, linear model).
    T(StudentsT),
    /// Correlation: r = S / (n - 1), t = r sqrt((n - 2) / (1 - r^2)).
    CorrelationT { dist: StudentsT, n: f64 },
    /// Paired t from the sum of sign-flipped differences.
    PairedT { dist: StudentsT, m: f64 },
    /// The kernel statistic divided by its permutation standard deviation
    /// is close to a standard normal score (rank sum, signed rank).
    Normal { dist: Normal, sd: f64 },
    /// One-way F from the between-group sum of squares.
    F {
        dist: FisherSnedecor,
        k: f64,
        n: f64,
    },
    /// Kruskal–Wallis H (equal to the kernel statistic) against chi^2.
    ChiSquared(ChiSquared),
}

impl Reference {
    /// `None` for a test without a usable reference (then the caller keeps
    /// the counted p-value).
    pub fn for_spec(spec: &TestSpec) -> Option<Self> {
        let n = spec.units() as f64;
        let t = |df: f64| StudentsT::new(0.0, 1.0, df).ok();
        let map = if let Some(model) = &spec.model {
            Map::T(t(model.df)?)
        } else {
            match spec.test {
                TestKind::Student | TestKind::MeanDiff => Map::StudentFromSum {
                    dist: t(n - 2.0)?,
                    sizes: spec.sizes,
                },
                // Welch's df changes with the relabelling; a map must not,
                // so the pooled df stands in (any fixed monotone map keeps
                // the counts; this one is close to the Welch reference).
                TestKind::Welch => Map::T(t(n - 2.0)?),
                TestKind::Pearson | TestKind::Spearman => Map::CorrelationT {
                    dist: t(n - 2.0)?,
                    n,
                },
                TestKind::PairedT => Map::PairedT {
                    dist: t(n - 1.0)?,
                    m: n,
                },
                // Sum of +-z over units with sum of squares n - 1: variance
                // n - 1 under sign flips.
                TestKind::SignedRank => Map::Normal {
                    dist: Normal::new(0.0, 1.0).ok()?,
                    sd: (n - 1.0).sqrt(),
                },
                // Group-B sum of n_b of n values drawn without replacement
                // from scores with mean 0 and sum of squares n - 1:
                // variance n_a n_b / n (sampling without replacement;
                // common practice, no single source).
                TestKind::RankSum => Map::Normal {
                    dist: Normal::new(0.0, 1.0).ok()?,
                    sd: (spec.sizes.n_a as f64 * spec.sizes.n_b as f64 / n).sqrt(),
                },
                TestKind::Anova => {
                    let k = spec.group_sizes.len() as f64;
                    Map::F {
                        dist: FisherSnedecor::new(k - 1.0, n - k).ok()?,
                        k,
                        n,
                    }
                }
                TestKind::Kruskal => {
                    Map::ChiSquared(ChiSquared::new(spec.group_sizes.len() as f64 - 1.0).ok()?)
                }
            }
        };
        Some(Reference { map })
    }

    /// x = -ln P_ref(upper tail at the oriented kernel statistic `s`).
    /// +inf where the reference tail underflows.
    pub fn score(&self, s: f64) -> f64 {
        let sf = match &self.map {
            Map::StudentFromSum { dist, sizes } => dist.sf(student_t(s, *sizes)),
            Map::T(dist) => dist.sf(s),
            Map::CorrelationT { dist, n } => {
                let r = (s / (n - 1.0)).clamp(-1.0, 1.0);
                dist.sf(r * ((n - 2.0) / (1.0 - r * r)).sqrt())
            }
            Map::PairedT { dist, m } => {
                let variance = (((m - 1.0) - s * s / m) / (m - 1.0)).max(0.0);
                dist.sf((s / m) / (variance / m).sqrt())
            }
            Map::Normal { dist, sd } => dist.sf(s / sd),
            Map::F { dist, k, n } => {
                let f = (s / (k - 1.0)) / (((n - 1.0) - s).max(0.0) / (n - k));
                dist.sf(f)
            }
            Map::ChiSquared(dist) => dist.sf(s),
        };
        -sf.ln()
    }
}
