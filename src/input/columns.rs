//! Format-independent parts of reading: resolving the requested columns
//! against a schema, and turning Arrow record batches into row-major blocks.

use std::path::{Path, PathBuf};

use arrow_array::{
    Array, ArrayRef, Float32Array, Float64Array, Int32Array, Int64Array, LargeStringArray,
    RecordBatch, StringArray, StringViewArray,
};
use arrow_schema::{DataType, Schema};

use super::{FeatureBlock, FeatureSource, MatrixInfo};
use crate::error::{Result, RiffleError};

/// How many names to show when listing missing or available columns.
const NAMES_SHOWN: usize = 5;

/// Where the id column and the requested sample columns sit in a schema.
#[derive(Debug, Clone)]
pub(crate) struct ColumnPlan {
    pub id_index: usize,
    /// File column index of each requested sample, in request order.
    pub sample_indices: Vec<usize>,
    /// All numeric columns except the id column, in file order.
    pub numeric_columns: Vec<String>,
}

impl ColumnPlan {
    /// The id column followed by the samples in request order.
    pub fn projection(&self) -> Vec<usize> {
        std::iter::once(self.id_index)
            .chain(self.sample_indices.iter().copied())
            .collect()
    }
}

pub(crate) fn is_id_type(data_type: &DataType) -> bool {
    matches!(
        data_type,
        DataType::Utf8 | DataType::LargeUtf8 | DataType::Utf8View
    )
}

pub(crate) fn is_value_type(data_type: &DataType) -> bool {
    matches!(
        data_type,
        DataType::Float32 | DataType::Float64 | DataType::Int32 | DataType::Int64
    )
}

fn quoted_list(names: &[&str], total: usize) -> String {
    let mut text = names
        .iter()
        .take(NAMES_SHOWN)
        .map(|n| format!("'{n}'"))
        .collect::<Vec<_>>()
        .join(", ");
    if total > NAMES_SHOWN {
        text.push_str(&format!(" and {} more", total - NAMES_SHOWN));
    }
    text
}

pub(crate) fn plan_columns(
    path: &Path,
    schema: &Schema,
    id_column: &str,
    samples: &[String],
) -> Result<ColumnPlan> {
    let fields = schema.fields();
    let find_unique = |name: &str| -> Result<Option<usize>> {
        let mut matches = fields.iter().enumerate().filter(|(_, f)| f.name() == name);
        let first = matches.next().map(|(i, _)| i);
        if first.is_some() && matches.next().is_some() {
            return Err(RiffleError::bad_input(
                path,
                format!("column '{name}'"),
                "the file has several columns of this name; column names must be unique",
            ));
        }
        Ok(first)
    };

    let id_index = match find_unique(id_column)? {
        Some(i) => i,
        None => {
            let names: Vec<&str> = fields.iter().map(|f| f.name().as_str()).collect();
            return Err(RiffleError::bad_input(
                path,
                "column list",
                format!(
                    "no feature id column '{id_column}'; the file has {} column(s): {}",
                    names.len(),
                    quoted_list(&names, names.len())
                ),
            ));
        }
    };
    let id_type = fields[id_index].data_type();
    if !is_id_type(id_type) {
        return Err(RiffleError::bad_input(
            path,
            format!("column '{id_column}'"),
            format!(
                "the feature id column must hold strings (Utf8, LargeUtf8 or Utf8View), \
                 found {id_type}"
            ),
        ));
    }

    let mut sample_indices = Vec::with_capacity(samples.len());
    let mut missing: Vec<&str> = Vec::new();
    for sample in samples {
        match find_unique(sample)? {
            Some(i) => sample_indices.push(i),
            None => missing.push(sample),
        }
    }
    if !missing.is_empty() {
        return Err(RiffleError::bad_input(
            path,
            "column list",
            format!(
                "{} of {} samples named in the sample sheet have no column in this matrix: {}",
                missing.len(),
                samples.len(),
                quoted_list(&missing, missing.len())
            ),
        ));
    }
    for (sample, &index) in samples.iter().zip(&sample_indices) {
        let data_type = fields[index].data_type();
        if !is_value_type(data_type) {
            return Err(RiffleError::bad_input(
                path,
                format!("column '{sample}'"),
                format!(
                    "sample columns must be numeric (Float32, Float64, Int32 or Int64), \
                     found {data_type}"
                ),
            ));
        }
    }

    let numeric_columns = fields
        .iter()
        .enumerate()
        .filter(|(i, f)| *i != id_index && is_value_type(f.data_type()))
        .map(|(_, f)| f.name().clone())
        .collect();
    Ok(ColumnPlan {
        id_index,
        sample_indices,
        numeric_columns,
    })
}

