//! Multiple-testing adjustment of per-feature p-values that may not fit in
//! memory: Benjamini–Hochberg, Benjamini–Yekutieli, Storey q-values, Holm,
//! Hochberg and Bonferroni.
//!
//! The p-values are read from a re-readable [`PValueSource`]. A first
//! reading counts them and collects their distinct values while those fit
//! in the memory budget: permutation p-values (b+1)/(B+1) take at most B+1
//! distinct values, so the usual case needs memory in B, not in the number
//! of features. Otherwise an external sort on scratch files does the same
//! work in bounded memory. Both ways compute the adjusted values per
//! distinct p-value with the same code, so their results are bit-identical.

mod kernels;
mod pi0;
mod spill;

#[cfg(test)]
mod tests;

use std::collections::HashMap;
use std::hash::{BuildHasherDefault, Hasher};
use std::path::{Path, PathBuf};

use crate::error::{Result, RiffleError};
use kernels::{step_up_methods, Constants, RowAssembler, StepUp};
use pi0::GridCounts;

/// Levels at which [`AdjustSummary::rejections`] counts adjusted values.
pub const REJECTION_LEVELS: [f64; 3] = [0.01, 0.05, 0.1];

/// Resamples of the bootstrap choice of Storey's lambda.
pub const BOOTSTRAP_RESAMPLES: u32 = 100;

/// Budgets below this are raised to it: below it, per-file buffers would
/// dominate and the external sort would only get slower.
pub const MIN_MEMORY_BYTES: usize = 64 << 10;

#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Method {
    /// Benjamini & Hochberg (1995) step-up false discovery rate.
    Bh,
    /// Benjamini & Yekutieli (2001): BH times c(m) = sum 1/i, valid under
    /// any dependence.
    By,
    /// Storey (2002) q-values: BH scaled by the estimated null proportion.
    Storey,
    /// Holm (1979) step-down family-wise error rate.
    Holm,
    /// Hochberg (1988) step-up family-wise error rate.
    Hochberg,
    Bonferroni,
}

impl Method {
    pub const ALL: [Method; 6] = [
        Method::Bh,
        Method::By,
        Method::Storey,
        Method::Holm,
        Method::Hochberg,
        Method::Bonferroni,
    ];

    /// Column name of the adjusted values in output tables.
    pub fn name(self) -> &'static str {
        match self {
            Method::Bh => "q_bh",
            Method::By => "q_by",
            Method::Storey => "q_storey",
            Method::Holm => "p_holm",
            Method::Hochberg => "p_hochberg",
            Method::Bonferroni => "p_bonferroni",
        }
    }
}

/// How Storey's lambda is chosen.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub enum LambdaChoice {
    /// pi0 = #{p > lambda} / ((1 - lambda) m), lambda in [0, 1).
    Fixed(f64),
    /// Bootstrap choice over 0, 0.05, ..., 0.95 of Storey, Taylor &
    /// Siegmund (2004), JRSS-B 66.
    Bootstrap,
}

#[derive(Debug, Clone)]
pub struct AdjustOptions {
    /// Output columns, in this order.
    pub methods: Vec<Method>,
    pub lambda: LambdaChoice,
    /// Approximate bound on the memory used, whatever the number of
    /// p-values (raised to [`MIN_MEMORY_BYTES`]).
    pub memory_bytes: usize,
    /// Where the external sort puts its files (in a private subdirectory
    /// removed at the end, also on error).
    pub scratch_dir: PathBuf,
    /// Seed of the ChaCha20 generator of the lambda bootstrap.
    pub bootstrap_seed: u64,
}

impl Default for AdjustOptions {
    fn default() -> Self {
        AdjustOptions {
            methods: Method::ALL.to_vec(),
            lambda: LambdaChoice::Fixed(0.5),
            memory_bytes: 256 << 20,
            scratch_dir: std::env::temp_dir(),
            bootstrap_seed: 20040101,
        }
    }
}

