//! Design stage: which samples take part, their labels, and the shared
//! relabelings drawn from the seed.

pub mod model;
pub mod relabel;
pub mod sheet;
pub mod study;

use std::collections::BTreeMap;

pub use relabel::Relabelings;
pub use sheet::SampleSheet;
pub use study::{DesignColumns, StudyDesign};

use crate::error::{Result, RiffleError};

/// A two-group comparison: group A (label 0) against group B (label 1).
/// Effects and statistics are B minus A.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct TwoGroupDesign {
    pub group_column: String,
    pub level_a: String,
    pub level_b: String,
    /// Matrix columns to read, in sheet order.
    pub samples: Vec<String>,
    /// 0 for A, 1 for B, aligned with `samples`.
    pub labels: Vec<u8>,
    pub n_a: usize,
    pub n_b: usize,
}

impl TwoGroupDesign {
    pub fn from_sheet(
        sheet: &SampleSheet,
        group_column: &str,
        levels: Option<(&str, &str)>,
    ) -> Result<Self> {
        let col = sheet.column_index(group_column, "--group")?;
        let mut counts: BTreeMap<&str, usize> = BTreeMap::new();
        for (r, row) in sheet.rows.iter().enumerate() {
            let value = row[col].as_str();
            if value.is_empty() {
                return Err(RiffleError::bad_input(
                    &sheet.path,
                    format!("row {}, column '{group_column}'", sheet.line_of(r)),
                    format!(
                        "sample '{}' has no group; give every sample a level or remove its row",
                        sheet.sample(r)
                    ),
                ));
            }
            *counts.entry(value).or_default() += 1;
        }
        let (level_a, level_b) = match levels {
            Some((a, b)) => {
                if a == b {
                    return Err(RiffleError::options(format!(
                        "--levels names '{a}' twice; give two different levels"
                    )));
                }
                for level in [a, b] {
                    if !counts.contains_key(level) {
                        return Err(RiffleError::bad_input(
                            &sheet.path,
                            format!("column '{group_column}'"),
                            format!(
                                "level '{level}' (from --levels) does not occur; levels are: {}",
                                join_keys(&counts)
                            ),
                        ));
                    }
                }
                (a.to_string(), b.to_string())
            }
            None => {
                if counts.len() != 2 {
                    return Err(RiffleError::bad_input(
                        &sheet.path,
                        format!("column '{group_column}'"),
                        format!(
                            "expected exactly two levels for a two-group test, found {} ({}); pick two with --levels A,B",
                            counts.len(),
                            join_keys(&counts)
                        ),
                    ));
                }
                let mut keys = counts.keys();
                let a = keys.next().unwrap().to_string();
                let b = keys.next().unwrap().to_string();
                (a, b)
            }
        };
        for level in [&level_a, &level_b] {
            let n = counts[level.as_str()];
            if n < 2 {
                return Err(RiffleError::bad_input(
                    &sheet.path,
                    format!("column '{group_column}'"),
                    format!("level '{level}' has {n} sample; each group needs at least 2"),
                ));
            }
        }
        let mut samples = Vec::new();
        let mut labels = Vec::new();
        for (r, row) in sheet.rows.iter().enumerate() {
            let value = &row[col];
            if *value == level_a || *value == level_b {
                samples.push(sheet.sample(r).to_string());
                labels.push(u8::from(*value == level_b));
            }
        }
        let n_b = labels.iter().filter(|&&l| l == 1).count();
        Ok(TwoGroupDesign {
            group_column: group_column.to_string(),
            level_a,
            level_b,
            n_a: labels.len() - n_b,
            n_b,
            samples,
            labels,
        })
    }

    pub fn n(&self) -> usize {
        self.labels.len()
    }
}

fn join_keys(counts: &BTreeMap<&str, usize>) -> String {
    counts
        .iter()
        .map(|(k, n)| format!("'{k}' ({n})"))
        .collect::<Vec<_>>()
        .join(", ")
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::path::Path;

    fn sheet(text: &str) -> SampleSheet {
        SampleSheet::parse(Path::new("s.tsv"), text.as_bytes(), "sample").unwrap()
    }

    #[test]
    fn default_levels_sorted_and_direction_b_minus_a() {
        let s = sheet("sample\tg\nx1\tz\nx2\ta\nx3\tz\nx4\ta\n");
        let d = TwoGroupDesign::from_sheet(&s, "g", None).unwrap();
        assert_eq!((d.level_a.as_str(), d.level_b.as_str()), ("a", "z"));
        assert_eq!(d.labels, vec![1, 0, 1, 0]);
    }

    #[test]
    fn levels_pick_two_and_leave_others_out() {
        let s = sheet("sample\tg\nx1\tz\nx2\ta\nx3\tz\nx4\ta\nx5\tm\n");
        let d = TwoGroupDesign::from_sheet(&s, "g", Some(("z", "a"))).unwrap();
        assert_eq!(d.samples, vec!["x1", "x2", "x3", "x4"]);
        assert_eq!(d.labels, vec![0, 1, 0, 1]);
    }

    #[test]
    fn errors_name_the_problem() {
        let s = sheet("sample\tg\nx1\tz\nx2\ta\nx3\ta\n");
        let e = TwoGroupDesign::from_sheet(&s, "g", None)
            .unwrap_err()
            .to_string();
        assert!(e.contains("level 'z' has 1 sample"), "{e}");
        let e = TwoGroupDesign::from_sheet(&s, "grp", None)
            .unwrap_err()
            .to_string();
        assert!(e.contains("no column 'grp'"), "{e}");
        let s = sheet("sample\tg\nx1\tz\nx2\tz\n");
        let e = TwoGroupDesign::from_sheet(&s, "g", None)
            .unwrap_err()
            .to_string();
        assert!(e.contains("found 1"), "{e}");
    }
}