enum IdColumn {
    Utf8(StringArray),
    LargeUtf8(LargeStringArray),
    Utf8View(StringViewArray),
}

impl IdColumn {
    fn value(&self, row: usize) -> &str {
        match self {
            IdColumn::Utf8(a) => a.value(row),
            IdColumn::LargeUtf8(a) => a.value(row),
            IdColumn::Utf8View(a) => a.value(row),
        }
    }

    /// Address ranges of the offsets and text of rows `0..rows` (none for
    /// views, whose text may sit anywhere in their buffers).
    fn prefix(&self, rows: usize) -> [(usize, usize); 2] {
        fn of<O: arrow_array::OffsetSizeTrait>(
            a: &arrow_array::GenericStringArray<O>,
            rows: usize,
        ) -> [(usize, usize); 2] {
            let offsets = a.value_offsets();
            let text_end = offsets[rows].as_usize();
            [
                (offsets.as_ptr() as usize, rows * std::mem::size_of::<O>()),
                (a.value_data().as_ptr() as usize, text_end),
            ]
        }
        match self {
            IdColumn::Utf8(a) => of(a, rows),
            IdColumn::LargeUtf8(a) => of(a, rows),
            IdColumn::Utf8View(_) => [(0, 0); 2],
        }
    }
}

pub(crate) enum ValueColumn {
    F32(Float32Array),
    F64(Float64Array),
    I32(Int32Array),
    I64(Int64Array),
}

impl ValueColumn {
    fn nulls(&self) -> Option<&arrow_buffer::NullBuffer> {
        let nulls = match self {
            ValueColumn::F32(a) => a.nulls(),
            ValueColumn::F64(a) => a.nulls(),
            ValueColumn::I32(a) => a.nulls(),
            ValueColumn::I64(a) => a.nulls(),
        };
        nulls.filter(|n| n.null_count() > 0)
    }

    /// Address and length in bytes of the values of rows `0..rows`.
    fn values_prefix(&self, rows: usize) -> (usize, usize) {
        let (ptr, width) = match self {
            ValueColumn::F32(a) => (a.values().inner().as_ptr(), 4),
            ValueColumn::F64(a) => (a.values().inner().as_ptr(), 8),
            ValueColumn::I32(a) => (a.values().inner().as_ptr(), 4),
            ValueColumn::I64(a) => (a.values().inner().as_ptr(), 8),
        };
        (ptr as usize, rows * width)
    }

    #[cfg(test)]
    pub fn values_ptr(&self) -> *const u8 {
        match self {
            ValueColumn::F32(a) => a.values().inner().as_ptr(),
            ValueColumn::F64(a) => a.values().inner().as_ptr(),
            ValueColumn::I32(a) => a.values().inner().as_ptr(),
            ValueColumn::I64(a) => a.values().inner().as_ptr(),
        }
    }
}

/// One decoded record batch restricted to the id and requested sample columns.
pub(crate) struct LoadedBatch {
    pub rows: usize,
    ids: IdColumn,
    pub(crate) values: Vec<ValueColumn>,
}

/// Downcast an array whose type was checked against the schema already; a
/// mismatch here means the file's data disagrees with its own schema.
fn downcast<T: Clone + 'static>(
    path: &Path,
    place: impl Fn() -> String,
    array: &ArrayRef,
) -> Result<T> {
    array.as_any().downcast_ref::<T>().cloned().ok_or_else(|| {
        RiffleError::bad_input(
            path,
            place(),
            format!(
                "the data has type {} which disagrees with the file's schema",
                array.data_type()
            ),
        )
    })
}

