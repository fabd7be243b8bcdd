//! Results tables: Parquet (default) or TSV, one row per feature, written
//! in batches under a temporary name and renamed when complete.

use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};
use std::sync::Arc;

use arrow_array::builder::{Float64Builder, StringBuilder, UInt64Builder};
use arrow_array::{ArrayRef, RecordBatch};
use arrow_schema::{DataType, Field, Schema};
use parquet::basic::{Compression, ZstdLevel};
use parquet::file::properties::{EnabledStatistics, WriterProperties};
use parquet::schema::types::ColumnPath;

use super::encode::RowGroupEncoder;
use crate::error::{IoContext, Result, RiffleError};
use crate::spill::temp_name;

/// Rows per Parquet row group of a results table. The writer holds a whole
/// row group in memory, so the library default (about a million rows, some
/// 100 MB of columns) would make peak memory grow with the number of
/// features up to that size; fixed (not derived from --memory) so that the
/// output bytes do not depend on the memory budget.
const RESULTS_ROW_GROUP_ROWS: usize = 65_536;

#[derive(
    Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize, clap::ValueEnum,
)]
#[serde(rename_all = "kebab-case")]
pub enum TableFormat {
    Parquet,
    Tsv,
}

impl TableFormat {
    pub fn file_name(self, stem: &str) -> String {
        match self {
            TableFormat::Parquet => format!("{stem}.parquet"),
            TableFormat::Tsv => format!("{stem}.tsv"),
        }
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ColumnKind {
    Text,
    Float,
    Count,
}

#[derive(Debug, Clone, Copy)]
pub enum Cell<'a> {
    Text(&'a str),
    Float(f64),
    Count(u64),
}

/// Streams rows of a fixed set of columns to a table file.
pub trait TableWriter {
    fn write_row(&mut self, cells: &[Cell<'_>]) -> Result<()>;
    fn finish(self: Box<Self>) -> Result<()>;
}

pub fn create_table(
    path: &Path,
    format: TableFormat,
    columns: &[(String, ColumnKind)],
    threads: usize,
) -> Result<Box<dyn TableWriter>> {
    let temp = temp_name(path);
    let file = File::create(&temp).at(&temp)?;
    let out = BufWriter::with_capacity(1 << 20, file);
    Ok(match format {
        TableFormat::Tsv => Box::new(TsvWriter::new(path, temp, out, columns)?),
        TableFormat::Parquet => Box::new(ParquetTable::new(path, temp, out, columns, threads)?),
    })
}

struct TsvWriter {
    path: PathBuf,
    temp: PathBuf,
    out: BufWriter<File>,
    line: String,
}

impl TsvWriter {
    fn new(
        path: &Path,
        temp: PathBuf,
        mut out: BufWriter<File>,
        columns: &[(String, ColumnKind)],
    ) -> Result<Self> {
        let header: Vec<&str> = columns.iter().map(|(n, _)| n.as_str()).collect();
        writeln!(out, "{}", header.join("\t")).at(&temp)?;
        Ok(TsvWriter {
            path: path.to_path_buf(),
            temp,
            out,
            line: String::new(),
        })
    }
}

/// Shortest text that reads back as the same f64; missing values as NA.
pub fn format_float(v: f64, out: &mut String) {
    use std::fmt::Write as _;
    if v.is_nan() {
        out.push_str("NA");
    } else {
        let _ = write!(out, "{v}");
    }
}

impl TableWriter for TsvWriter {
    fn write_row(&mut self, cells: &[Cell<'_>]) -> Result<()> {
        use std::fmt::Write as _;
        self.line.clear();
        for (i, cell) in cells.iter().enumerate() {
            if i > 0 {
                self.line.push('\t');
            }
            match cell {
                Cell::Text(s) => self.line.push_str(s),
                Cell::Float(v) => format_float(*v, &mut self.line),
                Cell::Count(c) => {
                    let _ = write!(self.line, "{c}");
                }
            }
        }
        self.line.push('\n');
        self.out.write_all(self.line.as_bytes()).at(&self.temp)
    }

    fn finish(self: Box<Self>) -> Result<()> {
        let file = self
            .out
            .into_inner()
            .map_err(|e| RiffleError::io(&self.temp, e.into_error()))?;
        file.sync_all().at(&self.temp)?;
        std::fs::rename(&self.temp, &self.path).at(&self.path)
    }
}

/// Float columns of results tables whose values are continuous (almost all
/// distinct); the others hold a few hundred distinct values at most
/// (p-values from counts and their adjustments).
fn is_continuous(name: &str) -> bool {
    matches!(
        name,
        "effect" | "statistic" | "p_param" | "p_pooled" | "q_pooled"
    ) || name.ends_with("_param")
}

/// Writer properties of a results table.
pub(crate) fn results_properties(columns: &[(String, ColumnKind)]) -> WriterProperties {
    let mut props = WriterProperties::builder()
        .set_compression(Compression::ZSTD(ZstdLevel::try_new(3).unwrap()))
        .set_max_row_group_row_count(Some(RESULTS_ROW_GROUP_ROWS))
        .set_created_by(format!("riffle {}", env!("CARGO_PKG_VERSION")));
    if let Some((name, ColumnKind::Text)) = columns.first() {
        // The feature ids are all distinct: a dictionary never pays, and
        // their min/max statistics (string comparisons on every value)
        // took a sixth of a scan at B = 100.
        let id = ColumnPath::from(name.as_str());
        props = props
            .set_column_dictionary_enabled(id.clone(), false)
            .set_column_statistics_enabled(id, EnabledStatistics::None);
    }
    for (name, kind) in columns.iter().skip(1) {
        let column = ColumnPath::from(name.as_str());
        match kind {
            // Text columns after the ids hold a few distinct words (how p
            // was computed, why a feature was untested): the dictionary
            // suits them, but their min/max statistics compare every value
            // and took two fifths of the encoding at B = 100; nothing
            // filters on them.
            ColumnKind::Text => {
                props = props.set_column_statistics_enabled(column, EnabledStatistics::None)
            }
            // Continuous values are all distinct: the dictionary attempt
            // hashes every value, fills a page and falls back to plain.
            ColumnKind::Float if is_continuous(name) => {
                props = props.set_column_dictionary_enabled(column, false)
            }
            _ => {}
        }
    }
    props.build()
}

enum ColumnBuilder {
    Text(StringBuilder),
    Float(Float64Builder),
    Count(UInt64Builder),
}

/// Rows per batch: one batch is one row group, so that row groups can be
/// encoded independently.
const PARQUET_BATCH_ROWS: usize = RESULTS_ROW_GROUP_ROWS;

/// Builds column batches; each full batch is one row group, its columns
/// encoded on up to `threads` threads by [`RowGroupEncoder`].
struct ParquetTable {
    path: PathBuf,
    temp: PathBuf,
    schema: Arc<Schema>,
    kinds: Vec<ColumnKind>,
    builders: Vec<ColumnBuilder>,
    rows: usize,
    encoder: RowGroupEncoder,
}

/// A builder with room for a whole batch: grown by doubling instead, each
/// batch's columns were reallocated and copied some 16 times, a tenth of
/// the row assembly in the final pass. Untouched capacity is not resident.
fn new_builder(kind: ColumnKind) -> ColumnBuilder {
    match kind {
        ColumnKind::Text => ColumnBuilder::Text(StringBuilder::with_capacity(
            PARQUET_BATCH_ROWS,
            PARQUET_BATCH_ROWS * 16,
        )),
        ColumnKind::Float => {
            ColumnBuilder::Float(Float64Builder::with_capacity(PARQUET_BATCH_ROWS))
        }
        ColumnKind::Count => ColumnBuilder::Count(UInt64Builder::with_capacity(PARQUET_BATCH_ROWS)),
    }
}

impl ParquetTable {
    fn new(
        path: &Path,
        temp: PathBuf,
        out: BufWriter<File>,
        columns: &[(String, ColumnKind)],
        threads: usize,
    ) -> Result<Self> {
        let fields: Vec<Field> = columns
            .iter()
            .map(|(name, kind)| {
                let dt = match kind {
                    ColumnKind::Text => DataType::Utf8,
                    ColumnKind::Float => DataType::Float64,
                    ColumnKind::Count => DataType::UInt64,
                };
                Field::new(name, dt, *kind == ColumnKind::Float)
            })
            .collect();
        let schema = Arc::new(Schema::new(fields));
        let encoder = RowGroupEncoder::new(
            &temp,
            out,
            schema.clone(),
            results_properties(columns),
            threads,
        )?;
        let builders = columns.iter().map(|(_, kind)| new_builder(*kind)).collect();
        Ok(ParquetTable {
            path: path.to_path_buf(),
            temp,
            kinds: columns.iter().map(|(_, kind)| *kind).collect(),
            schema,
            builders,
            rows: 0,
            encoder,
        })
    }

    fn append(&mut self, cells: &[Cell<'_>]) -> Result<()> {
        for (builder, cell) in self.builders.iter_mut().zip(cells) {
            match (builder, cell) {
                (ColumnBuilder::Text(b), Cell::Text(s)) => b.append_value(s),
                (ColumnBuilder::Float(b), Cell::Float(v)) => {
                    if v.is_nan() {
                        b.append_null()
                    } else {
                        b.append_value(*v)
                    }
                }
                (ColumnBuilder::Count(b), Cell::Count(c)) => b.append_value(*c),
                _ => {
                    return Err(RiffleError::Internal(
                        "results cell of the wrong kind".into(),
                    ))
                }
            }
        }
        self.rows += 1;
        Ok(())
    }

    /// The rows appended so far as one batch; the builders start afresh.
    fn take_batch(&mut self) -> Result<RecordBatch> {
        let arrays: Vec<ArrayRef> = self
            .builders
            .iter_mut()
            .map(|b| -> ArrayRef {
                match b {
                    ColumnBuilder::Text(b) => Arc::new(b.finish()),
                    ColumnBuilder::Float(b) => Arc::new(b.finish()),
                    ColumnBuilder::Count(b) => Arc::new(b.finish()),
                }
            })
            .collect();
        self.rows = 0;
        RecordBatch::try_new(self.schema.clone(), arrays)
            .map_err(|e| RiffleError::Internal(format!("results batch: {e}")))
    }

    fn flush(&mut self) -> Result<()> {
        if self.rows == 0 {
            return Ok(());
        }
        let batch = self.take_batch()?;
        self.encoder.write(&batch)?;
        drop(batch);
        // `finish` left the builders without capacity. Sized again only now
        // that the batch is freed, so that they reuse its memory: sized
        // while it was alive, they took fresh pages and peak RSS grew by
        // a batch (~11 MB at 2,000,000 features).
        for (b, &kind) in self.builders.iter_mut().zip(&self.kinds) {
            *b = new_builder(kind);
        }
        Ok(())
    }
}

impl TableWriter for ParquetTable {
    fn write_row(&mut self, cells: &[Cell<'_>]) -> Result<()> {
        self.append(cells)?;
        if self.rows == PARQUET_BATCH_ROWS {
            self.flush()?;
        }
        Ok(())
    }

    fn finish(mut self: Box<Self>) -> Result<()> {
        self.flush()?;
        let ParquetTable {
            path,
            temp,
            encoder,
            ..
        } = *self;
        encoder.finish()?;
        std::fs::rename(&temp, &path).at(&path)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Columns of every kind; ids, a few words, counts, continuous and
    /// discrete floats with missing values.
    fn columns() -> Vec<(String, ColumnKind)> {
        [
            ("feature", ColumnKind::Text),
            ("n_a", ColumnKind::Count),
            ("effect", ColumnKind::Float),
            ("p_perm", ColumnKind::Float),
            ("p_source", ColumnKind::Text),
        ]
        .iter()
        .map(|(n, k)| (n.to_string(), *k))
        .collect()
    }

    fn write_rows(table: &mut dyn TableWriter, rows: usize) {
        let mut id = String::new();
        for i in 0..rows {
            id.clear();
            id.push_str(&format!("f{i:07}"));
            let effect = if i % 97 == 0 {
                f64::NAN
            } else {
                (i as f64 * 0.7).sin()
            };
            let p = ((i * 7919) % 101 + 1) as f64 / 101.0;
            let source = if i % 13 == 0 { "untested" } else { "counted" };
            table
                .write_row(&[
                    Cell::Text(&id),
                    Cell::Count((i % 5) as u64),
                    Cell::Float(effect),
                    Cell::Float(p),
                    Cell::Text(source),
                ])
                .unwrap();
        }
    }

    /// The row groups encoded on several threads make the same file as the
    /// parquet crate's own serial `ArrowWriter` fed the same batches with
    /// the same properties, whatever the number of threads; 2.5 row groups
    /// so that the last one is partial.
    #[test]
    fn parallel_row_groups_equal_the_serial_writer() {
        let dir = tempfile::tempdir().unwrap();
        let rows = 2 * RESULTS_ROW_GROUP_ROWS + RESULTS_ROW_GROUP_ROWS / 2;
        let mut files = Vec::new();
        for threads in [1, 3] {
            let path = dir.path().join(format!("t{threads}.parquet"));
            let mut table = create_table(&path, TableFormat::Parquet, &columns(), threads).unwrap();
            write_rows(&mut *table, rows);
            table.finish().unwrap();
            files.push(std::fs::read(&path).unwrap());
        }

        // The reference: the same rows through builders and ArrowWriter.
        let path = dir.path().join("serial.parquet");
        let columns = columns();
        let temp = dir.path().join("serial.tmp");
        let mut table = ParquetTable::new(
            &path,
            temp,
            BufWriter::new(File::create(dir.path().join("unused")).unwrap()),
            &columns,
            1,
        )
        .unwrap();
        let mut serial = parquet::arrow::ArrowWriter::try_new(
            File::create(&path).unwrap(),
            table.schema.clone(),
            Some(results_properties(&columns)),
        )
        .unwrap();
        let mut collected = CollectRows {
            table: &mut table,
            batches: Vec::new(),
        };
        write_rows(&mut collected, rows);
        if collected.table.rows > 0 {
            let batch = collected.table.take_batch().unwrap();
            collected.batches.push(batch);
        }
        for batch in &collected.batches {
            serial.write(batch).unwrap();
        }
        serial.close().unwrap();
        let reference = std::fs::read(&path).unwrap();
        assert_eq!(files[0], reference, "1 thread vs ArrowWriter");
        assert_eq!(files[1], reference, "3 threads vs ArrowWriter");
    }

    /// Fills a table's builders and takes each full batch instead of
    /// encoding it.
    struct CollectRows<'a> {
        table: &'a mut ParquetTable,
        batches: Vec<RecordBatch>,
    }

    impl TableWriter for CollectRows<'_> {
        fn write_row(&mut self, cells: &[Cell<'_>]) -> Result<()> {
            self.table.append(cells)?;
            if self.table.rows == PARQUET_BATCH_ROWS {
                let batch = self.table.take_batch()?;
                self.batches.push(batch);
            }
            Ok(())
        }

        fn finish(self: Box<Self>) -> Result<()> {
            Ok(())
        }
    }
}
