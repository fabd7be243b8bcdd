//! Resume: a scan killed with SIGKILL at seeded random moments and started
//! again with the same command ends with the same bytes as a run that was
//! never interrupted (the uninterrupted run is the reference; its p-values
//! are checked against brute force and scipy elsewhere).

mod common;

use std::path::Path;
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use common::TestRng;

fn riffle() -> Command {
    Command::new(env!("CARGO_BIN_EXE_riffle"))
}

fn scan_command(dir: &Path, out: &Path, extra: &[&str]) -> Command {
    let mut c = riffle();
    c.args(["scan", "--matrix"])
        .arg(dir.join("m.arrow"))
        .arg("--samples")
        .arg(dir.join("sheet.tsv"))
        .args(if extra.contains(&"spearman") {
            ["--trait", "score"]
        } else {
            ["--group", "group"]
        })
        .args([
            "--perms",
            "1000",
            "--seed",
            "4",
            "--format",
            "tsv",
            "--threads",
            "2",
            "--memory",
            "24M",
            "--checkpoint-seconds",
            "0.1",
            "--out",
        ])
        .arg(out)
        .args(extra)
        .stdout(Stdio::null())
        .stderr(Stdio::piped());
    c
}

fn kill_and_resume(extra: &[&str], seed: u64) {
    kill_and_resume_on("80000", None, extra, seed);
}

/// `kill_and_resume` on `features` simulated features; with `missing`, that
/// share of values missing and invented covariates (age, site) and a score
/// added to the sheet.
fn kill_and_resume_on(features: &str, missing: Option<&str>, extra: &[&str], seed: u64) {
    let dir = tempfile::tempdir().unwrap();
    let mut simulate = riffle();
    simulate
        .args(["simulate", "--out"])
        .arg(dir.path().join("m.arrow"))
        .arg("--sheet")
        .arg(dir.path().join("sheet.tsv"))
        .args([
            "--features",
            features,
            "--group-sizes",
            "12,12",
            "--effect-fraction",
            "0.01",
            "--seed",
            "8",
        ]);
    if let Some(share) = missing {
        simulate.args(["--missing-fraction", share]);
    }
    let o = simulate.output().unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    if missing.is_some() {
        let path = dir.path().join("sheet.tsv");
        let text = std::fs::read_to_string(&path).unwrap();
        let mut lines = text.lines();
        let mut sheet = format!("{}\tage\tsite\tscore\n", lines.next().unwrap());
        for (i, line) in lines.enumerate() {
            sheet.push_str(&format!(
                "{line}\t{}\ts{}\t{}\n",
                30 + (i * 17) % 41,
                i % 3,
                (i * 7) % 5
            ));
        }
        std::fs::write(&path, sheet).unwrap();
    }

    let reference = dir.path().join("reference");
    let started = Instant::now();
    let o = scan_command(dir.path(), &reference, extra)
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let full = started.elapsed().as_secs_f64();

    let out = dir.path().join("interrupted");
    let mut rng = TestRng::new(seed);
    let mut resumed = 0;
    let mut kills = 0;
    // The kill moments are fractions of the reference run's time; on a
    // shared machine a later run can be faster than the reference and end
    // before its kill, which tests nothing: such a finished run is thrown
    // away and the time scale halved, so five kills always land mid-run.
    let mut scale = full;
    for _ in 0..30 {
        if kills >= 5 && resumed > 0 {
            break;
        }
        let delay = scale * (0.1 + 0.8 * rng.uniform());
        let mut child = scan_command(dir.path(), &out, extra).spawn().unwrap();
        std::thread::sleep(Duration::from_secs_f64(delay));
        let finished = child.try_wait().unwrap().is_some();
        let _ = child.kill(); // SIGKILL
        let o = child.wait_with_output().unwrap();
        if finished {
            if out.exists() {
                std::fs::remove_dir_all(&out).unwrap();
            }
            scale *= 0.5;
        } else {
            kills += 1;
            if String::from_utf8_lossy(&o.stderr).contains("resuming") {
                resumed += 1;
            }
            // Killed before its first checkpoint (a loaded machine made
            // the start slower than the reference's): the next kill lands
            // later, so that some run is left a checkpoint to resume.
            if !out.join("checkpoint.json").exists() {
                scale *= 1.5;
            }
        }
    }
    let o = scan_command(dir.path(), &out, extra).output().unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    if String::from_utf8_lossy(&o.stderr).contains("resuming") {
        resumed += 1;
    }
    assert!(
        resumed > 0,
        "no run resumed from a checkpoint (reference took {full:.2} s)"
    );
    let read = |d: &Path| std::fs::read(d.join("results.tsv")).unwrap();
    assert!(
        read(&out) == read(&reference),
        "results differ after kills and resumes"
    );
    assert!(!out.join("checkpoint.json").exists());
}

#[test]
fn killed_step_down_scan_resumes_to_identical_bytes() {
    kill_and_resume(&["--pooled-null"], 1);
}

#[test]
fn killed_single_step_scan_resumes_to_identical_bytes() {
    kill_and_resume(&["--maxt", "single"], 2);
}

#[test]
fn killed_sequential_scan_resumes_to_identical_bytes() {
    kill_and_resume(
        &["--stop-after", "10", "--perms", "20000", "--phipson-smyth"],
        3,
    );
}

/// Rows with missing values in covariate and Spearman designs (the per-row
/// f64 path) resume to the same bytes too.
#[test]
fn killed_scan_with_masked_covariate_and_spearman_rows_resumes_to_identical_bytes() {
    kill_and_resume_on(
        "6000",
        Some("0.05"),
        &[
            "--test",
            "student",
            "--covariates",
            "age,site",
            "--perms",
            "400",
        ],
        4,
    );
    kill_and_resume_on(
        "6000",
        Some("0.05"),
        &["--test", "spearman", "--perms", "400"],
        5,
    );
}