/// A re-readable stream of p-values in original order (NaN = missing).
/// Each call to `for_each` reads all of them again from the start.
pub trait PValueSource {
    fn for_each(&mut self, f: &mut dyn FnMut(f64) -> Result<()>) -> Result<()>;

    /// File and place (row, column...) of the p-value at `index`, for the
    /// message when that value is not a p-value.
    fn location(&self, index: u64) -> (PathBuf, String) {
        (PathBuf::from("p-values"), format!("p-value {}", index + 1))
    }
}

/// p-values held in memory.
pub struct SlicePValues<'a>(pub &'a [f64]);

impl PValueSource for SlicePValues<'_> {
    fn for_each(&mut self, f: &mut dyn FnMut(f64) -> Result<()>) -> Result<()> {
        self.0.iter().try_for_each(|&p| f(p))
    }
}

#[derive(Debug, Clone, PartialEq)]
pub struct AdjustSummary {
    /// Number of non-missing p-values.
    pub m: u64,
    pub n_missing: u64,
    /// Storey's pi0 (capped at 1); NaN when m = 0.
    pub pi0: f64,
    /// The lambda pi0 was computed at (fixed or chosen by bootstrap).
    pub lambda: f64,
    /// Per method, how many adjusted values are <= each of
    /// [`REJECTION_LEVELS`].
    pub rejections: Vec<(Method, [u64; 3])>,
    /// True when the distinct p-values exceeded the memory budget and the
    /// external sort was used.
    pub used_external_sort: bool,
}

/// Calls `sink(index, adjusted)` once per input p-value, in original order
/// (index 0, 1, 2, ...), `adjusted[k]` for `opts.methods[k]` (NaN where p
/// is missing). Reads the source two or three times.
pub fn adjust(
    source: &mut dyn PValueSource,
    opts: &AdjustOptions,
    sink: &mut dyn FnMut(u64, &[f64]) -> Result<()>,
) -> Result<AdjustSummary> {
    adjust_with_distinct_cap(source, opts, None, sink)
}

/// `distinct_cap` overrides the number of distinct p-values kept in memory
/// (tests use it to force the external sort on small inputs).
fn adjust_with_distinct_cap(
    source: &mut dyn PValueSource,
    opts: &AdjustOptions,
    distinct_cap: Option<usize>,
    sink: &mut dyn FnMut(u64, &[f64]) -> Result<()>,
) -> Result<AdjustSummary> {
    check_options(opts)?;
    let memory_bytes = opts.memory_bytes.max(MIN_MEMORY_BYTES);
    let methods = &opts.methods;
    // Hash entry with room for the table's growth, sorted (p, count), and
    // two rows of results (step-up values, then all) per distinct p.
    let bytes_per_distinct = 64 + 16 * methods.len();
    let distinct_cap = distinct_cap.unwrap_or(memory_bytes / bytes_per_distinct);

    let first = first_reading(source, opts, distinct_cap)?;
    let (pi0, lambda) = estimate_pi0(&first, opts)?;
    let constants = Constants::new(first.m, pi0);
    let mut emitter = Emitter::new(sink, methods);
    let used_external_sort = match first.distinct {
        Some(counts) => {
            adjust_in_table(source, methods, constants, counts, &mut emitter)?;
            false
        }
        None => {
            spill::adjust_external(
                source,
                methods,
                constants,
                first.n_total,
                &opts.scratch_dir,
                spill::Budget::new(memory_bytes),
                &mut emitter,
            )?;
            true
        }
    };
    if emitter.next_index != first.n_total {
        return Err(RiffleError::Internal(format!(
            "emitted {} adjusted rows for {} p-values",
            emitter.next_index, first.n_total
        )));
    }
    Ok(AdjustSummary {
        m: first.m,
        n_missing: first.n_total - first.m,
        pi0: if first.m == 0 { f64::NAN } else { pi0 },
        lambda,
        rejections: methods.iter().copied().zip(emitter.rejections).collect(),
        used_external_sort,
    })
}

