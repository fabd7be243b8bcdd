//! Synthetic matrices of any size, streamed to Arrow IPC or Parquet, with a
//! matching sample sheet and (optionally) the list of planted effects.
//!
//! Model, per feature f: a baseline mu_f ~ N(8, 2^2) and a spread
//! sigma_f = 0.2 + Exp(mean 0.3) (log-scale abundances); every value is
//! mu_f + sigma_f * N(0, 1); a planted feature adds delta_f * sigma_f to
//! every group-B value, |delta_f| = effect size, sign random. All draws come
//! in order from one ChaCha20 stream keyed by the seed (normals by the
//! Box–Muller transform), so the same arguments give the same bytes.
//!
//! With `--missing-fraction p` each value is then left out (NaN) with
//! probability p, decided by a second stream (its own tag), so that the
//! observed values are the same bytes as the complete matrix of the same
//! seed: a benchmark can compare the two on the same data.

use std::io::Write;
use std::path::{Path, PathBuf};

use clap::Args;
use rand_chacha::ChaCha20Rng;
use rand_core::{RngCore, SeedableRng};

use crate::error::{IoContext, Result, RiffleError};
use crate::input::{create_matrix_writer, MatrixFormat, ValueType};

#[derive(Args, Debug, Clone)]
pub struct SimulateArgs {
    /// Output matrix file.
    #[arg(long)]
    pub out: PathBuf,
    /// Output sample sheet (TSV: sample, group).
    #[arg(long)]
    pub sheet: PathBuf,
    /// Where to list planted effects (TSV: feature, planted_shift).
    #[arg(long)]
    pub truth: Option<PathBuf>,
    #[arg(long, default_value_t = 10_000)]
    pub features: u64,
    /// Samples in each group, A,B.
    #[arg(long, value_delimiter = ',', default_values_t = [24usize, 24])]
    pub group_sizes: Vec<usize>,
    /// Names of the two groups, A,B (sample names are <level>_<number>).
    #[arg(long, value_delimiter = ',', default_values_t = ["A".to_string(), "B".to_string()])]
    pub levels: Vec<String>,
    /// Share of features with a planted shift.
    #[arg(long, default_value_t = 0.01)]
    pub effect_fraction: f64,
    /// Planted shift in units of the feature's own SD.
    #[arg(long, default_value_t = 1.5)]
    pub effect_size: f64,
    /// Share of values left missing (NaN), each independently; the others
    /// equal the complete matrix of the same seed.
    #[arg(long, default_value_t = 0.0)]
    pub missing_fraction: f64,
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
    #[arg(long, value_enum, default_value_t = SimFormat::Arrow)]
    pub format: SimFormat,
    /// Store values as f32 (default) or f64.
    #[arg(long)]
    pub f64: bool,
    /// Prefix of feature ids.
    #[arg(long, default_value = "feat")]
    pub id_prefix: String,
    /// Rows per record batch / row group.
    #[arg(long, default_value_t = 65_536)]
    pub batch_rows: usize,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum SimFormat {
    Arrow,
    Parquet,
}

/// Version tag of the simulation stream; part of the seed material.
const SIM_GENERATOR: &str = "riffle-simulate-v1";
/// Tag of the stream that picks missing values.
const MISSING_GENERATOR: &str = "riffle-sim-missing-v1";

struct Normals {
    rng: ChaCha20Rng,
    spare: Option<f64>,
}

impl Normals {
    fn new(seed: u64) -> Self {
        Self::tagged(seed, SIM_GENERATOR)
    }
    /// `tag` (at most 24 bytes) keys an independent stream.
    fn tagged(seed: u64, tag: &str) -> Self {
        let mut key = [0u8; 32];
        key[..8].copy_from_slice(&seed.to_le_bytes());
        key[8..8 + tag.len()].copy_from_slice(tag.as_bytes());
        Normals {
            rng: ChaCha20Rng::from_seed(key),
            spare: None,
        }
    }
    /// Uniform in (0, 1): 53 random bits, never 0.
    fn uniform(&mut self) -> f64 {
        ((self.rng.next_u64() >> 11) as f64 + 0.5) / (1u64 << 53) as f64
    }
    fn normal(&mut self) -> f64 {
        if let Some(v) = self.spare.take() {
            return v;
        }
        let r = (-2.0 * self.uniform().ln()).sqrt();
        let theta = std::f64::consts::TAU * self.uniform();
        self.spare = Some(r * theta.sin());
        r * theta.cos()
    }
}

pub fn run_simulate(args: &SimulateArgs) -> Result<()> {
    if !(0.0..=1.0).contains(&args.effect_fraction) {
        return Err(RiffleError::options("--effect-fraction must lie in [0, 1]"));
    }
    if !(0.0..1.0).contains(&args.missing_fraction) {
        return Err(RiffleError::options(
            "--missing-fraction must lie in [0, 1)",
        ));
    }
    if args.group_sizes.len() != 2 || args.levels.len() != 2 {
        return Err(RiffleError::options(
            "--group-sizes and --levels each take two values, A,B",
        ));
    }
    if args.group_sizes.iter().any(|&n| n < 2) {
        return Err(RiffleError::options(
            "--group-sizes: each group needs at least 2 samples",
        ));
    }
    if args.levels[0] == args.levels[1] {
        return Err(RiffleError::options("--levels: give two different names"));
    }
    let (na, nb) = (args.group_sizes[0], args.group_sizes[1]);
    let samples: Vec<String> = (0..na)
        .map(|i| format!("{}_{:02}", args.levels[0], i + 1))
        .chain((0..nb).map(|i| format!("{}_{:02}", args.levels[1], i + 1)))
        .collect();
    write_sheet(&args.sheet, &samples, na, &args.levels)?;
    let format = match args.format {
        SimFormat::Arrow => MatrixFormat::ArrowIpc,
        SimFormat::Parquet => MatrixFormat::Parquet,
    };
    let value_type = if args.f64 {
        ValueType::F64
    } else {
        ValueType::F32
    };
    let batch = args.batch_rows.max(1);
    let mut writer =
        create_matrix_writer(&args.out, format, "feature", &samples, value_type, batch)?;
    let mut truth = match &args.truth {
        Some(p) => {
            let f = std::fs::File::create(p).at(p)?;
            let mut w = std::io::BufWriter::new(f);
            writeln!(w, "feature\tplanted_shift").at(p)?;
            Some((p.clone(), w))
        }
        None => None,
    };
    let n = na + nb;
    let digits = args.features.max(1).to_string().len();
    let mut rng = Normals::new(args.seed);
    let mut missing = Normals::tagged(args.seed, MISSING_GENERATOR);
    let mut ids = Vec::with_capacity(batch);
    let mut values = Vec::with_capacity(batch * n);
    let mut written = 0u64;
    while written < args.features {
        let rows = (args.features - written).min(batch as u64) as usize;
        ids.clear();
        values.clear();
        for r in 0..rows {
            let index = written + r as u64 + 1;
            let id = format!("{}{:0width$}", args.id_prefix, index, width = digits);
            let mu = 8.0 + 2.0 * rng.normal();
            let sigma = 0.2 - 0.3 * rng.uniform().ln();
            let planted = rng.uniform() < args.effect_fraction;
            let sign = if rng.uniform() < 0.5 { -1.0 } else { 1.0 };
            let shift = if planted {
                sign * args.effect_size * sigma
            } else {
                0.0
            };
            for s in 0..n {
                let v = mu + sigma * rng.normal() + if s >= na { shift } else { 0.0 };
                let left_out =
                    args.missing_fraction > 0.0 && missing.uniform() < args.missing_fraction;
                values.push(if left_out { f64::NAN } else { v });
            }
            if planted {
                if let Some((p, w)) = truth.as_mut() {
                    writeln!(w, "{id}\t{shift}").at(p)?;
                }
            }
            ids.push(id);
        }
        writer.write_block(&ids, &values)?;
        written += rows as u64;
    }
    writer.finish()?;
    if let Some((p, mut w)) = truth {
        w.flush().at(&p)?;
    }
    Ok(())
}

fn write_sheet(path: &Path, samples: &[String], na: usize, levels: &[String]) -> Result<()> {
    let mut text = String::from("sample\tgroup\n");
    for (i, s) in samples.iter().enumerate() {
        let level = if i < na { &levels[0] } else { &levels[1] };
        text.push_str(&format!("{s}\t{level}\n"));
    }
    std::fs::write(path, text).at(path)
}
