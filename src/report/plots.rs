//! The report's plots, each built from bounded summaries of the run.

use statrs::distribution::{Beta, Continuous, ContinuousCDF, Normal, StudentsT};

use super::collect::{Collected, QqSeries, UnitHistogram, QQ_BIN_WIDTH, VOLCANO_HIT_CAP};
use super::svg::{Axes, LegendMark, Svg};
use crate::stats::relabelled::ModelReference;
use crate::stats::TestKind;

const TITLE_Y: f64 = 22.0;

/// Whole numbers with thousands separators.
pub fn thousands(n: u64) -> String {
    let digits = n.to_string();
    let mut out = String::new();
    for (i, c) in digits.chars().enumerate() {
        if i > 0 && (digits.len() - i).is_multiple_of(3) {
            out.push(',');
        }
        out.push(c);
    }
    out
}

fn minus_log10(p: f64) -> f64 {
    if p > 0.0 {
        -p.log10()
    } else {
        // p = 0 (a model p-value below the smallest f64) is drawn at the top.
        324.0
    }
}

fn histogram_panel(
    svg: &mut Svg,
    axes: &Axes,
    hist: &UnitHistogram,
    class: &str,
    x_label: &str,
    pi0: Option<(f64, &str)>,
) {
    axes.draw(svg, x_label, "density");
    let bins = hist.counts.len();
    let width = 1.0 / bins as f64;
    for (k, &c) in hist.counts.iter().enumerate() {
        let density = if hist.total > 0 {
            c as f64 / (hist.total as f64 * width)
        } else {
            0.0
        };
        let x0 = axes.x(k as f64 * width);
        let x1 = axes.x((k + 1) as f64 * width);
        let y = axes.y(density);
        svg.rect(
            class,
            x0,
            y,
            x1 - x0,
            axes.bottom() - y,
            &format!(r#" data-count="{c}""#),
        );
    }
    if let Some((level, label)) = pi0 {
        let y = axes.y(level);
        svg.line("pi0", axes.left, y, axes.right(), y);
        svg.text("note", axes.right() - 4.0, y - 5.0, "end", label);
    }
}

fn max_density(hist: &UnitHistogram) -> f64 {
    let bins = hist.counts.len() as f64;
    hist.counts
        .iter()
        .map(|&c| c as f64 * bins / hist.total.max(1) as f64)
        .fold(0.0, f64::max)
}

/// Histograms of p_perm and p_param on a density scale, where a uniform
/// null part sits at height pi0.
pub fn p_histograms(c: &Collected, pi0_perm: f64, pi0_param: Option<f64>) -> Svg {
    let mut svg = Svg::new(960.0, 380.0);
    svg.text(
        "title",
        20.0,
        TITLE_Y,
        "start",
        "Distribution of p-values (density; a uniform null part lies at height π0)",
    );
    let top = max_density(&c.p_perm_hist)
        .max(max_density(&c.p_param_hist))
        .max(pi0_perm)
        .max(1.0)
        * 1.08;
    for (panel, (hist, class, label, pi0)) in [
        (
            &c.p_perm_hist,
            "bar",
            "p_perm (permutation)",
            Some((pi0_perm, format!("π0 = {pi0_perm:.3}"))),
        ),
        (
            &c.p_param_hist,
            "bar bar-alt",
            "p_param (model-based)",
            Some(match pi0_param {
                Some(v) => (v, format!("π0 = {v:.3} (from p_param)")),
                None => (pi0_perm, format!("π0 = {pi0_perm:.3} (from p_perm)")),
            }),
        ),
    ]
    .into_iter()
    .enumerate()
    {
        let axes = Axes {
            left: 70.0 + panel as f64 * 470.0,
            top: 50.0,
            width: 400.0,
            height: 270.0,
            x_range: (0.0, 1.0),
            y_range: (0.0, top),
        };
        svg.group(if panel == 0 {
            "p-perm-panel"
        } else {
            "p-param-panel"
        });
        histogram_panel(
            &mut svg,
            &axes,
            hist,
            class,
            label,
            pi0.as_ref().map(|(v, l)| (*v, l.as_str())),
        );
        svg.text(
            "note",
            axes.left,
            axes.top - 6.0,
            "start",
            &format!("{} features", thousands(hist.total)),
        );
        svg.end_group();
    }
    svg
}

/// (expected, observed) -log10 p of a series: the smallest p-values one by
/// one, then one point per fine bin of -log10 p (finer than a pixel).
pub fn qq_points(series: &QqSeries) -> (Vec<(f64, f64)>, usize) {
    let m = series.m as f64;
    let expected = |rank: f64| -(rank / (m + 1.0)).log10();
    let exact = series.smallest_sorted();
    let mut points: Vec<(f64, f64)> = exact
        .iter()
        .enumerate()
        .map(|(i, &p)| (expected(i as f64 + 1.0), minus_log10(p)))
        .collect();
    let exact_count = points.len();
    let mut cumulative = 0u64;
    for (k, &count) in series.bins.iter().enumerate().rev() {
        if count == 0 {
            continue;
        }
        let lo = (cumulative + 1).max(exact_count as u64 + 1);
        let hi = cumulative + count;
        cumulative = hi;
        if lo <= hi {
            let rank = (lo + hi) as f64 / 2.0;
            points.push((expected(rank), (k as f64 + 0.5) * QQ_BIN_WIDTH));
        }
    }
    (points, exact_count)
}

/// Pointwise 95% band of -log10 of the i-th smallest of m uniform
/// p-values: Beta(i, m - i + 1) quantiles, at ranks spaced evenly in log.
pub fn qq_band(m: u64) -> Vec<(f64, f64, f64)> {
    if m == 0 {
        return Vec::new();
    }
    let mut ranks: Vec<u64> = Vec::new();
    let steps = 160;
    for s in 0..=steps {
        let r = (m as f64).powf(s as f64 / steps as f64).round() as u64;
        let r = r.clamp(1, m);
        if ranks.last() != Some(&r) {
            ranks.push(r);
        }
    }
    ranks
        .into_iter()
        .filter_map(|r| {
            let beta = Beta::new(r as f64, (m - r + 1) as f64).ok()?;
            let expected = -(r as f64 / (m as f64 + 1.0)).log10();
            let upper = minus_log10(beta.inverse_cdf(0.025));
            let lower = minus_log10(beta.inverse_cdf(0.975));
            Some((expected, lower, upper))
        })
        .collect()
}

/// QQ plot of -log10 p against the uniform expectation.
pub fn qq(c: &Collected, relabelings: usize) -> Svg {
    let mut svg = Svg::new(720.0, 560.0);
    svg.text(
        "title",
        20.0,
        TITLE_Y,
        "start",
        "QQ plot: observed against expected -log10 p under a uniform null",
    );
    let (perm, perm_exact) = qq_points(&c.qq_perm);
    let (param, param_exact) = qq_points(&c.qq_param);
    let band = qq_band(c.qq_perm.m);
    let x_max = perm.iter().chain(&param).map(|p| p.0).fold(1.0, f64::max) * 1.05;
    let y_max = perm
        .iter()
        .chain(&param)
        .map(|p| p.1)
        .chain(band.iter().map(|b| b.2))
        .fold(1.0, f64::max)
        * 1.05;
    let axes = Axes {
        left: 70.0,
        top: 50.0,
        width: 600.0,
        height: 440.0,
        x_range: (0.0, x_max),
        y_range: (0.0, y_max),
    };
    axes.draw(&mut svg, "expected -log10 p (uniform)", "observed -log10 p");
    if !band.is_empty() {
        let mut outline: Vec<(f64, f64)> = band
            .iter()
            .map(|b| (axes.x(b.0), axes.y(b.2.min(y_max))))
            .collect();
        outline.extend(band.iter().rev().map(|b| (axes.x(b.0), axes.y(b.1))));
        svg.polyline("band", &outline, true);
    }
    let d = x_max.min(y_max);
    svg.line("diagonal", axes.x(0.0), axes.y(0.0), axes.x(d), axes.y(d));
    let floor = ((relabelings + 1) as f64).log10();
    if floor < y_max {
        svg.line(
            "threshold",
            axes.left,
            axes.y(floor),
            axes.right(),
            axes.y(floor),
        );
        svg.text(
            "note",
            axes.left + 6.0,
            axes.y(floor) - 5.0,
            "start",
            &format!("smallest attainable p_perm, 1/(B+1), B = {relabelings}"),
        );
    }
    for (points, exact_count, class) in [
        (&param, param_exact, "qq-param"),
        (&perm, perm_exact, "qq-perm"),
    ] {
        svg.group(if class == "qq-perm" {
            "qq-perm-points"
        } else {
            "qq-param-points"
        });
        let mut last: Option<(f64, f64)> = None;
        for (i, &(e, o)) in points.iter().enumerate() {
            let (x, y) = (axes.x(e), axes.y(o.min(y_max)));
            // Exactly kept points are all drawn; binned ones are thinned
            // to one per pixel of the curve.
            if i >= exact_count {
                if let Some((lx, ly)) = last {
                    if (x - lx).abs() < 0.75 && (y - ly).abs() < 0.75 {
                        continue;
                    }
                }
            }
            last = Some((x, y));
            let r = if class == "qq-perm" { 2.2 } else { 3.0 };
            svg.circle(class, x, y, r);
        }
        svg.end_group();
    }
    svg.legend(
        axes.left + 12.0,
        axes.top + 10.0,
        &[
            (LegendMark::Circle, "qq-perm", "p_perm (filled dots)"),
            (LegendMark::Circle, "qq-param", "p_param (open circles)"),
            (
                LegendMark::Box,
                "band",
                "95% pointwise band, Beta(i, m-i+1)",
            ),
            (LegendMark::Line, "diagonal", "expected = observed"),
        ],
    );
    svg.text(
        "note",
        axes.left,
        axes.bottom() + 56.0,
        "start",
        &format!(
            "m = {} features with p_perm. The smallest {} p-values of each series are drawn one by one,",
            thousands(c.qq_perm.m),
            super::collect::QQ_EXACT,
        ),
    );
    svg.text(
        "note",
        axes.left,
        axes.bottom() + 72.0,
        "start",
        &format!("the rest from bins {QQ_BIN_WIDTH} wide in -log10 p, one point per pixel."),
    );
    svg
}

/// Effect against -log10 p_perm, features passing the FDR level marked.
pub fn volcano(c: &Collected, fdr: f64) -> Svg {
    let mut svg = Svg::new(720.0, 640.0);
    svg.text(
        "title",
        20.0,
        TITLE_Y,
        "start",
        &format!("Effect (B minus A) against -log10 p_perm; q_bh ≤ {fdr} marked"),
    );
    let all = c.hits.iter().chain(&c.others);
    let (mut lo, mut hi, mut top) = (0.0f64, 0.0f64, 1.0f64);
    for p in all {
        lo = lo.min(p.effect);
        hi = hi.max(p.effect);
        top = top.max(minus_log10(p.p));
    }
    let pad = ((hi - lo) * 0.05).max(1e-9);
    let axes = Axes {
        left: 70.0,
        top: 50.0,
        width: 600.0,
        height: 440.0,
        x_range: (lo - pad, hi + pad),
        y_range: (0.0, top * 1.08),
    };
    axes.draw(
        &mut svg,
        "effect (mean of B minus mean of A)",
        "-log10 p_perm",
    );
    svg.line(
        "threshold",
        axes.x(0.0),
        axes.top,
        axes.x(0.0),
        axes.bottom(),
    );
    svg.group("volcano-others");
    for p in &c.others {
        svg.circle(
            "volcano-other",
            axes.x(p.effect),
            axes.y(minus_log10(p.p)),
            2.0,
        );
    }
    svg.end_group();
    svg.group("volcano-hits");
    for p in &c.hits {
        svg.triangle(
            "volcano-hit",
            axes.x(p.effect),
            axes.y(minus_log10(p.p)),
            7.0,
            p.feature.as_deref(),
        );
    }
    svg.end_group();
    let hit_label = format!("q_bh ≤ {fdr} (triangles)");
    svg.legend(
        axes.left,
        axes.bottom() + 84.0,
        &[
            (LegendMark::Triangle, "volcano-hit", hit_label.as_str()),
            (LegendMark::Circle, "volcano-other", "other tested features"),
        ],
    );
    let hits_note = if c.hits_total as usize > c.hits.len() {
        format!(
            "{} of {} features with q_bh ≤ {fdr} drawn (cap {}, smallest p_perm first)",
            thousands(c.hits.len() as u64),
            thousands(c.hits_total),
            thousands(VOLCANO_HIT_CAP as u64)
        )
    } else {
        format!(
            "all {} features with q_bh ≤ {fdr} drawn (cap {})",
            thousands(c.hits_total),
            thousands(VOLCANO_HIT_CAP as u64)
        )
    };
    svg.text("note", axes.left, axes.bottom() + 56.0, "start", &hits_note);
    svg.text(
        "note",
        axes.left,
        axes.bottom() + 72.0,
        "start",
        &format!(
            "{} of {} other tested features drawn (a fixed hash-based sample of feature positions)",
            thousands(c.others.len() as u64),
            thousands(c.others_total)
        ),
    );
    svg
}

/// What a null plot shows of one feature.
pub struct NullPanel<'a> {
    pub feature: &'a str,
    pub test: TestKind,
    pub statistics: &'a [f64],
    pub observed: f64,
    pub reference: ModelReference,
    pub mirror: bool,
    pub exact: bool,
    pub p_perm: f64,
    pub p_param: f64,
    pub q_bh: f64,
}

