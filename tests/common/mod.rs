//! Shared helpers of the integration tests.
#![allow(dead_code)]

use std::collections::HashMap;
use std::path::Path;
use std::sync::atomic::AtomicBool;

use riffle::design::TwoGroupDesign;
use riffle::input::memory::MemorySource;
use riffle::output::TableFormat;
use riffle::scan::{run_scan_on, ScanOptions, ScanSummary};

/// Deterministic normal draws for test data (Box–Muller on a 64-bit LCG
/// from Knuth's MMIX constants); independent of riffle's own generators.
pub struct TestRng(u64);

impl TestRng {
    pub fn new(seed: u64) -> Self {
        TestRng(seed.wrapping_mul(0x9E37_79B9_7F4A_7C15) | 1)
    }
    pub fn uniform(&mut self) -> f64 {
        self.0 = self
            .0
            .wrapping_mul(6_364_136_223_846_793_005)
            .wrapping_add(1_442_695_040_888_963_407);
        ((self.0 >> 11) as f64 + 0.5) / (1u64 << 53) as f64
    }
    pub fn normal(&mut self) -> f64 {
        let r = (-2.0 * self.uniform().ln()).sqrt();
        r * (std::f64::consts::TAU * self.uniform()).cos()
    }
}

pub fn design(labels: &[u8]) -> TwoGroupDesign {
    let n_b = labels.iter().filter(|&&l| l == 1).count();
    TwoGroupDesign {
        group_column: "group".into(),
        level_a: "A".into(),
        level_b: "B".into(),
        samples: (0..labels.len()).map(|i| format!("s{i}")).collect(),
        labels: labels.to_vec(),
        n_a: labels.len() - n_b,
        n_b,
    }
}

pub fn options(out: &Path) -> ScanOptions {
    let mut o = ScanOptions::new(Path::new("<memory>"), Path::new("<memory>"), "group", out);
    o.format = TableFormat::Tsv;
    o.threads = 2;
    o.memory_bytes = 64 << 20;
    o
}

/// Runs a scan over rows of values (one Vec per feature).
pub fn scan_rows(rows: &[Vec<f64>], labels: &[u8], options: &ScanOptions) -> ScanSummary {
    let d = design(labels);
    let ids: Vec<String> = (0..rows.len()).map(|i| format!("f{i:05}")).collect();
    let values: Vec<f64> = rows.iter().flatten().copied().collect();
    let source = MemorySource::new(ids, d.samples.clone(), values).unwrap();
    run_scan_on(
        Box::new(source),
        &(&d).into(),
        options,
        &AtomicBool::new(false),
    )
    .unwrap()
}

/// A TSV results table as columns of text.
pub struct Table {
    pub columns: HashMap<String, Vec<String>>,
    pub rows: usize,
}

impl Table {
    pub fn read(path: &Path) -> Table {
        let text = std::fs::read_to_string(path).unwrap();
        let mut lines = text.lines();
        let header: Vec<String> = lines
            .next()
            .unwrap()
            .split('\t')
            .map(String::from)
            .collect();
        let mut columns: HashMap<String, Vec<String>> =
            header.iter().map(|h| (h.clone(), Vec::new())).collect();
        let mut rows = 0;
        for line in lines {
            for (h, cell) in header.iter().zip(line.split('\t')) {
                columns.get_mut(h).unwrap().push(cell.to_string());
            }
            rows += 1;
        }
        Table { columns, rows }
    }
    pub fn f64s(&self, column: &str) -> Vec<f64> {
        self.columns[column]
            .iter()
            .map(|c| {
                if c == "NA" {
                    f64::NAN
                } else {
                    c.parse().unwrap()
                }
            })
            .collect()
    }
    pub fn text(&self, column: &str) -> &[String] {
        &self.columns[column]
    }
}

