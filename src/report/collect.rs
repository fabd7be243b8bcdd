//! One streaming pass over the results table that keeps only what the
//! plots need: fixed histograms, the smallest p-values exactly, and bounded
//! deterministic samples of points. Memory does not grow with the number
//! of features.

use std::collections::{BinaryHeap, HashMap};
use std::fs::File;
use std::io::{BufRead, BufReader};
use std::path::Path;

use arrow_array::{Array, Float64Array, RecordBatch, StringArray};
use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
use parquet::arrow::ProjectionMask;

use crate::error::{IoContext, Result, RiffleError};
use crate::output::TableFormat;

/// Bins of the p-value histograms on [0, 1].
pub const P_BINS: usize = 40;
/// Width of the -log10 p bins behind the QQ plot: finer than a pixel.
pub const QQ_BIN_WIDTH: f64 = 0.001;
/// -log10 p up to the smallest positive f64; p = 0 goes to the top bin.
const QQ_MAX: f64 = 324.0;
/// The smallest p-values kept exactly for the QQ plot.
pub const QQ_EXACT: usize = 2_000;
/// Features passing the FDR level drawn on the volcano plot at most.
pub const VOLCANO_HIT_CAP: usize = 10_000;
/// Other features sampled for the volcano plot.
pub const VOLCANO_SAMPLE: usize = 4_000;
/// Features chosen for null plots when none are named.
pub const DEFAULT_SHOWN: usize = 3;

/// The columns of one results row the report uses.
#[derive(Debug, Clone, Default)]
pub struct ResultRow {
    pub index: u64,
    pub feature: String,
    pub effect: f64,
    pub statistic: f64,
    pub p_param: f64,
    pub p_perm: f64,
    pub q_bh: f64,
    pub note: String,
}

const COLUMNS: [&str; 7] = [
    "feature",
    "effect",
    "statistic",
    "p_param",
    "p_perm",
    "q_bh",
    "note",
];

/// Calls `f` for every row of a results table, in file order.
pub fn stream_results(
    path: &Path,
    format: TableFormat,
    f: &mut dyn FnMut(&ResultRow) -> Result<()>,
) -> Result<()> {
    match format {
        TableFormat::Tsv => stream_tsv(path, f),
        TableFormat::Parquet => stream_parquet(path, f),
    }
}

fn parse_float(path: &Path, line: u64, column: &str, text: &str) -> Result<f64> {
    if text == "NA" || text.is_empty() {
        return Ok(f64::NAN);
    }
    text.parse().map_err(|_| {
        RiffleError::bad_input(
            path,
            format!("line {line}, column '{column}'"),
            format!("expected a number or NA, found '{text}'"),
        )
    })
}

fn stream_tsv(path: &Path, f: &mut dyn FnMut(&ResultRow) -> Result<()>) -> Result<()> {
    let mut reader = BufReader::with_capacity(1 << 20, File::open(path).at(path)?);
    let mut line = String::new();
    if reader.read_line(&mut line).at(path)? == 0 {
        return Err(RiffleError::bad_input(
            path,
            "line 1",
            "the results table is empty",
        ));
    }
    let header: Vec<&str> = line.trim_end_matches(['\n', '\r']).split('\t').collect();
    let mut positions = [0usize; COLUMNS.len()];
    for (slot, name) in positions.iter_mut().zip(COLUMNS) {
        *slot = header.iter().position(|h| *h == name).ok_or_else(|| {
            RiffleError::bad_input(
                path,
                "line 1 (header)",
                format!("no column '{name}'; is this a riffle results table?"),
            )
        })?;
    }
    let width = header.len();
    let mut row = ResultRow::default();
    let mut text = String::new();
    let mut number = 1u64;
    loop {
        text.clear();
        if reader.read_line(&mut text).at(path)? == 0 {
            return Ok(());
        }
        number += 1;
        let mut picked = [""; COLUMNS.len()];
        let mut found = 0;
        for (i, cell) in text.trim_end_matches(['\n', '\r']).split('\t').enumerate() {
            for (slot, &position) in picked.iter_mut().zip(&positions) {
                if position == i {
                    *slot = cell;
                }
            }
            found += 1;
        }
        if found != width {
            return Err(RiffleError::bad_input(
                path,
                format!("line {number}"),
                format!("expected {width} tab-separated cells, found {found}"),
            ));
        }
        let cell = |k: usize| picked[k];
        row.index = number - 2;
        row.feature.clear();
        row.feature.push_str(cell(0));
        row.effect = parse_float(path, number, COLUMNS[1], cell(1))?;
        row.statistic = parse_float(path, number, COLUMNS[2], cell(2))?;
        row.p_param = parse_float(path, number, COLUMNS[3], cell(3))?;
        row.p_perm = parse_float(path, number, COLUMNS[4], cell(4))?;
        row.q_bh = parse_float(path, number, COLUMNS[5], cell(5))?;
        row.note.clear();
        row.note.push_str(cell(6));
        f(&row)?;
    }
}

