//! Sample sheets: CSV or TSV with a header row, one row per sample.

use std::collections::HashMap;
use std::path::{Path, PathBuf};

use crate::error::{IoContext, Result, RiffleError};

#[derive(Debug, Clone)]
pub struct SampleSheet {
    pub path: PathBuf,
    pub columns: Vec<String>,
    /// One entry per data row, cells in column order (trimmed).
    pub rows: Vec<Vec<String>>,
    pub sample_column: usize,
}

impl SampleSheet {
    /// Reads a sheet; the delimiter is a tab when the header line holds one,
    /// a comma otherwise.
    pub fn read(path: &Path, sample_column: &str) -> Result<Self> {
        let bytes = std::fs::read(path).at(path)?;
        Self::parse(path, &bytes, sample_column)
    }

    pub fn parse(path: &Path, bytes: &[u8], sample_column: &str) -> Result<Self> {
        let text = std::str::from_utf8(bytes).map_err(|e| {
            RiffleError::bad_input(
                path,
                format!("byte {}", e.valid_up_to()),
                "the sample sheet is not UTF-8 text",
            )
        })?;
        let text = text.strip_prefix('\u{feff}').unwrap_or(text);
        let header_line = text.lines().next().unwrap_or("");
        if header_line.trim().is_empty() {
            return Err(RiffleError::bad_input(
                path,
                "row 1",
                "the sample sheet is empty; expected a header row naming its columns",
            ));
        }
        let delimiter = if header_line.contains('\t') {
            b'\t'
        } else {
            b','
        };
        let mut reader = csv::ReaderBuilder::new()
            .delimiter(delimiter)
            .has_headers(true)
            .flexible(true)
            .from_reader(text.as_bytes());
        let columns: Vec<String> = reader
            .headers()
            .map_err(|e| RiffleError::bad_input(path, "row 1", format!("unreadable header: {e}")))?
            .iter()
            .map(|s| s.trim().to_string())
            .collect();
        let mut seen = HashMap::new();
        for (i, c) in columns.iter().enumerate() {
            if c.is_empty() {
                return Err(RiffleError::bad_input(
                    path,
                    format!("row 1, column {}", i + 1),
                    "empty column name in the header",
                ));
            }
            if let Some(first) = seen.insert(c.clone(), i) {
                return Err(RiffleError::bad_input(
                    path,
                    format!("row 1, columns {} and {}", first + 1, i + 1),
                    format!("column name '{c}' appears twice"),
                ));
            }
        }
        let sample_idx = columns.iter().position(|c| c == sample_column).ok_or_else(|| {
            RiffleError::bad_input(
                path,
                "row 1",
                format!(
                    "no sample column '{sample_column}' (columns: {}); use --sample-column to name it",
                    columns.join(", ")
                ),
            )
        })?;
        let mut rows = Vec::new();
        let mut sample_rows: HashMap<String, usize> = HashMap::new();
        for (i, record) in reader.records().enumerate() {
            let line = i + 2;
            let record = record.map_err(|e| {
                RiffleError::bad_input(path, format!("row {line}"), format!("unreadable row: {e}"))
            })?;
            if record.iter().all(|c| c.trim().is_empty()) {
                continue;
            }
            if record.len() != columns.len() {
                return Err(RiffleError::bad_input(
                    path,
                    format!("row {line}"),
                    format!(
                        "expected {} cells as in the header, found {}",
                        columns.len(),
                        record.len()
                    ),
                ));
            }
            let cells: Vec<String> = record.iter().map(|c| c.trim().to_string()).collect();
            let sample = &cells[sample_idx];
            if sample.is_empty() {
                return Err(RiffleError::bad_input(
                    path,
                    format!("row {line}, column '{sample_column}'"),
                    "empty sample id",
                ));
            }
            if let Some(first) = sample_rows.insert(sample.clone(), line) {
                return Err(RiffleError::bad_input(
                    path,
                    format!("rows {first} and {line}"),
                    format!("sample '{sample}' is listed twice"),
                ));
            }
            rows.push(cells);
        }
        if rows.is_empty() {
            return Err(RiffleError::bad_input(
                path,
                "row 2",
                "the sample sheet has a header but no samples",
            ));
        }
        Ok(SampleSheet {
            path: path.to_path_buf(),
            columns,
            rows,
            sample_column: sample_idx,
        })
    }

    pub fn column_index(&self, name: &str, option: &str) -> Result<usize> {
        self.columns.iter().position(|c| c == name).ok_or_else(|| {
            RiffleError::bad_input(
                &self.path,
                "row 1",
                format!(
                    "no column '{name}' (asked for by {option}); columns are: {}",
                    self.columns.join(", ")
                ),
            )
        })
    }

    pub fn sample(&self, row: usize) -> &str {
        &self.rows[row][self.sample_column]
    }

    /// 1-based line number in the file of data row `row` (header is line 1).
    pub fn line_of(&self, row: usize) -> usize {
        row + 2
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn reads_tsv_and_csv_alike() {
        let p = Path::new("sheet.tsv");
        let a = SampleSheet::parse(p, b"sample\tgroup\nS1\tctl\nS2\theat\n", "sample").unwrap();
        let b = SampleSheet::parse(p, b"sample,group\nS1,ctl\nS2,heat\n", "sample").unwrap();
        assert_eq!(a.rows, b.rows);
        assert_eq!(a.columns, vec!["sample", "group"]);
    }

    #[test]
    fn duplicate_sample_is_named_with_rows() {
        let e = SampleSheet::parse(Path::new("s.csv"), b"sample,g\nA,1\nB,2\nA,1\n", "sample")
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("s.csv") && e.contains("rows 2 and 4") && e.contains("'A'"),
            "{e}"
        );
    }

    #[test]
    fn missing_sample_column_lists_columns() {
        let e = SampleSheet::parse(Path::new("s.csv"), b"id,g\nA,1\n", "sample")
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("no sample column 'sample'") && e.contains("id, g"),
            "{e}"
        );
    }

    #[test]
    fn empty_and_header_only_are_errors() {
        assert!(SampleSheet::parse(Path::new("s.csv"), b"", "sample").is_err());
        assert!(SampleSheet::parse(Path::new("s.csv"), b"sample,g\n", "sample").is_err());
    }
}
