//! Extreme magnitudes: rows near 1e30 and 1e300, and rows with a huge mean
//! (1e9) and a tiny spread (1e-3), give the same p_param (to 1e-9 relative)
//! and the same p_perm as the same rows brought back to unit scale. All test
//! statistics used are location- and scale-invariant (Welch and Student t;
//! a fact of the trade, common practice, no single source), so any
//! difference would be a loss of digits in riffle's preparation.

mod common;

use common::{options, scan_rows, Table, TestRng};
use riffle::output::TableFormat;
use riffle::stats::TestKind;

/// (name, centre, spread): stored value = centre + spread * u.
const FAMILIES: [(&str, f64, f64); 4] = [
    ("around 1e30", 1e30, 1e29),
    ("scaled by 1e30", 0.0, 1e30),
    ("near f64's limit", 0.0, 1e300),
    ("huge mean, tiny spread", 1e9, 1e-3),
];

#[test]
fn extreme_magnitudes_match_unit_scale() {
    let labels: Vec<u8> = [0u8; 7].iter().chain(&[1u8; 6]).copied().collect();
    let per_family = 40;
    let mut rng = TestRng::new(3);
    let base: Vec<Vec<f64>> = (0..per_family)
        .map(|k| {
            let shift = if k % 4 == 0 { 1.8 } else { 0.0 };
            labels
                .iter()
                .map(|&l| rng.normal() + shift * l as f64)
                .collect()
        })
        .collect();
    // Each extreme row, and its unit-scale twin computed back from the
    // stored (already rounded) extreme values, so both carry the same data.
    let mut rows = Vec::new();
    for &(_, centre, spread) in &FAMILIES {
        for u in &base {
            let stored: Vec<f64> = u.iter().map(|&x| centre + spread * x).collect();
            let twin: Vec<f64> = stored.iter().map(|&v| (v - centre) / spread).collect();
            rows.push(stored);
            rows.push(twin);
        }
    }
    for test in [TestKind::Welch, TestKind::Student] {
        let dir = tempfile::tempdir().unwrap();
        let mut o = options(dir.path());
        o.format = TableFormat::Tsv;
        o.test = test;
        o.perms = 1999;
        o.seed = 21;
        let summary = scan_rows(&rows, &labels, &o);
        assert_eq!(summary.tested as usize, rows.len(), "{test:?}");
        let table = Table::read(&dir.path().join("results.tsv"));
        let p_param = table.f64s("p_param");
        let p_perm = table.f64s("p_perm");
        let statistic = table.f64s("statistic");
        for (f, &(name, _, _)) in FAMILIES.iter().enumerate() {
            for k in 0..per_family {
                let i = 2 * (f * per_family + k);
                let rel = (p_param[i] - p_param[i + 1]).abs() / p_param[i + 1];
                assert!(
                    rel <= 1e-9,
                    "{test:?} {name} row {k}: p_param {} vs unit scale {} (rel {rel:e})",
                    p_param[i],
                    p_param[i + 1]
                );
                let rel_t = (statistic[i] - statistic[i + 1]).abs() / statistic[i + 1].abs();
                assert!(rel_t <= 1e-9, "{test:?} {name} row {k}: t {}", statistic[i]);
                assert_eq!(
                    p_perm[i],
                    p_perm[i + 1],
                    "{test:?} {name} row {k}: p_perm differs"
                );
            }
        }
    }
}
