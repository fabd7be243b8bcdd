//! The GEMM kernel's exceedance counts against brute force written here,
//! in f64, one relabelling at a time, on shapes that cross tile borders:
//! more features than one row tile (64) with a partial last tile, and more
//! relabelings than one column tile (512) with a partial last one. Welch t
//! follows each row with its squared row in one multiply, so the partial
//! tiles are where a layout slip would show.
//!
//! Reference formulas: Welch t = (mean_B - mean_A) / sqrt(s_A^2/n_A +
//! s_B^2/n_B) (Welch 1947, Biometrika 34), Student t with the pooled
//! variance (Student 1908, Biometrika 6); a statistic within a relative
//! 1e-10 of the observed one counts as reaching it (riffle's documented tie
//! rule, DEVELOPERS.md "Kernel notes").

use riffle::design::Relabelings;
use riffle::kernel::{Kernel, KernelScratch};
use riffle::stats::prepare::TestSpec;
use riffle::stats::{Side, Sizes, TestKind};

fn splitmix(state: &mut u64) -> f64 {
    *state = state.wrapping_add(0x9E37_79B9_7F4A_7C15);
    let mut x = *state;
    x = (x ^ (x >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    x = (x ^ (x >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    x ^= x >> 31;
    (x >> 11) as f64 / (1u64 << 53) as f64
}

fn t_statistic(test: TestKind, row: &[f64], classes: &[u8]) -> f64 {
    let group = |c: u8| -> Vec<f64> {
        row.iter()
            .zip(classes)
            .filter(|(_, &k)| k == c)
            .map(|(&v, _)| v)
            .collect()
    };
    let (a, b) = (group(0), group(1));
    let mean = |x: &[f64]| x.iter().sum::<f64>() / x.len() as f64;
    let ss = |x: &[f64]| {
        let m = mean(x);
        x.iter().map(|v| (v - m) * (v - m)).sum::<f64>()
    };
    let (na, nb) = (a.len() as f64, b.len() as f64);
    let diff = mean(&b) - mean(&a);
    match test {
        TestKind::Welch => diff / (ss(&a) / (na - 1.0) / na + ss(&b) / (nb - 1.0) / nb).sqrt(),
        TestKind::Student => {
            let pooled = (ss(&a) + ss(&b)) / (na + nb - 2.0);
            diff / (pooled * (1.0 / na + 1.0 / nb)).sqrt()
        }
        _ => unreachable!(),
    }
}

#[test]
fn counts_equal_brute_force_across_partial_tiles() {
    let (n_a, n_b) = (7, 6);
    let n = n_a + n_b;
    let features = 150; // two full row tiles of 64 and one of 22
    let perms = 700; // one full column tile of 512 and one of 188
    let labels: Vec<u8> = (0..n).map(|i| u8::from(i >= n_a)).collect();
    let mut state = 11u64;
    let raw: Vec<f64> = (0..features * n)
        .map(|k| {
            let shift = if (k / n) % 5 == 0 && labels[k % n] == 1 {
                1.0
            } else {
                0.0
            };
            splitmix(&mut state) + splitmix(&mut state) + shift
        })
        .collect();
    for test in [TestKind::Welch, TestKind::Student] {
        for side in [Side::Both, Side::Greater] {
            let relabel = Relabelings::draw(&labels, perms, 3);
            assert!(!relabel.exact);
            let rows: Vec<Vec<u8>> = (0..relabel.count)
                .map(|b| relabel.row(b).to_vec())
                .collect();
            let spec = TestSpec::two_group(test, side, Sizes { n_a, n_b });
            let kernel = Kernel::new(spec, labels.clone(), relabel);
            let orient = |t: f64| if side == Side::Both { t.abs() } else { t };
            let expected: Vec<u64> = raw
                .chunks(n)
                .map(|row| {
                    let observed = orient(t_statistic(test, row, &labels));
                    let reach = observed - 1e-10 * (1.0 + observed.abs());
                    rows.iter()
                        .filter(|classes| orient(t_statistic(test, row, classes)) >= reach)
                        .count() as u64
                })
                .collect();
            // All features in one chunk, and in chunks of 37 rows.
            for chunk in [features, 37] {
                let mut scratch = KernelScratch::default();
                let mut got = Vec::new();
                for start in (0..features).step_by(chunk) {
                    let rows_here = chunk.min(features - start);
                    let out = kernel.run_chunk(
                        &raw[start * n..(start + rows_here) * n],
                        rows_here,
                        true,
                        &mut scratch,
                    );
                    got.extend(out.features.iter().map(|f| f.exceed));
                }
                assert_eq!(got, expected, "{test:?} {side:?}, chunks of {chunk}");
            }
        }
    }
}

/// The step-down rank-order pass over a column range that starts inside a
/// 16-column panel of the packed weights (as the second worker's range
/// does: B * w / workers) and spans a partial column tile: per row, the
/// relabelings at least as extreme as it (`exceed`) and those whose running
/// maximum over it and all weaker rows reaches it (`reached`), against
/// brute force in f64 here. The t statistics are monotone maps of the
/// kernel statistics, the same map for every feature of a test (standardized
/// rows: fixed total sum of squares), so counts and running maxima compare.
/// The same pass on the general GEMM (`matrixmultiply`) must give the same
/// counts and the same f64 maxima bit for bit, and so must the pass fed in
/// pieces of 30 rows (as the rank pass feeds it; the running maxima and
/// their sorted copy carry over from piece to piece).
#[test]
fn rank_pass_over_a_range_inside_a_panel_equals_brute_force() {
    use riffle::kernel::RankState;
    let (n_a, n_b) = (9, 8);
    let n = n_a + n_b; // 17: not a multiple of 8 or 16
    let features = 101;
    let perms = 700;
    let labels: Vec<u8> = (0..n).map(|i| u8::from(i >= n_a)).collect();
    let mut state = 5u64;
    let raw: Vec<f64> = (0..features * n)
        .map(|k| {
            let shift = if (k / n) % 4 == 0 && labels[k % n] == 1 {
                0.8
            } else {
                0.0
            };
            splitmix(&mut state) + shift
        })
        .collect();
    let (col0, cols) = (37, 600); // 37 = 2 * 16 + 5; 600 = 512 + 88
    for test in [TestKind::Student, TestKind::Welch] {
        for side in [Side::Both, Side::Less] {
            let relabel = Relabelings::draw(&labels, perms, 9);
            let classes: Vec<Vec<u8>> = (0..relabel.count)
                .map(|b| relabel.row(b).to_vec())
                .collect();
            let spec = TestSpec::two_group(test, side, Sizes { n_a, n_b });
            let orient = |t: f64| match side {
                Side::Both => t.abs(),
                Side::Greater => t,
                Side::Less => -t,
            };
            let mut results = Vec::new();
            for (general, piece) in [(false, features), (true, features), (false, 30)] {
                let mut kernel = Kernel::new(spec.clone(), labels.clone(), relabel.clone());
                if general {
                    kernel = kernel.with_general_multiply();
                }
                let mut scratch = KernelScratch::default();
                let prepared = kernel.run_chunk(&raw, features, false, &mut scratch);
                // Rows in ascending order of their observed statistic.
                let mut order: Vec<usize> = (0..features).collect();
                let obs_of = |k: usize| prepared.features[k].prepared.kernel_obs;
                order.sort_by(|&x, &y| obs_of(x).total_cmp(&obs_of(y)));
                let standardized: Vec<f64> = order
                    .iter()
                    .flat_map(|&k| prepared.standardized[k * n..(k + 1) * n].to_vec())
                    .collect();
                let obs: Vec<f64> = order.iter().map(|&k| obs_of(k)).collect();
                let mut rank = RankState::new(col0, cols, false);
                let (mut exceed, mut reached) = (vec![0u64; features], vec![0u64; features]);
                for start in (0..features).step_by(piece) {
                    let end = (start + piece).min(features);
                    kernel.rank_rows(
                        &standardized[start * n..end * n],
                        &obs[start..end],
                        &mut rank,
                        &mut exceed[start..end],
                        &mut reached[start..end],
                        &mut scratch,
                    );
                }
                results.push((order, exceed, reached, rank.maxima.clone()));
            }
            let (order, exceed, reached, maxima) = &results[0];
            assert_eq!(&results[1].1, exceed, "{test:?} {side:?}: general GEMM");
            assert_eq!(&results[1].2, reached, "{test:?} {side:?}: general GEMM");
            let bits = |m: &[f64]| m.iter().map(|v| v.to_bits()).collect::<Vec<_>>();
            assert_eq!(bits(&results[1].3), bits(maxima), "{test:?} {side:?}");
            assert_eq!(&results[2].1, exceed, "{test:?} {side:?}: in pieces");
            assert_eq!(&results[2].2, reached, "{test:?} {side:?}: in pieces");
            assert_eq!(bits(&results[2].3), bits(maxima), "{test:?} {side:?}");
            // Brute force in f64, rows in the same order.
            let mut running = vec![f64::NEG_INFINITY; cols];
            for (pos, &k) in order.iter().enumerate() {
                let row = &raw[k * n..(k + 1) * n];
                let observed = orient(t_statistic(test, row, &labels));
                let reach = observed - 1e-10 * (1.0 + observed.abs());
                let mut want_exceed = 0;
                for (j, m) in running.iter_mut().enumerate() {
                    let t = orient(t_statistic(test, row, &classes[col0 + j]));
                    want_exceed += u64::from(t >= reach);
                    *m = m.max(t);
                }
                let want_reached = running.iter().filter(|&&m| m >= reach).count() as u64;
                assert_eq!(exceed[pos], want_exceed, "{test:?} {side:?} row {pos}");
                assert_eq!(reached[pos], want_reached, "{test:?} {side:?} row {pos}");
            }
        }
    }
}

/// The f64 statistic behind every recheck (`kernel_stat_with`) sums class
/// 1's values (and squares, for Welch) without a branch; those sums must
/// equal, bit for bit, the plain sums written here (in index order, class
/// 1 only), finished the same way, for Student, Welch and mean difference,
/// every side, observed and relabelled classes, rows with exact zeros and
/// with values that cancel to zero part way (where a -0 would show).
#[test]
fn two_group_recheck_sums_equal_plain_sums_bit_for_bit() {
    use riffle::stats::prepare::Assignment;
    let (n_a, n_b) = (7, 6);
    let n = n_a + n_b;
    let labels: Vec<u8> = (0..n).map(|i| u8::from(i >= n_a)).collect();
    let relabel = Relabelings::draw(&labels, 200, 4);
    let mut state = 17u64;
    let mut rows: Vec<Vec<f64>> = (0..20)
        .map(|_| (0..n).map(|_| splitmix(&mut state) - 0.5).collect())
        .collect();
    rows.push(vec![0.0; n]);
    // -0.25 + 0.25 = +0 after two class-1 values, then a -0 to add.
    let mut cancel = vec![1.0; n];
    cancel[n_a] = -0.25;
    cancel[n_a + 1] = 0.25;
    cancel[n_a + 2] = -0.0;
    rows.push(cancel);
    for test in [TestKind::Student, TestKind::Welch, TestKind::MeanDiff] {
        for side in [Side::Both, Side::Greater, Side::Less] {
            let spec = TestSpec::two_group(test, side, Sizes { n_a, n_b });
            for z in &rows {
                let check = |classes: &[u8], got: f64| {
                    let (mut s1, mut q1) = (0.0f64, 0.0f64);
                    for (&v, &c) in z.iter().zip(classes) {
                        if c == 1 {
                            s1 += v;
                            q1 += v * v;
                        }
                    }
                    let want = spec.finish(&[s1], q1);
                    assert_eq!(got.to_bits(), want.to_bits(), "{test:?} {side:?} {z:?}");
                };
                check(
                    &labels,
                    spec.kernel_stat_with(z, Assignment::Observed(&labels)),
                );
                for b in 0..relabel.count {
                    let classes = relabel.row(b);
                    check(
                        classes,
                        spec.kernel_stat_with(z, Assignment::Classes(classes)),
                    );
                }
            }
        }
    }
}