/// Bins of a null histogram (continuous statistics).
pub const NULL_BINS: usize = 50;

/// Bin edges: `NULL_BINS` equal bins, or for the half-integer U values of
/// rank-sum whole-number widths offset by a quarter so no value sits on an edge.
pub fn null_bins(test: TestKind, lo: f64, hi: f64) -> (f64, f64, usize) {
    if test == TestKind::RankSum {
        let width = ((hi - lo) / 60.0).ceil().max(1.0);
        let start = lo.floor() - 0.25;
        let count = (((hi - start) / width).floor() as usize) + 1;
        (start, width, count)
    } else {
        let width = ((hi - lo) / NULL_BINS as f64).max(1e-12);
        (lo, width, NULL_BINS)
    }
}

pub fn null_plot(panel: &NullPanel) -> Svg {
    let mut svg = Svg::new(720.0, 520.0);
    let finite: Vec<f64> = panel
        .statistics
        .iter()
        .copied()
        .filter(|v| v.is_finite())
        .collect();
    let stat_name = match panel.test {
        TestKind::Welch => "Welch t",
        TestKind::Student => "Student t",
        TestKind::MeanDiff => "pooled-variance t (the difference in means on the t scale)",
        TestKind::RankSum => "Mann–Whitney U of group B",
        TestKind::Anova => "one-way F",
        TestKind::Kruskal => "Kruskal–Wallis H",
        TestKind::PairedT => "paired t",
        TestKind::SignedRank => "W+ (sum of positive ranks)",
        TestKind::Pearson => "Pearson r",
        TestKind::Spearman => "Spearman rho",
    };
    svg.text(
        "title",
        20.0,
        TITLE_Y,
        "start",
        &format!(
            "{}: {} under {} relabelings",
            panel.feature,
            stat_name,
            finite.len()
        ),
    );
    let mut lo = panel.observed.min(if panel.mirror {
        -panel.observed
    } else {
        panel.observed
    });
    let mut hi = panel.observed.max(if panel.mirror {
        -panel.observed
    } else {
        panel.observed
    });
    if panel.test == TestKind::RankSum && panel.mirror {
        if let ModelReference::Normal { mean, .. } = panel.reference {
            lo = lo.min(2.0 * mean - panel.observed);
            hi = hi.max(2.0 * mean - panel.observed);
        }
    }
    for &v in &finite {
        lo = lo.min(v);
        hi = hi.max(v);
    }
    let span = (hi - lo).max(1e-9);
    let (lo, hi) = (lo - 0.05 * span, hi + 0.05 * span);
    let (start, width, bins) = null_bins(panel.test, lo, hi);
    let mut counts = vec![0u64; bins];
    for &v in &finite {
        let k = (((v - start) / width).floor().max(0.0) as usize).min(bins - 1);
        counts[k] += 1;
    }
    let total = finite.len().max(1) as f64;
    let densities: Vec<f64> = counts.iter().map(|&c| c as f64 / (total * width)).collect();
    let x_range = (start.min(lo), (start + width * bins as f64).max(hi));
    let density = |x: f64| match panel.reference {
        ModelReference::StudentT { df } => StudentsT::new(0.0, 1.0, df)
            .map(|d| d.pdf(x))
            .unwrap_or(f64::NAN),
        ModelReference::Normal { mean, sd } => {
            Normal::new(mean, sd).map(|d| d.pdf(x)).unwrap_or(f64::NAN)
        }
        ModelReference::FisherF { df1, df2 } if x > 0.0 => {
            statrs::distribution::FisherSnedecor::new(df1, df2)
                .map(|d| d.pdf(x))
                .unwrap_or(f64::NAN)
        }
        ModelReference::ChiSquared { df } if x > 0.0 => statrs::distribution::ChiSquared::new(df)
            .map(|d| d.pdf(x))
            .unwrap_or(f64::NAN),
        ModelReference::Correlation { n } if x.abs() < 1.0 => {
            (1.0 - x * x).powf((n - 4.0) / 2.0) / statrs::function::beta::beta(0.5, (n - 2.0) / 2.0)
        }
        _ => f64::NAN,
    };
    let curve: Vec<(f64, f64)> = (0..=200)
        .map(|i| {
            let x = x_range.0 + (x_range.1 - x_range.0) * i as f64 / 200.0;
            (x, density(x))
        })
        .filter(|p| p.1.is_finite())
        .collect();
    let top = densities
        .iter()
        .copied()
        .chain(curve.iter().map(|p| p.1))
        .fold(0.0, f64::max)
        .max(1e-12)
        * 1.12;
    let axes = Axes {
        left: 70.0,
        top: 50.0,
        width: 600.0,
        height: 300.0,
        x_range,
        y_range: (0.0, top),
    };
    axes.draw(&mut svg, stat_name, "density");
    svg.group("null-bars");
    for (k, (&c, &d)) in counts.iter().zip(&densities).enumerate() {
        let x0 = axes.x(start + k as f64 * width);
        let x1 = axes.x(start + (k + 1) as f64 * width);
        let y = axes.y(d);
        svg.rect(
            "bar",
            x0,
            y,
            x1 - x0,
            axes.bottom() - y,
            &format!(r#" data-count="{c}""#),
        );
    }
    svg.end_group();
    let line: Vec<(f64, f64)> = curve.iter().map(|&(x, y)| (axes.x(x), axes.y(y))).collect();
    svg.polyline("ref-density", &line, false);
    let mark = |svg: &mut Svg, value: f64, class: &str| {
        let x = axes.x(value);
        svg.line(class, x, axes.top, x, axes.bottom());
    };
    mark(&mut svg, panel.observed, "observed");
    if panel.mirror {
        let mirrored = match panel.reference {
            ModelReference::Normal { mean, .. } => 2.0 * mean - panel.observed,
            _ => -panel.observed,
        };
        mark(&mut svg, mirrored, "observed-mirror");
    }
    let reference = match panel.reference {
        ModelReference::StudentT { df } => format!("model: Student t, df {df:.2}"),
        ModelReference::Normal { mean, sd } => {
            format!("model: normal approximation N({mean:.1}, sd {sd:.2})")
        }
        ModelReference::FisherF { df1, df2 } => format!("model: F({df1:.0}, {df2:.0})"),
        ModelReference::ChiSquared { df } => format!("model: chi-squared, df {df:.0}"),
        ModelReference::Correlation { n } => format!("model: null density of r, n = {n:.0}"),
    };
    let relabel_label = format!(
        "{} relabelings{}",
        finite.len(),
        if panel.exact { " (all of them)" } else { "" }
    );
    let observed_label = format!("observed {:.4}", panel.observed);
    let mut rows = vec![
        (LegendMark::Box, "bar", relabel_label.as_str()),
        (LegendMark::Line, "ref-density", reference.as_str()),
        (LegendMark::Line, "observed", observed_label.as_str()),
    ];
    if panel.mirror {
        rows.push((
            LegendMark::Line,
            "observed-mirror",
            "mirror image (both sides count)",
        ));
    }
    svg.legend(axes.left, axes.bottom() + 84.0, &rows);
    let fmt = |v: f64| {
        if v.is_nan() {
            "NA".to_string()
        } else {
            format!("{v:.4e}")
        }
    };
    svg.text(
        "note",
        axes.left,
        axes.bottom() + 56.0,
        "start",
        &format!(
            "p_perm {}   p_param {}   q_bh {}",
            fmt(panel.p_perm),
            fmt(panel.p_param),
            fmt(panel.q_bh)
        ),
    );
    svg.text(
        "note",
        axes.left,
        axes.bottom() + 72.0,
        "start",
        "Recomputed from the input matrix with the relabelings redrawn from the recorded seed.",
    );
    svg
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn band_matches_closed_forms_of_the_extreme_order_statistics() {
        // The smallest of m uniforms is Beta(1, m) with CDF 1 - (1 - x)^m and
        // the largest is Beta(m, 1) with CDF x^m (common practice, no single
        // source), so their quantiles have closed forms; for m = 10^6 these
        // agree with scipy.stats.beta.ppf (7.5965739 and 5.4331063 for i = 1).
        // statrs' inverse is good to about 1e-4 relative in p there, far
        // below a pixel (about 0.01 in -log10 p), hence the tolerance.
        for m in [10u64, 1_000, 1_000_000] {
            let band = qq_band(m);
            let first = band.first().unwrap();
            let q = |level: f64| -((1.0 - level).ln() / m as f64).exp_m1();
            assert!((first.2 - -q(0.025).log10()).abs() < 1e-3, "{m} {first:?}");
            assert!((first.1 - -q(0.975).log10()).abs() < 1e-3, "{m} {first:?}");
            let last = band.last().unwrap();
            let q = |level: f64| level.powf(1.0 / m as f64);
            assert!((last.2 - -q(0.025).log10()).abs() < 1e-6, "{m} {last:?}");
            assert!((last.1 - -q(0.975).log10()).abs() < 1e-6, "{m} {last:?}");
        }
        let band = qq_band(1_000_000);
        assert!((band[0].2 - 7.596_573_9).abs() < 1e-3 && (band[0].1 - 5.433_106_3).abs() < 1e-3);
    }

    #[test]
    fn rank_sum_bins_keep_half_integers_off_the_edges() {
        let (start, width, count) = null_bins(TestKind::RankSum, 3.2, 40.7);
        assert_eq!(width, 1.0);
        for k in 0..=80 {
            let u = 3.5 + k as f64 * 0.5;
            if u > 40.7 {
                break;
            }
            let pos = (u - start) / width;
            assert!((pos - pos.round()).abs() > 0.2, "{u} sits on an edge");
            assert!((pos as usize) < count);
        }
    }
}
