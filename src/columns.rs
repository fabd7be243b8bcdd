//! Scratch files of fixed-width f64 rows, written and read in feature order.

use std::fs::File;
use std::io::{BufReader, BufWriter, Read, Write};
use std::path::{Path, PathBuf};

use crate::error::{IoContext, Result, RiffleError};

pub struct ColumnFileWriter {
    path: PathBuf,
    out: BufWriter<File>,
    width: usize,
}

impl ColumnFileWriter {
    pub fn create(path: &Path, width: usize) -> Result<Self> {
        let file = File::create(path).at(path)?;
        Ok(ColumnFileWriter {
            path: path.to_path_buf(),
            out: BufWriter::with_capacity(1 << 20, file),
            width,
        })
    }

    pub fn push(&mut self, row: &[f64]) -> Result<()> {
        if row.len() != self.width {
            return Err(RiffleError::Internal(
                "column row of the wrong width".into(),
            ));
        }
        for v in row {
            self.out.write_all(&v.to_le_bytes()).at(&self.path)?;
        }
        Ok(())
    }

    pub fn finish(self) -> Result<()> {
        let path = self.path;
        self.out
            .into_inner()
            .map_err(|e| RiffleError::io(&path, e.into_error()))?;
        Ok(())
    }
}

pub struct ColumnFileReader {
    path: PathBuf,
    input: BufReader<File>,
    buf: Vec<u8>,
}

impl ColumnFileReader {
    pub fn open(path: &Path, width: usize) -> Result<Self> {
        let file = File::open(path).at(path)?;
        Ok(ColumnFileReader {
            path: path.to_path_buf(),
            input: BufReader::with_capacity(1 << 20, file),
            buf: vec![0u8; width * 8],
        })
    }

    pub fn next_row(&mut self, row: &mut [f64]) -> Result<()> {
        self.input.read_exact(&mut self.buf).at(&self.path)?;
        for (v, c) in row.iter_mut().zip(self.buf.chunks_exact(8)) {
            *v = f64::from_le_bytes(c.try_into().unwrap());
        }
        Ok(())
    }
}
