//! Results tables: Parquet (default) or TSV, one row per feature, written
//! in batches under a temporary name and renamed when complete.

use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};
use std::sync::Arc;

use arrow_array::builder::{Float64Builder, StringBuilder, UInt64Builder};
use arrow_array::{ArrayRef, RecordBatch};
use arrow_schema::{DataType, Field, Schema};
use parquet::arrow::ArrowWriter;
use parquet::basic::{Compression, ZstdLevel};
use parquet::file::properties::{EnabledStatistics, WriterProperties};
use parquet::schema::types::ColumnPath;

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
) -> Result<Box<dyn TableWriter>> {
    let temp = temp_name(path);
    let file = File::create(&temp).at(&temp)?;
    let out = BufWriter::with_capacity(1 << 20, file);
    Ok(match format {
        TableFormat::Tsv => Box::new(TsvWriter::new(path, temp, out, columns)?),
        TableFormat::Parquet => Box::new(ParquetTable::new(path, temp, out, columns)?),
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

enum ColumnBuilder {
    Text(StringBuilder),
    Float(Float64Builder),
    Count(UInt64Builder),
}

const PARQUET_BATCH_ROWS: usize = 65_536;

struct ParquetTable {
    path: PathBuf,
    temp: PathBuf,
    schema: Arc<Schema>,
    builders: Vec<ColumnBuilder>,
    rows: usize,
    writer: ArrowWriter<BufWriter<File>>,
}

impl ParquetTable {
    fn new(
        path: &Path,
        temp: PathBuf,
        out: BufWriter<File>,
        columns: &[(String, ColumnKind)],
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
        let props = props.build();
        let writer = ArrowWriter::try_new(out, schema.clone(), Some(props))
            .map_err(|e| RiffleError::io(&temp, std::io::Error::other(e)))?;
        let builders = columns
            .iter()
            .map(|(_, kind)| match kind {
                ColumnKind::Text => ColumnBuilder::Text(StringBuilder::new()),
                ColumnKind::Float => ColumnBuilder::Float(Float64Builder::new()),
                ColumnKind::Count => ColumnBuilder::Count(UInt64Builder::new()),
            })
            .collect();
        Ok(ParquetTable {
            path: path.to_path_buf(),
            temp,
            schema,
            builders,
            rows: 0,
            writer,
        })
    }

    fn flush(&mut self) -> Result<()> {
        if self.rows == 0 {
            return Ok(());
        }
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
        let batch = RecordBatch::try_new(self.schema.clone(), arrays)
            .map_err(|e| RiffleError::Internal(format!("results batch: {e}")))?;
        self.writer
            .write(&batch)
            .map_err(|e| RiffleError::io(&self.temp, std::io::Error::other(e)))?;
        self.rows = 0;
        Ok(())
    }
}

impl TableWriter for ParquetTable {
    fn write_row(&mut self, cells: &[Cell<'_>]) -> Result<()> {
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
        if self.rows == PARQUET_BATCH_ROWS {
            self.flush()?;
        }
        Ok(())
    }

    fn finish(mut self: Box<Self>) -> Result<()> {
        self.flush()?;
        let out = self
            .writer
            .into_inner()
            .map_err(|e| RiffleError::io(&self.temp, std::io::Error::other(e)))?;
        let file = out
            .into_inner()
            .map_err(|e| RiffleError::io(&self.temp, e.into_error()))?;
        file.sync_all().at(&self.temp)?;
        std::fs::rename(&self.temp, &self.path).at(&self.path)
    }
}