fn parquet_error(path: &Path, e: impl std::fmt::Display) -> RiffleError {
    RiffleError::bad_input(path, "file", format!("cannot read as Parquet: {e}"))
}

fn stream_parquet(path: &Path, f: &mut dyn FnMut(&ResultRow) -> Result<()>) -> Result<()> {
    let file = File::open(path).at(path)?;
    let builder =
        ParquetRecordBatchReaderBuilder::try_new(file).map_err(|e| parquet_error(path, e))?;
    let schema = builder.schema().clone();
    let mut roots = Vec::with_capacity(COLUMNS.len());
    for name in COLUMNS {
        roots.push(schema.index_of(name).map_err(|_| {
            RiffleError::bad_input(
                path,
                "schema",
                format!("no column '{name}'; is this a riffle results table?"),
            )
        })?);
    }
    let mask = ProjectionMask::roots(builder.parquet_schema(), roots);
    let reader = builder
        .with_projection(mask)
        .with_batch_size(16_384)
        .build()
        .map_err(|e| parquet_error(path, e))?;
    let mut row = ResultRow::default();
    let mut index = 0u64;
    for batch in reader {
        let batch = batch.map_err(|e| parquet_error(path, e))?;
        let text = |name: &str| -> Result<StringArray> {
            column_of::<StringArray>(path, &batch, name, "text (Utf8)")
        };
        let float = |name: &str| -> Result<Float64Array> {
            column_of::<Float64Array>(path, &batch, name, "Float64")
        };
        let (feature, note) = (text("feature")?, text("note")?);
        let floats = [
            float("effect")?,
            float("statistic")?,
            float("p_param")?,
            float("p_perm")?,
            float("q_bh")?,
        ];
        let value = |a: &Float64Array, i: usize| {
            if a.is_null(i) {
                f64::NAN
            } else {
                a.value(i)
            }
        };
        for i in 0..batch.num_rows() {
            row.index = index;
            row.feature.clear();
            row.feature.push_str(feature.value(i));
            row.effect = value(&floats[0], i);
            row.statistic = value(&floats[1], i);
            row.p_param = value(&floats[2], i);
            row.p_perm = value(&floats[3], i);
            row.q_bh = value(&floats[4], i);
            row.note.clear();
            row.note.push_str(note.value(i));
            f(&row)?;
            index += 1;
        }
    }
    Ok(())
}

fn column_of<A: Array + Clone + 'static>(
    path: &Path,
    batch: &RecordBatch,
    name: &str,
    expected: &str,
) -> Result<A> {
    batch
        .column_by_name(name)
        .and_then(|c| c.as_any().downcast_ref::<A>())
        .cloned()
        .ok_or_else(|| {
            RiffleError::bad_input(
                path,
                format!("column '{name}'"),
                format!("expected a {expected} column"),
            )
        })
}

/// Total order on f64 for heaps (NaN never enters them).
#[derive(Debug, Clone, Copy, PartialEq)]
struct Key(f64);
impl Eq for Key {}
impl PartialOrd for Key {
    fn partial_cmp(&self, other: &Self) -> Option<std::cmp::Ordering> {
        Some(self.cmp(other))
    }
}
impl Ord for Key {
    fn cmp(&self, other: &Self) -> std::cmp::Ordering {
        self.0.total_cmp(&other.0)
    }
}

