//! Checks of the model-based statistics against published values.

use super::prepare::{PrepScratch, Status, TestSpec};
use super::*;

/// Student (1908), "The probable error of a mean", Biometrika 6: extra
/// hours of sleep under two drugs, the classic two-sample example.
/// Reference values computed with scipy.stats (ttest_ind with and without
/// equal_var, mannwhitneyu with continuity correction), as listed in the
/// project's design notes.
const SLEEP_A: [f64; 10] = [0.7, -1.6, -0.2, -1.2, -0.1, 3.4, 3.7, 0.8, 0.0, 2.0];
const SLEEP_B: [f64; 10] = [1.9, 0.8, 1.1, 0.1, -0.1, 4.4, 5.5, 1.6, 4.6, 3.4];

fn sleep_prepared(test: TestKind, side: Side) -> prepare::Prepared {
    // A is group 0, B group 1: statistics are A minus B here to match the
    // published sign, so put drug A in group B.
    let raw: Vec<f64> = SLEEP_B.iter().chain(SLEEP_A.iter()).copied().collect();
    let labels: Vec<u8> = (0..20).map(|i| u8::from(i >= 10)).collect();
    let spec = TestSpec::two_group(test, side, Sizes { n_a: 10, n_b: 10 });
    let mut z = vec![0.0; 20];
    spec.prepare(&raw, &labels, &mut z, &mut PrepScratch::default())
}

#[test]
fn sleep_welch_matches_published() {
    let p = sleep_prepared(TestKind::Welch, Side::Both);
    assert_eq!(p.status, Status::Tested);
    assert!((p.statistic - -1.8608).abs() < 1e-4, "{}", p.statistic);
    assert!((p.p_param - 0.07939).abs() < 1e-4, "{}", p.p_param);
}

#[test]
fn sleep_student_matches_published() {
    let p = sleep_prepared(TestKind::Student, Side::Both);
    assert!((p.statistic - -1.8608).abs() < 1e-4, "{}", p.statistic);
    assert!((p.p_param - 0.07919).abs() < 1e-4, "{}", p.p_param);
    let less = sleep_prepared(TestKind::Student, Side::Less);
    assert!(
        (less.p_param - 0.07919 / 2.0).abs() < 1e-4,
        "{}",
        less.p_param
    );
}

#[test]
fn sleep_rank_sum_matches_published() {
    let p = sleep_prepared(TestKind::RankSum, Side::Both);
    assert!((p.statistic - 25.5).abs() < 1e-12, "{}", p.statistic);
    assert!((p.p_param - 0.06933).abs() < 1e-4, "{}", p.p_param);
}

#[test]
fn mid_ranks_share_ties() {
    let mut order = Vec::new();
    let mut ranks = vec![0.0; 5];
    let ties = mid_ranks(&[3.0, 1.0, 3.0, 2.0, 3.0], &mut order, &mut ranks);
    assert_eq!(ranks, vec![4.0, 1.0, 4.0, 2.0, 4.0]);
    assert_eq!(ties, 24.0);
}