impl LoadedBatch {
    /// `batch` holds the id column first, then the samples in request order;
    /// `first_index` (the batch's first row in the matrix) places errors.
    pub fn new(
        path: &Path,
        batch: &RecordBatch,
        first_index: u64,
        id_column: &str,
        samples: &[String],
    ) -> Result<Self> {
        let columns = batch.columns();
        if columns.len() != samples.len() + 1 {
            return Err(RiffleError::Internal(format!(
                "decoded batch has {} columns, expected {}",
                columns.len(),
                samples.len() + 1
            )));
        }
        let id_place = || format!("column '{id_column}'");
        let id_array = &columns[0];
        let ids = match id_array.data_type() {
            DataType::Utf8 => IdColumn::Utf8(downcast(path, id_place, id_array)?),
            DataType::LargeUtf8 => IdColumn::LargeUtf8(downcast(path, id_place, id_array)?),
            DataType::Utf8View => IdColumn::Utf8View(downcast(path, id_place, id_array)?),
            other => {
                return Err(RiffleError::bad_input(
                    path,
                    id_place(),
                    format!("the feature id column must hold strings, found {other}"),
                ))
            }
        };
        if let Some(nulls) = id_array.nulls().filter(|n| n.null_count() > 0) {
            let row = (0..batch.num_rows())
                .find(|&r| nulls.is_null(r))
                .unwrap_or(0);
            return Err(RiffleError::bad_input(
                path,
                format!(
                    "feature row {}, column '{id_column}'",
                    first_index + row as u64 + 1
                ),
                "the feature id is missing (null); every feature needs an id",
            ));
        }
        let mut values = Vec::with_capacity(samples.len());
        for (sample, array) in samples.iter().zip(&columns[1..]) {
            let place = || format!("column '{sample}'");
            values.push(match array.data_type() {
                DataType::Float32 => ValueColumn::F32(downcast(path, place, array)?),
                DataType::Float64 => ValueColumn::F64(downcast(path, place, array)?),
                DataType::Int32 => ValueColumn::I32(downcast(path, place, array)?),
                DataType::Int64 => ValueColumn::I64(downcast(path, place, array)?),
                other => {
                    return Err(RiffleError::bad_input(
                        path,
                        place(),
                        format!("sample columns must be numeric, found {other}"),
                    ))
                }
            });
        }
        Ok(LoadedBatch {
            rows: batch.num_rows(),
            ids,
            values,
        })
    }

    /// Address ranges (start, length in bytes) of each value column's and
    /// the ids' rows `0..rows`: the part of the batch already read.
    pub(crate) fn consumed(&self, rows: usize) -> impl Iterator<Item = (usize, usize)> + '_ {
        self.values
            .iter()
            .map(move |c| c.values_prefix(rows))
            .chain(self.ids.prefix(rows))
    }

    /// Copy ids of rows `start..start + n` into `ids[at..]`, reusing the
    /// strings already there so that steady-state reading does not allocate.
    fn copy_ids(&self, start: usize, n: usize, ids: &mut Vec<String>, at: usize) {
        for k in 0..n {
            let id = self.ids.value(start + k);
            match ids.get_mut(at + k) {
                Some(slot) => {
                    slot.clear();
                    slot.push_str(id);
                }
                None => ids.push(id.to_owned()),
            }
        }
    }

    /// Write rows `start..start + n` row-major into `out` (`n * n_samples`).
    fn write_rows(&self, start: usize, n: usize, out: &mut [f64]) {
        let n_samples = self.values.len();
        debug_assert_eq!(out.len(), n * n_samples);
        let mut tile_start = 0;
        while tile_start < n {
            let tile_rows = TILE_ROWS.min(n - tile_start);
            let tile_out = &mut out[tile_start * n_samples..(tile_start + tile_rows) * n_samples];
            let from = start + tile_start;
            for (sample, column) in self.values.iter().enumerate() {
                match column {
                    ValueColumn::F32(a) => scatter(
                        &a.values()[from..from + tile_rows],
                        tile_out,
                        sample,
                        n_samples,
                    ),
                    ValueColumn::F64(a) => scatter(
                        &a.values()[from..from + tile_rows],
                        tile_out,
                        sample,
                        n_samples,
                    ),
                    ValueColumn::I32(a) => scatter(
                        &a.values()[from..from + tile_rows],
                        tile_out,
                        sample,
                        n_samples,
                    ),
                    ValueColumn::I64(a) => scatter(
                        &a.values()[from..from + tile_rows],
                        tile_out,
                        sample,
                        n_samples,
                    ),
                }
                if let Some(nulls) = column.nulls() {
                    for r in 0..tile_rows {
                        if nulls.is_null(from + r) {
                            tile_out[r * n_samples + sample] = f64::NAN;
                        }
                    }
                }
            }
            tile_start += tile_rows;
        }
    }
}

/// Rows per transpose tile: the tile's output (`rows x samples` f64) stays
/// in L1/L2 cache while each column's slice is read sequentially.
const TILE_ROWS: usize = 64;

trait WidenToF64: Copy {
    fn widen(self) -> f64;
}
impl WidenToF64 for f32 {
    #[inline(always)]
    fn widen(self) -> f64 {
        self as f64
    }
}
impl WidenToF64 for f64 {
    #[inline(always)]
    fn widen(self) -> f64 {
        self
    }
}
impl WidenToF64 for i32 {
    #[inline(always)]
    fn widen(self) -> f64 {
        self as f64
    }
}
impl WidenToF64 for i64 {
    #[inline(always)]
    fn widen(self) -> f64 {
        self as f64
    }
}

