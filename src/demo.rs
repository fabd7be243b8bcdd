//! The bundled demo: invented leaf transcript abundances of control and
//! heat-stressed seedlings (see demo-data/README.md), run end to end.

use std::path::Path;
use std::sync::atomic::AtomicBool;

use crate::error::{IoContext, Result};
use crate::scan::{run_scan, ScanOptions, ScanSummary};
use crate::stats::TestKind;

const DEMO_MATRIX: &[u8] = include_bytes!("../demo-data/leaf_heat.arrow");
const DEMO_SHEET: &[u8] = include_bytes!("../demo-data/leaf_heat_samples.tsv");

pub fn run_demo(out: &Path, threads: Option<usize>, stop: &AtomicBool) -> Result<()> {
    let inputs = out.join("inputs");
    std::fs::create_dir_all(&inputs).at(&inputs)?;
    let matrix = inputs.join("leaf_heat.arrow");
    let sheet = inputs.join("leaf_heat_samples.tsv");
    std::fs::write(&matrix, DEMO_MATRIX).at(&matrix)?;
    std::fs::write(&sheet, DEMO_SHEET).at(&sheet)?;
    let mut options = ScanOptions::new(&matrix, &sheet, "group", out);
    options.levels = Some(vec!["control".into(), "heat".into()]);
    options.test = TestKind::Welch;
    options.perms = 5_000;
    options.seed = 20261202;
    options.format = crate::output::TableFormat::Tsv;
    if let Some(t) = threads {
        options.threads = t;
    }
    options.quiet = false;
    options.report = true;
    eprintln!("riffle demo: leaf transcripts, control vs heat-stressed seedlings (invented data)");
    let summary = run_scan(&options, stop)?;
    println!("{}", summary_text(&summary));
    Ok(())
}

pub fn summary_text(s: &ScanSummary) -> String {
    let untested: u64 = s.untested.iter().map(|(_, n)| n).sum();
    format!(
        "{} features ({} tested, {} untested), {} vs {} ({} vs {} samples), {} relabelings{}\n\
         q_bh <= 0.01 / 0.05 / 0.1: {} / {} / {};  FWER (maxT) <= 0.05: {};  pi0 = {:.3}\n\
         {:.1} s, {:.3e} feature-relabelings/s\n\
         results: {}\n\
         {}",
        s.features,
        s.tested,
        untested,
        s.level_b,
        s.level_a,
        s.n_b,
        s.n_a,
        s.relabelings,
        if s.exact {
            " (all of them: exact p-values)".to_string()
        } else if s.relabelings_used < s.tested * s.relabelings as u64 {
            format!(
                " ({:.2}% of them used: sequential stopping)",
                100.0 * s.relabelings_used as f64 / (s.tested * s.relabelings as u64) as f64
            )
        } else {
            String::new()
        },
        s.bh_hits[0],
        s.bh_hits[1],
        s.bh_hits[2],
        if s.maxt_computed {
            s.fwer_hits_05.to_string()
        } else {
            "not computed (sequential stopping)".to_string()
        },
        s.pi0,
        s.seconds,
        s.feature_relabelings_per_second,
        s.results_path.display(),
        crate::CAUTION
    )
}