/// [`adjust`] on p-values in memory; returns one column per method.
pub fn adjust_in_memory(p: &[f64], opts: &AdjustOptions) -> Result<(Vec<Vec<f64>>, AdjustSummary)> {
    let mut columns = vec![Vec::with_capacity(p.len()); opts.methods.len()];
    let summary = adjust(&mut SlicePValues(p), opts, &mut |_, row| {
        for (column, &v) in columns.iter_mut().zip(row) {
            column.push(v);
        }
        Ok(())
    })?;
    Ok((columns, summary))
}

fn check_options(opts: &AdjustOptions) -> Result<()> {
    if opts.methods.is_empty() {
        return Err(RiffleError::options("no multiple-testing method selected"));
    }
    if let LambdaChoice::Fixed(lambda) = opts.lambda {
        if !(0.0..1.0).contains(&lambda) {
            return Err(RiffleError::options(format!(
                "Storey lambda must be in [0, 1), got {lambda}"
            )));
        }
    }
    Ok(())
}

/// Count (later row) per distinct p-value, keyed by its bits. The keys
/// are not chosen by an adversary, so a multiply-and-fold hash does instead
/// of SipHash, which showed in the profile of the final pass (two lookups
/// per feature). Its iteration order plays no part: the entries are sorted.
type BitsMap = HashMap<u64, u64, BuildHasherDefault<BitsHasher>>;

#[derive(Default)]
struct BitsHasher(u64);

impl Hasher for BitsHasher {
    fn write(&mut self, bytes: &[u8]) {
        for &b in bytes {
            self.write_u64(u64::from(b) ^ self.0.rotate_left(8));
        }
    }

    fn write_u64(&mut self, v: u64) {
        // Fold the high half of the product into the low half: the table
        // indexes by the low bits, and p-values such as k / 2^n have all
        // their low mantissa bits zero.
        let h = (v ^ self.0).wrapping_mul(0x9e37_79b9_7f4a_7c15);
        self.0 = h ^ (h >> 32);
    }

    fn finish(&self) -> u64 {
        self.0
    }
}

struct FirstReading {
    n_total: u64,
    m: u64,
    grid: GridCounts,
    /// #{p > lambda} for a fixed lambda.
    above_fixed: u64,
    /// Count per distinct p (keyed by bits), None once over the cap.
    distinct: Option<BitsMap>,
}

fn first_reading(
    source: &mut dyn PValueSource,
    opts: &AdjustOptions,
    distinct_cap: usize,
) -> Result<FirstReading> {
    let fixed_lambda = match opts.lambda {
        LambdaChoice::Fixed(lambda) => lambda,
        LambdaChoice::Bootstrap => 0.0,
    };
    let mut reading = FirstReading {
        n_total: 0,
        m: 0,
        grid: GridCounts::default(),
        above_fixed: 0,
        distinct: Some(BitsMap::default()),
    };
    let mut invalid: Option<(u64, f64)> = None;
    let outcome = source.for_each(&mut |p| {
        let index = reading.n_total;
        reading.n_total += 1;
        if p.is_nan() {
            return Ok(());
        }
        if !(0.0..=1.0).contains(&p) {
            invalid = Some((index, p));
            return Err(RiffleError::Internal("invalid p-value".into()));
        }
        let p = p + 0.0;
        reading.m += 1;
        reading.grid.add(p);
        if p > fixed_lambda {
            reading.above_fixed += 1;
        }
        if let Some(distinct) = reading.distinct.as_mut() {
            *distinct.entry(p.to_bits()).or_insert(0) += 1;
            if distinct.len() > distinct_cap {
                reading.distinct = None;
            }
        }
        Ok(())
    });
    if let Some((index, p)) = invalid {
        let (path, place) = source.location(index);
        return Err(invalid_p_value(&path, place, p));
    }
    outcome?;
    Ok(reading)
}

fn invalid_p_value(path: &Path, place: String, p: f64) -> RiffleError {
    RiffleError::bad_input(
        path,
        place,
        format!("expected a p-value in [0, 1] or NaN for missing, found {p}"),
    )
}

