//! Provenance of a run: what went in (each input file's size and content
//! hash), which options decide the results, and one fingerprint over both.
//! Nightly runs use it to skip work when nothing changed
//! (`--skip-if-unchanged`), and `merge` uses it to tell whether shards
//! belong together.
//!
//! The content hash is XXH3-128 (xxhash-rust): not cryptographic, which is
//! fine because it guards against accidental change, not against forgery,
//! and it runs at several GB/s so a whole matrix is hashed once per run.

use std::fs::File;
use std::io::Read;
use std::path::{Path, PathBuf};
use std::time::Instant;

use serde::{Deserialize, Serialize};
use xxhash_rust::xxh3::Xxh3;

use crate::error::{IoContext, Result, RiffleError};
use crate::scan::ScanOptions;

/// Options that change neither the results table nor the spill: how fast or
/// where a run goes, not what it computes (results are byte-identical
/// whatever the threads, memory budget or chunk size).
const NOT_RESULT_DEFINING: [&str; 11] = [
    "matrix",
    "samples",
    "out",
    "threads",
    "memory_bytes",
    "chunk_rows",
    "quiet",
    "shard",
    "skip_if_unchanged",
    "checkpoint_seconds",
    "job",
];

/// One input file as it was when the run read it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct InputFingerprint {
    /// `matrix` or `samples`.
    pub role: String,
    pub path: PathBuf,
    /// None when the input was not a file (an in-memory source).
    pub bytes: Option<u64>,
    pub xxh3_128: Option<String>,
}

/// Inputs, result-defining options and their combined fingerprint.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct Provenance {
    pub riffle_version: String,
    pub inputs: Vec<InputFingerprint>,
    /// The options that decide the results (keys as in `run.json` options).
    pub result_options: serde_json::Map<String, serde_json::Value>,
    /// XXH3-128 over the version, the inputs' sizes and hashes and the
    /// result options; paths play no part, so a moved file still matches.
    pub fingerprint: String,
    pub hash_seconds: f64,
}

impl Provenance {
    pub fn of(options: &ScanOptions) -> Result<Self> {
        let started = Instant::now();
        let inputs = vec![
            fingerprint_input("matrix", &options.matrix)?,
            fingerprint_input("samples", &options.samples)?,
        ];
        let result_options = result_options(options)?;
        let fingerprint = combine(&inputs, &result_options);
        Ok(Provenance {
            riffle_version: env!("CARGO_PKG_VERSION").to_string(),
            inputs,
            result_options,
            fingerprint,
            hash_seconds: started.elapsed().as_secs_f64(),
        })
    }

    /// What differs from `other`, in words (empty when they match): the
    /// version, each input whose content differs, each option that differs.
    pub fn differences(&self, other: &Provenance) -> Vec<String> {
        let mut out = Vec::new();
        if self.riffle_version != other.riffle_version {
            out.push(format!(
                "riffle version {} vs {}",
                self.riffle_version, other.riffle_version
            ));
        }
        for (a, b) in self.inputs.iter().zip(&other.inputs) {
            if (a.bytes, &a.xxh3_128) != (b.bytes, &b.xxh3_128) {
                out.push(format!(
                    "input {} differs in content ({} vs {})",
                    a.role,
                    a.path.display(),
                    b.path.display()
                ));
            }
        }
        let keys: std::collections::BTreeSet<&String> = self
            .result_options
            .keys()
            .chain(other.result_options.keys())
            .collect();
        for key in keys {
            let a = self.result_options.get(key);
            let b = other.result_options.get(key);
            if a != b {
                let show = |v: Option<&serde_json::Value>| {
                    v.map(|v| v.to_string()).unwrap_or_else(|| "absent".into())
                };
                out.push(format!("option {key}: {} vs {}", show(a), show(b)));
            }
        }
        if out.is_empty() && self.fingerprint != other.fingerprint {
            out.push("fingerprints differ".into());
        }
        out
    }
}

fn result_options(options: &ScanOptions) -> Result<serde_json::Map<String, serde_json::Value>> {
    let value = serde_json::to_value(options)
        .map_err(|e| RiffleError::Internal(format!("options to JSON: {e}")))?;
    let serde_json::Value::Object(mut map) = value else {
        return Err(RiffleError::Internal(
            "options are not a JSON object".into(),
        ));
    };
    for key in NOT_RESULT_DEFINING {
        map.remove(key);
    }
    Ok(map)
}

fn combine(
    inputs: &[InputFingerprint],
    result_options: &serde_json::Map<String, serde_json::Value>,
) -> String {
    // serde_json maps are sorted by key, so this text is canonical.
    let text = serde_json::json!({
        "riffle_version": env!("CARGO_PKG_VERSION"),
        "inputs": inputs.iter().map(|i| serde_json::json!([i.role, i.bytes, i.xxh3_128])).collect::<Vec<_>>(),
        "options": result_options,
    })
    .to_string();
    format!("{:032x}", xxhash_rust::xxh3::xxh3_128(text.as_bytes()))
}

fn fingerprint_input(role: &str, path: &Path) -> Result<InputFingerprint> {
    let (bytes, hash) = if path.is_file() {
        let (bytes, hash) = hash_file(path)?;
        (Some(bytes), Some(hash))
    } else {
        (None, None)
    };
    Ok(InputFingerprint {
        role: role.into(),
        path: path.to_path_buf(),
        bytes,
        xxh3_128: hash,
    })
}

/// Size and XXH3-128 (hex) of a whole file, read in large blocks.
pub fn hash_file(path: &Path) -> Result<(u64, String)> {
    let mut file = File::open(path).at(path)?;
    let mut hasher = Xxh3::new();
    let mut buf = vec![0u8; 4 << 20];
    let mut total = 0u64;
    loop {
        let k = file.read(&mut buf).at(path)?;
        if k == 0 {
            break;
        }
        hasher.update(&buf[..k]);
        total += k as u64;
    }
    Ok((total, format!("{:032x}", hasher.digest128())))
}

/// The provenance stored in a finished output folder's `run.json`, if the
/// run there completed (its results table is present with the size and hash
/// the record names).
pub fn finished_run(out: &Path) -> Option<Provenance> {
    let text = std::fs::read_to_string(out.join(crate::scan::RUN_RECORD)).ok()?;
    let record: serde_json::Value = serde_json::from_str(&text).ok()?;
    if record.get("complete") != Some(&serde_json::Value::Bool(true)) {
        return None;
    }
    let results = record.get("results")?;
    let path = out.join(results.get("file")?.as_str()?);
    let (bytes, hash) = hash_file(&path).ok()?;
    if Some(bytes) != results.get("bytes")?.as_u64()
        || Some(hash.as_str()) != results.get("xxh3_128")?.as_str()
    {
        return None;
    }
    serde_json::from_value(record.get("provenance")?.clone()).ok()
}

/// The `results` entry of `run.json`: which table, its size and hash.
pub fn results_entry(results_path: &Path) -> Result<serde_json::Value> {
    let (bytes, hash) = hash_file(results_path)?;
    Ok(serde_json::json!({
        "file": results_path.file_name().map(|n| n.to_string_lossy().to_string()),
        "bytes": bytes,
        "xxh3_128": hash,
    }))
}