/// Counts on [0, 1] in equal bins.
#[derive(Debug, Clone)]
pub struct UnitHistogram {
    pub counts: Vec<u64>,
    pub total: u64,
}

impl UnitHistogram {
    fn new(bins: usize) -> Self {
        UnitHistogram {
            counts: vec![0; bins],
            total: 0,
        }
    }
    fn add(&mut self, p: f64) {
        let bins = self.counts.len();
        let k = ((p * bins as f64) as usize).min(bins - 1);
        self.counts[k] += 1;
        self.total += 1;
    }
}

/// What the QQ plot needs of one p-value column: the smallest p-values
/// exactly and every -log10 p in fine bins.
#[derive(Debug, Clone)]
pub struct QqSeries {
    pub m: u64,
    /// Bin k counts -log10 p in [k w, (k + 1) w).
    pub bins: Vec<u64>,
    smallest: BinaryHeap<Key>,
}

impl QqSeries {
    fn new() -> Self {
        QqSeries {
            m: 0,
            bins: vec![0; (QQ_MAX / QQ_BIN_WIDTH) as usize + 1],
            smallest: BinaryHeap::with_capacity(QQ_EXACT + 1),
        }
    }
    fn add(&mut self, p: f64) {
        self.m += 1;
        let k = ((-p.log10()).max(0.0) / QQ_BIN_WIDTH) as usize;
        let top = self.bins.len() - 1;
        self.bins[k.min(top)] += 1;
        if self.smallest.len() < QQ_EXACT {
            self.smallest.push(Key(p));
        } else if p < self.smallest.peek().map_or(f64::INFINITY, |k| k.0) {
            self.smallest.pop();
            self.smallest.push(Key(p));
        }
    }
    /// The exactly kept p-values, smallest first.
    pub fn smallest_sorted(&self) -> Vec<f64> {
        let mut v: Vec<f64> = self.smallest.iter().map(|k| k.0).collect();
        v.sort_by(f64::total_cmp);
        v
    }
}

/// A point of the volcano plot: effect and -log10 p_perm.
#[derive(Debug, Clone)]
pub struct VolcanoPoint {
    pub index: u64,
    pub effect: f64,
    pub p: f64,
    pub feature: Option<String>,
}

/// SplitMix64 (Steele, Lea & Flood 2014): a fixed hash of the feature index,
/// so the sample does not depend on chunking or threads.
fn mix(index: u64) -> u64 {
    let mut z = index.wrapping_add(0x9E37_79B9_7F4A_7C15);
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^ (z >> 31)
}

/// Everything gathered from the results table.
#[derive(Debug)]
pub struct Collected {
    pub rows: u64,
    pub p_perm_hist: UnitHistogram,
    pub p_param_hist: UnitHistogram,
    pub qq_perm: QqSeries,
    pub qq_param: QqSeries,
    pub hits_total: u64,
    /// Hits with the smallest p_perm, at most `VOLCANO_HIT_CAP`, by index.
    pub hits: Vec<VolcanoPoint>,
    /// Non-hits sampled by hash, at most `VOLCANO_SAMPLE`, by index.
    pub others: Vec<VolcanoPoint>,
    pub others_total: u64,
    /// The features to show, in the order asked (or by smallest p_perm).
    pub shown: Vec<ResultRow>,
}

