//! Features that cannot be tested (constant, all missing, too few observed,
//! ±Inf, no variance within either group) stay in the table with a note and
//! no p-values, do not stop the run, and are left out of m for every
//! adjustment: q_bh of the tested features equals Benjamini–Hochberg
//! computed on the tested features alone.

mod common;

use common::{options, scan_rows, Table, TestRng};
use riffle::output::TableFormat;

/// Benjamini & Hochberg (1995), J. R. Stat. Soc. B 57:289–300, step-up
/// procedure written as adjusted p-values: q_(i) = min over j >= i of
/// min(1, m p_(j) / j), with p sorted ascending and m the number of tests.
fn bh_reference(p: &[f64]) -> Vec<f64> {
    let m = p.len();
    let mut order: Vec<usize> = (0..m).collect();
    order.sort_by(|&a, &b| p[a].total_cmp(&p[b]));
    let mut q = vec![0.0; m];
    let mut running = 1.0f64;
    for rank in (0..m).rev() {
        let i = order[rank];
        running = running.min(p[i] * m as f64 / (rank + 1) as f64).min(1.0);
        q[i] = running;
    }
    q
}

#[test]
fn untestable_rows_are_kept_noted_and_left_out_of_m() {
    let labels: Vec<u8> = [0u8; 6].iter().chain(&[1u8; 6]).copied().collect();
    let mut rng = TestRng::new(11);
    let mut rows: Vec<Vec<f64>> = Vec::new();
    let mut expected_note: Vec<&str> = Vec::new();
    let mut push = |row: Vec<f64>, note: &'static str, rows: &mut Vec<Vec<f64>>| {
        rows.push(row);
        expected_note.push(note);
    };
    for k in 0..60 {
        // Untestable rows scattered among tested ones, some tested rows shifted.
        let shift = if k % 5 == 0 { 2.5 } else { 0.0 };
        let row: Vec<f64> = labels
            .iter()
            .map(|&l| rng.normal() + shift * l as f64)
            .collect();
        push(row, "", &mut rows);
        match k % 10 {
            1 => push(vec![3.25; 12], "constant", &mut rows),
            2 => push(vec![f64::NAN; 12], "too few observed values", &mut rows),
            3 => {
                // Group B (samples 6..12) keeps 2 observed values.
                let mut r: Vec<f64> = (0..12).map(|i| i as f64).collect();
                r[7..11].fill(f64::NAN);
                push(r, "too few observed values", &mut rows)
            }
            4 => {
                let mut r: Vec<f64> = (0..12).map(|i| i as f64).collect();
                r[2] = f64::INFINITY;
                push(r, "infinite values", &mut rows)
            }
            5 => {
                let mut r: Vec<f64> = (0..12).map(|i| i as f64).collect();
                r[9] = f64::NEG_INFINITY;
                push(r, "infinite values", &mut rows)
            }
            6 => {
                let r: Vec<f64> = labels.iter().map(|&l| 1.0 + l as f64).collect();
                push(r, "no variance within groups", &mut rows)
            }
            _ => {}
        }
    }
    let dir = tempfile::tempdir().unwrap();
    let mut o = options(dir.path());
    o.format = TableFormat::Tsv;
    o.perms = 999;
    o.seed = 5;
    let summary = scan_rows(&rows, &labels, &o);
    let table = Table::read(&dir.path().join("results.tsv"));
    assert_eq!(table.rows, rows.len(), "every feature is kept");

    let tested: Vec<usize> = (0..rows.len())
        .filter(|&i| expected_note[i].is_empty())
        .collect();
    assert_eq!(summary.tested as usize, tested.len());
    let note = table.text("note");
    let source = table.text("p_source");
    let p_perm = table.f64s("p_perm");
    let p_param = table.f64s("p_param");
    let q_bh = table.f64s("q_bh");
    for i in 0..rows.len() {
        assert_eq!(note[i], expected_note[i], "row {i}");
        if expected_note[i].is_empty() {
            assert_ne!(source[i], "untested", "row {i}");
            assert!(p_perm[i] > 0.0 && p_param[i] > 0.0, "row {i}");
        } else {
            assert_eq!(source[i], "untested", "row {i}");
            for column in [
                "p_param",
                "p_perm",
                "q_bh",
                "q_by",
                "q_storey",
                "p_holm",
                "p_hochberg",
                "p_bonferroni",
                "p_maxt",
                "p_maxt_single",
            ] {
                assert!(table.f64s(column)[i].is_nan(), "row {i}, {column}");
            }
        }
    }
    let p_tested: Vec<f64> = tested.iter().map(|&i| p_perm[i]).collect();
    let reference = bh_reference(&p_tested);
    for (k, &i) in tested.iter().enumerate() {
        let diff = (q_bh[i] - reference[k]).abs();
        assert!(
            diff <= 1e-12 * reference[k],
            "row {i}: q_bh {} vs BH on tested only {}",
            q_bh[i],
            reference[k]
        );
    }
    // Bonferroni multiplies by m (tested features only): common practice,
    // no single source.
    let bonferroni = table.f64s("p_bonferroni");
    for &i in &tested {
        let expected = (p_perm[i] * tested.len() as f64).min(1.0);
        assert!(
            (bonferroni[i] - expected).abs() <= 1e-12 * expected,
            "row {i}"
        );
    }
    // The reference must be able to tell "m = tested" from "m = all rows".
    let wrong = bh_reference(
        &(0..rows.len())
            .map(|i| {
                if expected_note[i].is_empty() {
                    p_perm[i]
                } else {
                    1.0
                }
            })
            .collect::<Vec<_>>(),
    );
    assert!(tested.iter().any(|&i| (wrong[i] - q_bh[i]).abs() > 1e-6));
}