#[inline(always)]
fn scatter<T: WidenToF64>(column: &[T], tile_out: &mut [f64], sample: usize, n_samples: usize) {
    for (row, &value) in tile_out.chunks_exact_mut(n_samples).zip(column) {
        row[sample] = value.widen();
    }
}

/// A format reader that hands out whole record batches in file order.
pub(crate) trait BatchSource: Send {
    fn info(&self) -> &MatrixInfo;
    /// Reposition so that the next batch returned contains `feature_index`
    /// (which is below `n_features`); returns that batch's first index.
    fn seek_batch(&mut self, feature_index: u64) -> Result<u64>;
    /// The next batch, or None at the end. The previous batch has been
    /// dropped by the caller, so its memory may be released.
    fn next_batch(&mut self) -> Result<Option<LoadedBatch>>;
    /// Rows `0..rows` of `batch` (the current one) have been read and will
    /// not be read again before the next batch: a memory-mapped source may
    /// hand their pages back.
    fn consumed(&mut self, _batch: &LoadedBatch, _rows: usize) {}
}

/// Row-level cursor over a [`BatchSource`], implementing [`FeatureSource`].
pub(crate) struct RowStream<S: BatchSource> {
    source: S,
    current: Option<LoadedBatch>,
    /// Next row to hand out within `current`.
    row_in_batch: usize,
    /// Rows of the next batch to skip after a seek into its middle.
    pending_skip: u64,
    next_index: u64,
    n_samples: usize,
    path: PathBuf,
}

impl<S: BatchSource> RowStream<S> {
    pub fn new(source: S, n_samples: usize) -> Self {
        let path = source.info().path.clone();
        RowStream {
            source,
            current: None,
            row_in_batch: 0,
            pending_skip: 0,
            next_index: 0,
            n_samples,
            path,
        }
    }

    #[cfg(test)]
    pub fn current_batch(&self) -> Option<&LoadedBatch> {
        self.current.as_ref()
    }
}

impl<S: BatchSource> FeatureSource for RowStream<S> {
    fn info(&self) -> &MatrixInfo {
        self.source.info()
    }

    fn seek(&mut self, feature_index: u64) -> Result<()> {
        let n_features = self.source.info().n_features;
        if feature_index > n_features {
            return Err(RiffleError::options(format!(
                "{}: cannot start at feature {feature_index}: the matrix has {n_features} features",
                self.path.display()
            )));
        }
        self.current = None;
        self.row_in_batch = 0;
        self.next_index = feature_index;
        self.pending_skip = 0;
        if feature_index < n_features {
            let batch_start = self.source.seek_batch(feature_index)?;
            self.pending_skip = feature_index - batch_start;
        } else {
            self.source.seek_batch(feature_index)?;
        }
        Ok(())
    }

    fn next_block(&mut self, max_rows: usize, block: &mut FeatureBlock) -> Result<usize> {
        if max_rows == 0 {
            return Err(RiffleError::Internal(
                "next_block asked for 0 rows".to_string(),
            ));
        }
        let n_samples = self.n_samples;
        block.first_index = self.next_index;
        block.n_samples = n_samples;
        let wanted_values = max_rows * n_samples;
        if block.values.len() < wanted_values {
            block.values.resize(wanted_values, 0.0);
        }
        let mut rows = 0;
        while rows < max_rows {
            let exhausted = match &self.current {
                Some(batch) => self.row_in_batch >= batch.rows,
                None => true,
            };
            if exhausted {
                // Drop before asking for the next so the source may release it.
                self.current = None;
                match self.source.next_batch()? {
                    None => break,
                    Some(batch) => {
                        let skip = self.pending_skip.min(batch.rows as u64);
                        self.pending_skip -= skip;
                        self.row_in_batch = skip as usize;
                        self.current = Some(batch);
                    }
                }
                continue;
            }
            let Some(batch) = &self.current else {
                break;
            };
            let n = (batch.rows - self.row_in_batch).min(max_rows - rows);
            batch.copy_ids(self.row_in_batch, n, &mut block.ids, rows);
            batch.write_rows(
                self.row_in_batch,
                n,
                &mut block.values[rows * n_samples..(rows + n) * n_samples],
            );
            rows += n;
            self.row_in_batch += n;
        }
        if let Some(batch) = &self.current {
            self.source.consumed(batch, self.row_in_batch);
        }
        block.ids.truncate(rows);
        block.values.truncate(rows * n_samples);
        self.next_index += rows as u64;
        Ok(rows)
    }
}
