//! Job files: a TOML file holding any of the `scan` options, so that a
//! scheduled run is one line (`riffle scan --job nightly.toml`). Keys are
//! the long option names with dashes (`chunk-rows = 4096`,
//! `levels = ["control", "heat"]`, `pooled-null = true`); options given on
//! the command line override the file.

use std::ffi::OsString;
use std::path::{Path, PathBuf};

use clap::CommandFactory;

use crate::error::{IoContext, Result, RiffleError};

/// Inserts the job file's options right after `scan`, ahead of the
/// command line's own, which therefore win (the scan subcommand lets a
/// later occurrence of an option override an earlier one). Other commands
/// and scans without `--job` pass through unchanged.
pub fn expand_job_args(args: Vec<OsString>) -> Result<Vec<OsString>> {
    if args.get(1).and_then(|a| a.to_str()) != Some("scan") {
        return Ok(args);
    }
    let Some(path) = job_path(&args[2..]) else {
        return Ok(args);
    };
    let inserted = job_args(&path)?;
    let mut out = args[..2].to_vec();
    out.extend(inserted);
    out.extend_from_slice(&args[2..]);
    Ok(out)
}

fn job_path(args: &[OsString]) -> Option<PathBuf> {
    let mut found = None;
    let mut iter = args.iter();
    while let Some(a) = iter.next() {
        let text = a.to_string_lossy();
        if text == "--job" {
            found = iter.next().map(PathBuf::from);
        } else if let Some(rest) = text.strip_prefix("--job=") {
            found = Some(PathBuf::from(rest));
        }
    }
    found
}

/// The `--key=value` arguments a job file stands for.
pub fn job_args(path: &Path) -> Result<Vec<OsString>> {
    let text = std::fs::read_to_string(path).at(path)?;
    let table: toml::Table = text.parse().map_err(|e: toml::de::Error| {
        let place = e
            .span()
            .map(|s| {
                let line = text[..s.start].matches('\n').count() + 1;
                format!("line {line}")
            })
            .unwrap_or_else(|| "TOML".into());
        RiffleError::bad_input(path, place, e.message().to_string())
    })?;
    let cli = crate::cli::Cli::command();
    let scan = cli
        .find_subcommand("scan")
        .ok_or_else(|| RiffleError::Internal("no scan subcommand".into()))?;
    let known: Vec<(String, bool)> = scan
        .get_arguments()
        .filter_map(|a| {
            a.get_long()
                .map(|l| (l.to_string(), a.get_action().takes_values()))
        })
        .filter(|(l, _)| l != "job" && l != "help")
        .collect();
    let names = || {
        known
            .iter()
            .map(|(l, _)| l.as_str())
            .collect::<Vec<_>>()
            .join(", ")
    };
    let mut out = Vec::new();
    for (key, value) in &table {
        let place = format!("key '{key}'");
        let Some((_, takes_value)) = known.iter().find(|(l, _)| l == key) else {
            let dashed = key.replace('_', "-");
            let hint = if known.iter().any(|(l, _)| *l == dashed) {
                format!("write it with dashes: '{dashed}'")
            } else {
                format!("keys are the scan options without '--': {}", names())
            };
            return Err(RiffleError::bad_input(
                path,
                place,
                format!("not a scan option; {hint}"),
            ));
        };
        let scalar = |v: &toml::Value| -> Result<String> {
            match v {
                toml::Value::String(s) => Ok(s.clone()),
                toml::Value::Integer(i) => Ok(i.to_string()),
                toml::Value::Float(f) => Ok(f.to_string()),
                toml::Value::Boolean(b) => Ok(b.to_string()),
                _ => Err(RiffleError::bad_input(
                    path,
                    place.clone(),
                    "expected a string, number, boolean or list of them",
                )),
            }
        };
        match value {
            toml::Value::Boolean(flag) if !takes_value => {
                if *flag {
                    out.push(OsString::from(format!("--{key}")));
                }
            }
            _ if !takes_value => {
                return Err(RiffleError::bad_input(
                    path,
                    place,
                    "a switch: write true or false",
                ))
            }
            toml::Value::Array(items) => {
                let parts: Vec<String> = items.iter().map(scalar).collect::<Result<_>>()?;
                out.push(OsString::from(format!("--{key}={}", parts.join(","))));
            }
            other => out.push(OsString::from(format!("--{key}={}", scalar(other)?))),
        }
    }
    Ok(out)
}