fn estimate_pi0(reading: &FirstReading, opts: &AdjustOptions) -> Result<(f64, f64)> {
    let (lambda, pi0) = if reading.m == 0 {
        match opts.lambda {
            LambdaChoice::Fixed(lambda) => (lambda, 1.0),
            LambdaChoice::Bootstrap => (f64::NAN, 1.0),
        }
    } else {
        match opts.lambda {
            LambdaChoice::Fixed(lambda) => (
                lambda,
                pi0::storey_pi0(reading.above_fixed, lambda, reading.m),
            ),
            LambdaChoice::Bootstrap => pi0::bootstrap_lambda(
                &reading.grid,
                reading.m,
                BOOTSTRAP_RESAMPLES,
                opts.bootstrap_seed,
            ),
        }
    };
    Ok((pi0.min(1.0), lambda))
}

/// Passes rows to the caller's sink in index order and counts rejections.
pub(crate) struct Emitter<'a> {
    sink: &'a mut dyn FnMut(u64, &[f64]) -> Result<()>,
    next_index: u64,
    rejections: Vec<[u64; 3]>,
}

impl<'a> Emitter<'a> {
    fn new(sink: &'a mut dyn FnMut(u64, &[f64]) -> Result<()>, methods: &[Method]) -> Self {
        Emitter {
            sink,
            next_index: 0,
            rejections: vec![[0; 3]; methods.len()],
        }
    }

    pub(crate) fn emit(&mut self, index: u64, row: &[f64]) -> Result<()> {
        if index != self.next_index {
            return Err(RiffleError::Internal(format!(
                "adjusted row {index} emitted where row {} was due",
                self.next_index
            )));
        }
        for (counts, &v) in self.rejections.iter_mut().zip(row) {
            for (count, &level) in counts.iter_mut().zip(&REJECTION_LEVELS) {
                if v <= level {
                    *count += 1;
                }
            }
        }
        self.next_index += 1;
        (self.sink)(index, row)
    }
}

/// Fast path: all distinct p-values with their counts are in memory.
fn adjust_in_table(
    source: &mut dyn PValueSource,
    methods: &[Method],
    constants: Constants,
    mut distinct: BitsMap,
    emitter: &mut Emitter<'_>,
) -> Result<()> {
    let n_methods = methods.len();
    // For p >= 0 the order of the bits is the numeric order.
    let mut blocks: Vec<(u64, u64)> = distinct.iter().map(|(&b, &c)| (b, c)).collect();
    blocks.sort_unstable();

    let up_methods = step_up_methods(methods);
    let mut up_values = vec![0.0f64; blocks.len() * up_methods.len()];
    let mut step_up = StepUp::new(constants, &up_methods);
    for (row, &(bits, count)) in blocks.iter().enumerate().rev() {
        let out = &mut up_values[row * up_methods.len()..(row + 1) * up_methods.len()];
        step_up.push(f64::from_bits(bits), count, out);
    }

    let mut rows = vec![0.0f64; blocks.len() * n_methods];
    let mut assembler = RowAssembler::new(constants, methods);
    for (row, &(bits, count)) in blocks.iter().enumerate() {
        let up = &up_values[row * up_methods.len()..(row + 1) * up_methods.len()];
        let out = &mut rows[row * n_methods..(row + 1) * n_methods];
        assembler.push(f64::from_bits(bits), count, up, out);
        // The map now points from a p-value to its row.
        distinct.insert(bits, row as u64);
    }
    drop(up_values);
    drop(blocks);

    let missing_row = vec![f64::NAN; n_methods];
    let mut index = 0u64;
    source.for_each(&mut |p| {
        let row = if p.is_nan() {
            &missing_row[..]
        } else {
            let Some(&row) = distinct.get(&(p + 0.0).to_bits()) else {
                return Err(RiffleError::Internal(
                    "the p-values changed between two readings of the source".into(),
                ));
            };
            let row = row as usize;
            &rows[row * n_methods..(row + 1) * n_methods]
        };
        emitter.emit(index, row)?;
        index += 1;
        Ok(())
    })
}