/// Runs a scan of rows given in sample-sheet order (`sheet_samples`) over
/// a design read from sheet text; columns are reordered as the design asks.
pub fn scan_with_sheet(
    rows: &[Vec<f64>],
    sheet_text: &str,
    kind: riffle::stats::DesignKind,
    columns: &riffle::design::DesignColumns,
    options: &ScanOptions,
) -> ScanSummary {
    use riffle::design::{SampleSheet, StudyDesign};
    let sheet =
        SampleSheet::parse(Path::new("sheet.tsv"), sheet_text.as_bytes(), "sample").unwrap();
    let design = StudyDesign::from_sheet(&sheet, kind, columns).unwrap();
    let sheet_samples: Vec<&str> = (0..sheet.rows.len()).map(|r| sheet.sample(r)).collect();
    let order: Vec<usize> = design
        .samples
        .iter()
        .map(|s| sheet_samples.iter().position(|x| x == s).unwrap())
        .collect();
    let ids: Vec<String> = (0..rows.len()).map(|i| format!("f{i:05}")).collect();
    let values: Vec<f64> = rows
        .iter()
        .flat_map(|row| order.iter().map(|&k| row[k]).collect::<Vec<_>>())
        .collect();
    let source = MemorySource::new(ids, design.samples.clone(), values).unwrap();
    run_scan_on(Box::new(source), &design, options, &AtomicBool::new(false)).unwrap()
}

/// Runs the built `riffle` binary with `args`.
pub fn riffle(args: &[&str]) -> std::process::Output {
    std::process::Command::new(env!("CARGO_BIN_EXE_riffle"))
        .args(args)
        .output()
        .expect("run riffle")
}

/// The values of group 0 and of group 1 of a row.
pub fn split_groups(row: &[f64], labels: &[u8]) -> (Vec<f64>, Vec<f64>) {
    let pick = |g: u8| -> Vec<f64> {
        row.iter()
            .zip(labels)
            .filter(|(_, &l)| l == g)
            .map(|(v, _)| *v)
            .collect()
    };
    (pick(0), pick(1))
}

pub fn mean(v: &[f64]) -> f64 {
    v.iter().sum::<f64>() / v.len() as f64
}

/// Sum of squared deviations from the mean.
pub fn sum_of_squares(v: &[f64]) -> f64 {
    let m = mean(v);
    v.iter().map(|x| (x - m) * (x - m)).sum()
}

/// Pooled-variance two-sample t of group 1 minus group 0, from its
/// textbook definition (Student 1908).
pub fn student_t(row: &[f64], labels: &[u8]) -> f64 {
    let (a, b) = split_groups(row, labels);
    let (na, nb) = (a.len() as f64, b.len() as f64);
    let pooled = (sum_of_squares(&a) + sum_of_squares(&b)) / (na + nb - 2.0);
    (mean(&b) - mean(&a)) / (pooled * (1.0 / na + 1.0 / nb)).sqrt()
}

/// Ordinary least squares by the normal equations, solved by Gauss–Jordan
/// elimination (textbook, independent of riffle's Gram–Schmidt): the
/// coefficients, (X'X)^-1 and the residual sum of squares.
pub fn least_squares(columns: &[Vec<f64>], y: &[f64]) -> (Vec<f64>, Vec<Vec<f64>>, f64) {
    let p = columns.len();
    let n = y.len();
    let mut a = vec![vec![0.0; 2 * p]; p];
    for r in 0..p {
        for c in 0..p {
            a[r][c] = (0..n).map(|i| columns[r][i] * columns[c][i]).sum();
        }
        a[r][p + r] = 1.0;
    }
    for c in 0..p {
        let pivot = (c..p)
            .max_by(|&x, &y| a[x][c].abs().total_cmp(&a[y][c].abs()))
            .unwrap();
        a.swap(c, pivot);
        let d = a[c][c];
        a[c].iter_mut().for_each(|v| *v /= d);
        for r in 0..p {
            if r != c {
                let f = a[r][c];
                let row_c = a[c].clone();
                a[r].iter_mut().zip(&row_c).for_each(|(v, w)| *v -= f * w);
            }
        }
    }
    let inverse: Vec<Vec<f64>> = a.iter().map(|row| row[p..].to_vec()).collect();
    let xty: Vec<f64> = (0..p)
        .map(|r| (0..n).map(|i| columns[r][i] * y[i]).sum())
        .collect();
    let beta: Vec<f64> = (0..p)
        .map(|r| (0..p).map(|c| inverse[r][c] * xty[c]).sum())
        .collect();
    let rss = (0..n)
        .map(|i| {
            let fit: f64 = (0..p).map(|r| beta[r] * columns[r][i]).sum();
            (y[i] - fit) * (y[i] - fit)
        })
        .sum();
    (beta, inverse, rss)
}
