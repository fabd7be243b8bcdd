//! Faults of the machine rather than of the input: a full disk (or a
//! file-size limit) during the run, and SIGINT/SIGTERM mid-run. Each must end
//! with one clear line, the documented exit code (3 I/O, 130 interrupted,
//! README "Exit codes") and no results file that looks complete.
//!
//! The disk is "filled" without root mounts by a file-size limit
//! (RLIMIT_FSIZE with SIGXFSZ ignored: writes past the limit fail with
//! EFBIG, POSIX setrlimit(2)); a tiny tmpfs is tried as well when mounting
//! is permitted.

use std::os::unix::process::CommandExt;
use std::path::{Path, PathBuf};
use std::process::{Command, Output, Stdio};
use std::time::{Duration, Instant};

fn riffle() -> Command {
    Command::new(env!("CARGO_BIN_EXE_riffle"))
}

fn text(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

fn simulate(dir: &Path, features: u64, sizes: &str) -> (PathBuf, PathBuf) {
    let matrix = dir.join("m.arrow");
    let sheet = dir.join("sheet.tsv");
    let o = riffle()
        .args(["simulate", "--out"])
        .arg(&matrix)
        .arg("--sheet")
        .arg(&sheet)
        .args(["--features", &features.to_string(), "--group-sizes", sizes])
        .args(["--seed", "4"])
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", text(&o));
    (matrix, sheet)
}

fn scan_command(matrix: &Path, sheet: &Path, out: &Path, extra: &[&str]) -> Command {
    let mut c = riffle();
    c.arg("scan")
        .arg("--matrix")
        .arg(matrix)
        .arg("--samples")
        .arg(sheet)
        .args(["--group", "group", "--quiet", "--out"])
        .arg(out)
        .args(extra);
    c
}

/// Runs with a per-file size limit of `bytes`.
fn with_file_limit(mut command: Command, bytes: u64) -> Output {
    // SAFETY: only async-signal-safe calls between fork and exec.
    unsafe {
        command.pre_exec(move || {
            libc::signal(libc::SIGXFSZ, libc::SIG_IGN);
            let limit = libc::rlimit {
                rlim_cur: bytes as libc::rlim_t,
                rlim_max: bytes as libc::rlim_t,
            };
            if libc::setrlimit(libc::RLIMIT_FSIZE, &limit) != 0 {
                return Err(std::io::Error::last_os_error());
            }
            Ok(())
        });
    }
    command.output().unwrap()
}

/// Every file under `dir`, with its size.
fn files_under(dir: &Path) -> Vec<(PathBuf, u64)> {
    let mut found = Vec::new();
    let Ok(entries) = std::fs::read_dir(dir) else {
        return found;
    };
    for e in entries.flatten() {
        let p = e.path();
        if p.is_dir() {
            found.extend(files_under(&p));
        } else {
            found.push((p.clone(), e.metadata().unwrap().len()));
        }
    }
    found
}

fn assert_no_results(out: &Path, context: &str) {
    for (p, _) in files_under(out) {
        let name = p.file_name().unwrap().to_string_lossy().into_owned();
        assert!(
            !name.starts_with("results") && !name.contains(".partial-"),
            "{context}: left {}",
            p.display()
        );
    }
}

fn assert_one_line(stderr: &str, context: &str) {
    let line = stderr.trim_end();
    assert!(
        !line.is_empty() && !line.contains('\n') && line.starts_with("riffle: error: "),
        "{context}: expected one error line, got: {stderr}"
    );
    assert!(!line.contains("panicked"), "{context}: {stderr}");
}

#[test]
fn full_disk_fails_cleanly_and_a_rerun_succeeds() {
    let dir = tempfile::tempdir().unwrap();
    let (matrix, sheet) = simulate(dir.path(), 20_000, "6,6");
    let options = [
        "--perms",
        "99",
        "--threads",
        "1",
        "--format",
        "tsv",
        "--maxt",
        "single",
    ];

    let reference = dir.path().join("reference");
    let o = scan_command(&matrix, &sheet, &reference, &options)
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", text(&o));
    let results_size = std::fs::metadata(reference.join("results.tsv"))
        .unwrap()
        .len();
    let largest_other = files_under(&reference)
        .into_iter()
        .filter(|(p, _)| !p.ends_with("results.tsv"))
        .map(|(_, size)| size)
        .max()
        .unwrap();
    assert!(
        results_size > largest_other + 8192,
        "the results table ({results_size} bytes) must be the largest file \
         (next {largest_other}) for the limit to hit it"
    );

    // The limit lets the spill through and stops the final table.
    let limits = [
        (largest_other + 4096, "results.tsv"),
        // And a limit so small that the spill itself cannot be written.
        (4096, "spill"),
    ];
    for (limit, named) in limits {
        let out = dir.path().join(format!("limited-{limit}"));
        let o = with_file_limit(scan_command(&matrix, &sheet, &out, &options), limit);
        let err = text(&o);
        let context = format!("file-size limit {limit}");
        assert_eq!(o.status.code(), Some(3), "{context}: {err}");
        assert_one_line(&err, &context);
        assert!(err.contains(named), "{context}: file not named: {err}");
        assert!(err.contains("File too large"), "{context}: {err}");
        assert!(err.contains("free space"), "{context}: no advice: {err}");
        assert_no_results(&out, &context);

        // Space freed: the same command into the same folder succeeds and
        // gives the reference bytes.
        let o = scan_command(&matrix, &sheet, &out, &options)
            .output()
            .unwrap();
        assert!(o.status.success(), "{context}, rerun: {}", text(&o));
        assert_eq!(
            std::fs::read(out.join("results.tsv")).unwrap(),
            std::fs::read(reference.join("results.tsv")).unwrap(),
            "{context}: rerun differs from the reference"
        );
    }

    // A real full file system, when this machine lets us mount one.
    let mount_point = dir.path().join("tiny");
    std::fs::create_dir(&mount_point).unwrap();
    let mounted = Command::new("mount")
        .args(["-t", "tmpfs", "-o", "size=256k", "tmpfs"])
        .arg(&mount_point)
        .stderr(Stdio::null())
        .status()
        .is_ok_and(|s| s.success());
    if !mounted {
        eprintln!("tmpfs part skipped: mounting is not permitted here");
        return;
    }
    let out = mount_point.join("run");
    let o = scan_command(&matrix, &sheet, &out, &options)
        .output()
        .unwrap();
    let err = text(&o);
    let _ = Command::new("umount").arg(&mount_point).status();
    assert_eq!(o.status.code(), Some(3), "tmpfs: {err}");
    assert_one_line(&err, "tmpfs");
    assert!(err.contains("No space left"), "tmpfs: {err}");
}

fn interrupt(signal: libc::c_int, name: &str) {
    let dir = tempfile::tempdir().unwrap();
    let (matrix, sheet) = simulate(dir.path(), 300_000, "12,12");
    let out = dir.path().join("out");
    let mut child = scan_command(
        &matrix,
        &sheet,
        &out,
        &["--perms", "2000", "--threads", "1"],
    )
    .stderr(Stdio::piped())
    .stdout(Stdio::null())
    .spawn()
    .unwrap();
    std::thread::sleep(Duration::from_millis(500));
    assert!(
        child.try_wait().unwrap().is_none(),
        "{name}: the scan ended before the signal; make it larger"
    );
    let sent = Instant::now();
    // SAFETY: plain kill(2) on our own child.
    assert_eq!(unsafe { libc::kill(child.id() as libc::pid_t, signal) }, 0);
    let status = loop {
        if let Some(status) = child.try_wait().unwrap() {
            break status;
        }
        if sent.elapsed() > Duration::from_secs(10) {
            let _ = child.kill();
            panic!("{name}: still running 10 s after the signal");
        }
        std::thread::sleep(Duration::from_millis(10));
    };
    let waited = sent.elapsed();
    let mut err = String::new();
    std::io::Read::read_to_string(child.stderr.as_mut().unwrap(), &mut err).unwrap();
    eprintln!(
        "{name}: exited {:.3} s after the signal",
        waited.as_secs_f64()
    );
    assert!(waited < Duration::from_secs(2), "{name}: took {waited:?}");
    assert_eq!(status.code(), Some(130), "{name}: {err}");
    assert_one_line(&err, name);
    assert!(err.contains("interrupted"), "{name}: {err}");
    assert_no_results(&out, name);
}

#[test]
fn sigint_stops_promptly_without_results() {
    interrupt(libc::SIGINT, "SIGINT");
}

#[test]
fn sigterm_stops_promptly_without_results() {
    interrupt(libc::SIGTERM, "SIGTERM");
}