/// Streams the table once. `named` are the features asked for by name; when
/// empty, the `DEFAULT_SHOWN` features with the smallest p_perm (ties by
/// p_param, then file order) are chosen.
pub fn collect(path: &Path, format: TableFormat, fdr: f64, named: &[String]) -> Result<Collected> {
    let mut p_perm_hist = UnitHistogram::new(P_BINS);
    let mut p_param_hist = UnitHistogram::new(P_BINS);
    let mut qq_perm = QqSeries::new();
    let mut qq_param = QqSeries::new();
    let mut hits: BinaryHeap<(Key, u64, Key, Option<String>)> = BinaryHeap::new();
    let mut hits_total = 0u64;
    let mut others: BinaryHeap<(u64, u64, Key, Key)> = BinaryHeap::new();
    let mut others_total = 0u64;
    let mut best: Vec<((Key, Key, u64), ResultRow)> = Vec::with_capacity(DEFAULT_SHOWN + 1);
    let wanted: HashMap<&str, usize> = named
        .iter()
        .enumerate()
        .map(|(i, s)| (s.as_str(), i))
        .collect();
    let mut found: Vec<Option<ResultRow>> = vec![None; named.len()];
    let mut rows = 0u64;
    stream_results(path, format, &mut |row| {
        rows += 1;
        if let Some(&slot) = wanted.get(row.feature.as_str()) {
            found[slot].get_or_insert_with(|| row.clone());
        }
        if !row.p_perm.is_nan() {
            p_perm_hist.add(row.p_perm);
            qq_perm.add(row.p_perm);
            if named.is_empty() {
                let key = (Key(row.p_perm), Key(row.p_param), row.index);
                if best.len() < DEFAULT_SHOWN || best.last().is_some_and(|b| key < b.0) {
                    best.push((key, row.clone()));
                    best.sort_by_key(|x| x.0);
                    best.truncate(DEFAULT_SHOWN);
                }
            }
            if !row.effect.is_nan() {
                if row.q_bh <= fdr {
                    hits_total += 1;
                    let key = (Key(row.p_perm), row.index);
                    if hits.len() < VOLCANO_HIT_CAP
                        || key < hits.peek().map(|h| (h.0, h.1)).unwrap_or(key)
                    {
                        hits.push((key.0, key.1, Key(row.effect), Some(row.feature.clone())));
                        if hits.len() > VOLCANO_HIT_CAP {
                            hits.pop();
                        }
                    }
                } else {
                    others_total += 1;
                    let h = mix(row.index);
                    if others.len() < VOLCANO_SAMPLE || h < others.peek().map_or(u64::MAX, |o| o.0)
                    {
                        others.push((h, row.index, Key(row.effect), Key(row.p_perm)));
                        if others.len() > VOLCANO_SAMPLE {
                            others.pop();
                        }
                    }
                }
            }
        }
        if !row.p_param.is_nan() {
            p_param_hist.add(row.p_param);
            qq_param.add(row.p_param);
        }
        Ok(())
    })?;
    let shown = if named.is_empty() {
        best.into_iter().map(|(_, row)| row).collect()
    } else {
        let mut shown = Vec::with_capacity(named.len());
        for (name, row) in named.iter().zip(found) {
            shown.push(row.ok_or_else(|| {
                RiffleError::options(format!(
                    "--show-feature '{name}': no such feature in {}",
                    path.display()
                ))
            })?);
        }
        shown
    };
    let mut hits: Vec<VolcanoPoint> = hits
        .into_iter()
        .map(|(p, index, effect, feature)| VolcanoPoint {
            index,
            effect: effect.0,
            p: p.0,
            feature,
        })
        .collect();
    hits.sort_by_key(|h| h.index);
    let mut others: Vec<VolcanoPoint> = others
        .into_iter()
        .map(|(_, index, effect, p)| VolcanoPoint {
            index,
            effect: effect.0,
            p: p.0,
            feature: None,
        })
        .collect();
    others.sort_by_key(|o| o.index);
    Ok(Collected {
        rows,
        p_perm_hist,
        p_param_hist,
        qq_perm,
        qq_param,
        hits_total,
        hits,
        others,
        others_total,
        shown,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn qq_series_keeps_the_smallest_exactly_and_counts_all() {
        let mut s = QqSeries::new();
        for i in 0..10_000u64 {
            s.add((mix(i) >> 11) as f64 / (1u64 << 53) as f64);
        }
        assert_eq!(s.m, 10_000);
        assert_eq!(s.bins.iter().sum::<u64>(), 10_000);
        let smallest = s.smallest_sorted();
        assert_eq!(smallest.len(), QQ_EXACT);
        assert!(smallest.windows(2).all(|w| w[0] <= w[1]));
    }

    #[test]
    fn unit_histogram_puts_one_in_the_last_bin() {
        let mut h = UnitHistogram::new(4);
        for p in [0.0, 0.25, 0.5, 0.99, 1.0] {
            h.add(p);
        }
        assert_eq!(h.counts, vec![1, 1, 1, 2]);
    }
}
