//! Westfall–Young maxT (Westfall & Young 1993, "Resampling-based multiple
//! testing", Wiley) against a brute-force computation that holds every
//! relabelled statistic in memory, and its family-wise error under the null.

mod common;

use common::{options, scan_rows, Table, TestRng};
use riffle::design::Relabelings;
use riffle::stats::TestKind;
use statrs::distribution::{Binomial, DiscreteCDF};

/// Welch t from the textbook formula on raw values, B minus A.
fn welch(x: &[f64], labels: &[u8]) -> f64 {
    let group = |g: u8| -> Vec<f64> {
        x.iter()
            .zip(labels)
            .filter(|(_, &l)| l == g)
            .map(|(v, _)| *v)
            .collect()
    };
    let (a, b) = (group(0), group(1));
    let mean = |v: &[f64]| v.iter().sum::<f64>() / v.len() as f64;
    let var = |v: &[f64]| {
        let m = mean(v);
        v.iter().map(|x| (x - m) * (x - m)).sum::<f64>() / (v.len() as f64 - 1.0)
    };
    (mean(&b) - mean(&a)) / (var(&a) / a.len() as f64 + var(&b) / b.len() as f64).sqrt()
}

const TOL: f64 = 1e-9;

/// Correlated blocks of 10 features (shared factor, loading 0.8), a few
/// strong effects, duplicated rows and discrete rows (exact ties).
fn study(rng: &mut TestRng, features: usize, labels: &[u8], effects: bool) -> Vec<Vec<f64>> {
    let n = labels.len();
    let mut rows = Vec::new();
    let mut factor = vec![0.0; n];
    for f in 0..features {
        if f % 10 == 0 {
            factor = (0..n).map(|_| rng.normal()).collect();
        }
        let shift = if effects && f % 37 == 5 { 1.5 } else { 0.0 };
        rows.push(
            (0..n)
                .map(|i| 0.8 * factor[i] + 0.6 * rng.normal() + shift * f64::from(labels[i]))
                .collect::<Vec<f64>>(),
        );
    }
    rows
}

#[test]
fn maxt_equals_brute_force_including_ties() {
    let labels: Vec<u8> = (0..30).map(|i| u8::from(i % 2 == 0)).collect();
    let mut rng = TestRng::new(31);
    let mut rows = study(&mut rng, 300, &labels, true);
    // Exact ties: duplicated features and coarse discrete values.
    rows[7] = rows[3].clone();
    rows[150] = rows[5].clone();
    for f in (200..300).step_by(9) {
        rows[f] = rows[f].iter().map(|v| (v * 2.0).round()).collect();
    }
    let (perms, seed) = (500, 77);
    let dir = tempfile::tempdir().unwrap();
    let mut o = options(dir.path());
    o.test = TestKind::Welch;
    o.perms = perms;
    o.seed = seed;
    o.chunk_rows = Some(41);
    let summary = scan_rows(&rows, &labels, &o);
    let table = Table::read(&summary.results_path);
    let (p_maxt, p_single) = (table.f64s("p_maxt"), table.f64s("p_maxt_single"));

    // Brute force over the same relabelings, all statistics in memory.
    let relabel = Relabelings::draw(&labels, perms, seed);
    let big_b = relabel.count;
    let observed: Vec<f64> = rows.iter().map(|x| welch(x, &labels).abs()).collect();
    let null: Vec<Vec<f64>> = rows
        .iter()
        .map(|x| (0..big_b).map(|b| welch(x, relabel.row(b)).abs()).collect())
        .collect();
    let m = rows.len();
    let column_max: Vec<f64> = (0..big_b)
        .map(|b| null.iter().map(|t| t[b]).fold(f64::NEG_INFINITY, f64::max))
        .collect();
    let denominator = (big_b + 1) as f64;
    let mut p_tilde = vec![0.0; m];
    for j in 0..m {
        let single = column_max
            .iter()
            .filter(|&&c| c >= observed[j] * (1.0 - TOL))
            .count();
        assert!(
            (p_single[j] - (single + 1) as f64 / denominator).abs() < 1e-15,
            "single-step, feature {j}: riffle {} brute force {}",
            p_single[j],
            (single + 1) as f64 / denominator
        );
        // Successive maxima: relabelled statistics of every feature that is
        // no more extreme than j.
        let reached = (0..big_b)
            .filter(|&b| {
                (0..m)
                    .filter(|&k| observed[k] <= observed[j] * (1.0 + TOL))
                    .any(|k| null[k][b] >= observed[j] * (1.0 - TOL))
            })
            .count();
        p_tilde[j] = (reached + 1) as f64 / denominator;
    }
    for j in 0..m {
        // Step-down monotonicity: no smaller than any more extreme feature's.
        let expected = (0..m)
            .filter(|&k| observed[k] >= observed[j] * (1.0 - TOL))
            .map(|k| p_tilde[k])
            .fold(0.0, f64::max);
        assert!(
            (p_maxt[j] - expected).abs() < 1e-15,
            "step-down, feature {j}: riffle {} brute force {expected}",
            p_maxt[j]
        );
    }
    assert_eq!(p_maxt[3], p_maxt[7]);
    // The check has teeth: step-down differs from single-step somewhere.
    assert!((0..m).any(|j| p_maxt[j] < p_single[j]));
}

