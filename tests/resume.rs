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
        .args([
            "--group",
            "group",
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
    let dir = tempfile::tempdir().unwrap();
    let o = riffle()
        .args(["simulate", "--out"])
        .arg(dir.path().join("m.arrow"))
        .arg("--sheet")
        .arg(dir.path().join("sheet.tsv"))
        .args([
            "--features",
            "80000",
            "--group-sizes",
            "12,12",
            "--effect-fraction",
            "0.01",
            "--seed",
            "8",
        ])
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));

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
    for _ in 0..20 {
        if kills == 5 {
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