#[test]
fn step_down_is_below_single_step_and_both_monotone() {
    let labels: Vec<u8> = (0..24).map(|i| u8::from(i < 12)).collect();
    let mut rng = TestRng::new(5);
    let rows = study(&mut rng, 400, &labels, true);
    let dir = tempfile::tempdir().unwrap();
    let mut o = options(dir.path());
    o.perms = 999;
    let summary = scan_rows(&rows, &labels, &o);
    let table = Table::read(&summary.results_path);
    let (p_maxt, p_single) = (table.f64s("p_maxt"), table.f64s("p_maxt_single"));
    let t = table.f64s("statistic");
    let mut order: Vec<usize> = (0..rows.len()).collect();
    order.sort_by(|&a, &b| t[a].abs().total_cmp(&t[b].abs()));
    for w in order.windows(2) {
        assert!(p_maxt[w[1]] <= p_maxt[w[0]], "step-down not monotone");
        assert!(p_single[w[1]] <= p_single[w[0]], "single-step not monotone");
    }
    for j in 0..rows.len() {
        assert!(p_maxt[j] <= p_single[j], "feature {j}");
    }
    assert!(summary.fwer_hits_05 > 0);
}

/// Under the global null the chance that any feature has p_maxt <= 0.05 is
/// 0.05 (exactly, for B = 199: 10 of 200 equally likely ranks); over 400
/// independent studies the count must lie in its binomial 99% interval.
#[test]
fn family_wise_error_is_calibrated_under_the_global_null() {
    let labels: Vec<u8> = (0..20).map(|i| u8::from(i >= 10)).collect();
    let mut rng = TestRng::new(400);
    let studies = 400;
    let mut any = 0u64;
    for s in 0..studies {
        let rows = study(&mut rng, 200, &labels, false);
        let dir = tempfile::tempdir().unwrap();
        let mut o = options(dir.path());
        o.test = TestKind::Student;
        o.perms = 199;
        o.seed = 1000 + s;
        o.threads = 1;
        let summary = scan_rows(&rows, &labels, &o);
        if summary.fwer_hits_05 > 0 {
            any += 1;
        }
    }
    let binomial = Binomial::new(0.05, studies).unwrap();
    let (low, high) = (binomial.inverse_cdf(0.005), binomial.inverse_cdf(0.995));
    assert!(
        (low..=high).contains(&any),
        "{any} of {studies} null studies had a family-wise hit; expected [{low}, {high}]"
    );
}

/// Pooled-null FDR (Storey & Tibshirani 2003, PNAS 100: the null pooled over
/// all features and relabelings): p_pooled lies between the exact pooled
/// p-values at the observed statistic widened by the histogram's documented
/// resolution (2^-10 relative), and q_pooled is Storey's q-value of p_pooled
/// (pi0 at lambda = 0.5), recomputed here in memory.
#[test]
fn pooled_null_fdr_matches_brute_force_within_bin_resolution() {
    let labels: Vec<u8> = (0..30).map(|i| u8::from(i % 2 == 0)).collect();
    let mut rng = TestRng::new(32);
    let rows = study(&mut rng, 300, &labels, true);
    let (perms, seed) = (500, 78);
    let dir = tempfile::tempdir().unwrap();
    let mut o = options(dir.path());
    o.perms = perms;
    o.seed = seed;
    o.pooled_null = true;
    o.chunk_rows = Some(64);
    let summary = scan_rows(&rows, &labels, &o);
    let table = Table::read(&summary.results_path);
    let (p_pooled, q_pooled) = (table.f64s("p_pooled"), table.f64s("q_pooled"));

    let relabel = Relabelings::draw(&labels, perms, seed);
    let observed: Vec<f64> = rows.iter().map(|x| welch(x, &labels).abs()).collect();
    let mut null: Vec<f64> = rows
        .iter()
        .flat_map(|x| (0..relabel.count).map(|b| welch(x, relabel.row(b)).abs()))
        .collect();
    null.sort_by(|a, b| a.total_cmp(b));
    let total = null.len() as f64;
    let at_or_above = |t: f64| (null.len() - null.partition_point(|&v| v < t)) as f64;
    let resolution = 2f64.powi(-9);
    for j in 0..rows.len() {
        let low = (at_or_above(observed[j] * (1.0 + resolution)) + 1.0) / (total + 1.0);
        let high = (at_or_above(observed[j] * (1.0 - resolution)) + 1.0) / (total + 1.0);
        assert!(
            low <= p_pooled[j] && p_pooled[j] <= high,
            "feature {j}: p_pooled {} outside [{low}, {high}]",
            p_pooled[j]
        );
    }
    // Storey q-values of p_pooled (Storey 2002, JRSS-B 64), in memory.
    let m = rows.len();
    let pi0 = (p_pooled.iter().filter(|&&p| p > 0.5).count() as f64 / (0.5 * m as f64)).min(1.0);
    let mut order: Vec<usize> = (0..m).collect();
    order.sort_by(|&a, &b| p_pooled[a].total_cmp(&p_pooled[b]));
    let mut expected = vec![0.0; m];
    let mut running = f64::INFINITY;
    for rank in (0..m).rev() {
        let j = order[rank];
        // Tied p-values share the largest rank of their block.
        let last = order
            .iter()
            .rposition(|&k| p_pooled[k] == p_pooled[j])
            .unwrap();
        running = running.min((pi0 * m as f64 * p_pooled[j] / (last + 1) as f64).min(1.0));
        expected[j] = running;
    }
    for j in 0..m {
        assert!((q_pooled[j] - expected[j]).abs() < 1e-12, "feature {j}");
    }
}
