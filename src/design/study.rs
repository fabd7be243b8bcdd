//! The study design of a scan, read from the sample sheet: which matrix
//! columns take part and how their units may be relabelled.

use std::collections::BTreeMap;

use super::model::LinearModel;
use super::relabel::Scheme;
use super::{SampleSheet, TwoGroupDesign};
use crate::error::{Result, RiffleError};
use crate::stats::{mid_ranks, DesignKind};

/// Sample-sheet columns that define a design (all optional but the one the
/// test needs).
#[derive(Debug, Clone, Default, serde::Serialize, serde::Deserialize)]
pub struct DesignColumns {
    pub group: Option<String>,
    pub levels: Option<Vec<String>>,
    pub trait_column: Option<String>,
    pub pair: Option<String>,
    pub strata: Option<String>,
    /// Covariates: the test becomes a linear model per feature, permuted
    /// by Freedman–Lane.
    #[serde(default)]
    pub covariates: Vec<String>,
}

#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct StudyDesign {
    pub kind: DesignKind,
    pub columns: DesignColumns,
    /// Matrix columns to read, in order. Paired: the A sample of every pair,
    /// then the B sample of every pair.
    pub samples: Vec<String>,
    /// Group tests: class of each unit (index into `levels`).
    pub classes: Vec<u8>,
    /// Group level names by class; paired: the two conditions A, B.
    pub levels: Vec<String>,
    /// Samples per class (group tests).
    pub group_sizes: Vec<usize>,
    /// Trait tests: the trait value of each unit.
    pub trait_values: Vec<f64>,
    /// Stratum of each unit (relabelings stay within strata).
    pub strata: Option<Vec<u32>>,
    /// Paired: pair ids in unit order.
    pub pairs: Vec<String>,
    /// With covariates: the linear model of every feature.
    #[serde(skip)]
    pub model: Option<LinearModel>,
}

impl From<&TwoGroupDesign> for StudyDesign {
    fn from(d: &TwoGroupDesign) -> Self {
        StudyDesign {
            kind: DesignKind::Groups,
            columns: DesignColumns {
                group: Some(d.group_column.clone()),
                levels: Some(vec![d.level_a.clone(), d.level_b.clone()]),
                ..Default::default()
            },
            samples: d.samples.clone(),
            classes: d.labels.clone(),
            levels: vec![d.level_a.clone(), d.level_b.clone()],
            group_sizes: vec![d.n_a, d.n_b],
            trait_values: Vec::new(),
            strata: None,
            pairs: Vec::new(),
            model: None,
        }
    }
}

impl StudyDesign {
    /// Units (samples, or pairs) the kernel sees.
    pub fn units(&self) -> usize {
        match self.kind {
            DesignKind::Paired => self.pairs.len(),
            DesignKind::Trait => self.trait_values.len(),
            DesignKind::Groups => self.classes.len(),
        }
    }

    /// How units may be relabelled.
    pub fn scheme<'a>(&'a self, trait_classes: &'a [u8]) -> Scheme<'a> {
        if self.model.is_some() {
            // Freedman–Lane permutes residuals: every unit is distinct.
            return Scheme::Permute {
                classes: trait_classes,
                strata: self.strata.as_deref(),
            };
        }
        match self.kind {
            DesignKind::Paired => Scheme::SignFlip {
                n: self.pairs.len(),
            },
            DesignKind::Trait => Scheme::Permute {
                classes: trait_classes,
                strata: self.strata.as_deref(),
            },
            DesignKind::Groups => Scheme::Permute {
                classes: &self.classes,
                strata: self.strata.as_deref(),
            },
        }
    }

    /// Trait values as classes (equal values share one, up to 255), so
    /// that exhaustive listing counts distinct arrangements.
    pub fn trait_classes(&self) -> Vec<u8> {
        if self.model.is_some() {
            return (0..self.units()).map(|i| i.min(255) as u8).collect();
        }
        let mut sorted: Vec<f64> = self.trait_values.clone();
        sorted.sort_by(|a, b| a.total_cmp(b));
        sorted.dedup();
        self.trait_values
            .iter()
            .map(|v| sorted.partition_point(|s| s < v).min(255) as u8)
            .collect()
    }

    /// The standardized trait (Pearson) or its standardized mid-ranks
    /// (Spearman), sum of squares n - 1.
    pub fn trait_weights(&self, ranks: bool) -> Vec<f64> {
        let values = if ranks {
            let mut order = Vec::new();
            let mut r = vec![0.0; self.trait_values.len()];
            mid_ranks(&self.trait_values, &mut order, &mut r);
            r
        } else {
            self.trait_values.clone()
        };
        let mut z = vec![0.0; values.len()];
        crate::stats::prepare::standardize(&values, &mut z);
        z
    }

    pub fn from_sheet(
        sheet: &SampleSheet,
        kind: DesignKind,
        columns: &DesignColumns,
    ) -> Result<Self> {
        let strata_col = columns
            .strata
            .as_ref()
            .map(|s| sheet.column_index(s, "--strata"))
            .transpose()?;
        let mut design = match kind {
            DesignKind::Groups => Self::groups(sheet, columns)?,
            DesignKind::Trait => Self::with_trait(sheet, columns)?,
            DesignKind::Paired => Self::paired(sheet, columns)?,
        };
        if let Some(col) = strata_col {
            design.strata = Some(design.stratum_ids(sheet, col)?);
        }
        if !columns.covariates.is_empty() {
            design.model = Some(design.linear_model(sheet, columns)?);
        }
        design.columns = columns.clone();
        Ok(design)
    }

    fn groups(sheet: &SampleSheet, columns: &DesignColumns) -> Result<Self> {
        let group = columns.group.as_deref().ok_or_else(|| {
            RiffleError::options(
                "--group is required for this test: name the sample-sheet column with the groups",
            )
        })?;
        let col = sheet.column_index(group, "--group")?;
        let mut counts: BTreeMap<&str, usize> = BTreeMap::new();
        for (r, row) in sheet.rows.iter().enumerate() {
            if row[col].is_empty() {
                return Err(RiffleError::bad_input(
                    &sheet.path,
                    format!("row {}, column '{group}'", sheet.line_of(r)),
                    format!(
                        "sample '{}' has no group; give every sample a level or remove its row",
                        sheet.sample(r)
                    ),
                ));
            }
            *counts.entry(row[col].as_str()).or_default() += 1;
        }
        let levels: Vec<String> = match &columns.levels {
            Some(levels) => {
                for (i, level) in levels.iter().enumerate() {
                    if levels[..i].contains(level) {
                        return Err(RiffleError::options(format!(
                            "--levels names '{level}' twice; give two different levels \
                             (or more, all different, for anova/kruskal)"
                        )));
                    }
                    if !counts.contains_key(level.as_str()) {
                        return Err(RiffleError::bad_input(
                            &sheet.path,
                            format!("column '{group}'"),
                            format!(
                                "level '{level}' (from --levels) does not occur; levels are: {}",
                                join_counts(&counts)
                            ),
                        ));
                    }
                }
                levels.clone()
            }
            None => counts.keys().map(|k| k.to_string()).collect(),
        };
        if levels.len() < 2 {
            return Err(RiffleError::bad_input(
                &sheet.path,
                format!("column '{group}'"),
                format!(
                    "found {} level ({}); a comparison needs at least two levels \
                     (exactly two levels for a two-group test)",
                    levels.len(),
                    join_counts(&counts)
                ),
            ));
        }
        if levels.len() > crate::stats::prepare::MAX_GROUPS {
            return Err(RiffleError::bad_input(
                &sheet.path,
                format!("column '{group}'"),
                format!(
                    "{} levels; at most {} groups can be compared",
                    levels.len(),
                    crate::stats::prepare::MAX_GROUPS
                ),
            ));
        }
        for level in &levels {
            let n = counts[level.as_str()];
            if n < 2 {
                return Err(RiffleError::bad_input(
                    &sheet.path,
                    format!("column '{group}'"),
                    format!("level '{level}' has {n} sample; each group needs at least 2"),
                ));
            }
        }
        let mut samples = Vec::new();
        let mut classes = Vec::new();
        let mut rows = Vec::new();
        for (r, row) in sheet.rows.iter().enumerate() {
            if let Some(c) = levels.iter().position(|l| *l == row[col]) {
                samples.push(sheet.sample(r).to_string());
                classes.push(c as u8);
                rows.push(r);
            }
        }
        let group_sizes = levels.iter().map(|l| counts[l.as_str()]).collect();
        Ok(StudyDesign {
            kind: DesignKind::Groups,
            columns: DesignColumns::default(),
            samples,
            classes,
            levels,
            group_sizes,
            trait_values: Vec::new(),
            strata: None,
            pairs: Vec::new(),
            model: None,
        })
    }

    fn with_trait(sheet: &SampleSheet, columns: &DesignColumns) -> Result<Self> {
        let name = columns.trait_column.as_deref().ok_or_else(|| {
            RiffleError::options("correlation tests need a numeric trait: name it with --trait")
        })?;
        let col = sheet.column_index(name, "--trait")?;
        let mut samples = Vec::new();
        let mut values = Vec::new();
        for (r, row) in sheet.rows.iter().enumerate() {
            let text = row[col].as_str();
            let v: f64 = text.parse().map_err(|_| {
                RiffleError::bad_input(
                    &sheet.path,
                    format!("row {}, column '{name}'", sheet.line_of(r)),
                    format!(
                        "sample '{}': expected a number for the trait, found '{text}'",
                        sheet.sample(r)
                    ),
                )
            })?;
            if !v.is_finite() {
                return Err(RiffleError::bad_input(
                    &sheet.path,
                    format!("row {}, column '{name}'", sheet.line_of(r)),
                    format!(
                        "sample '{}': the trait must be a finite number",
                        sheet.sample(r)
                    ),
                ));
            }
            samples.push(sheet.sample(r).to_string());
            values.push(v);
        }
        if values.len() < 3 {
            return Err(RiffleError::bad_input(
                &sheet.path,
                format!("column '{name}'"),
                "a correlation needs at least 3 samples",
            ));
        }
        if values.iter().all(|&v| v == values[0]) {
            return Err(RiffleError::bad_input(
                &sheet.path,
                format!("column '{name}'"),
                "the trait is the same for every sample; nothing to correlate with",
            ));
        }
        Ok(StudyDesign {
            kind: DesignKind::Trait,
            columns: DesignColumns::default(),
            samples,
            classes: Vec::new(),
            levels: Vec::new(),
            group_sizes: Vec::new(),
            trait_values: values,
            strata: None,
            pairs: Vec::new(),
            model: None,
        })
    }

    fn paired(sheet: &SampleSheet, columns: &DesignColumns) -> Result<Self> {
        let pair = columns.pair.as_deref().ok_or_else(|| {
            RiffleError::options("paired tests need --pair naming the pair id column")
        })?;
        let groups = Self::groups(sheet, columns)?;
        if groups.levels.len() != 2 {
            return Err(RiffleError::options(format!(
                "paired tests compare two conditions; --group has {} levels: pick two with --levels A,B",
                groups.levels.len()
            )));
        }
        let pair_col = sheet.column_index(pair, "--pair")?;
        let group_col = sheet.column_index(columns.group.as_deref().unwrap_or(""), "--group")?;
        // pair id -> [row of A, row of B]
        let mut members: BTreeMap<String, [Option<usize>; 2]> = BTreeMap::new();
        let mut order: Vec<String> = Vec::new();
        for (r, row) in sheet.rows.iter().enumerate() {
            let Some(c) = groups.levels.iter().position(|l| *l == row[group_col]) else {
                continue;
            };
            let id = row[pair_col].clone();
            if id.is_empty() {
                return Err(RiffleError::bad_input(
                    &sheet.path,
                    format!("row {}, column '{pair}'", sheet.line_of(r)),
                    format!("sample '{}' has no pair id", sheet.sample(r)),
                ));
            }
            let slot = members.entry(id.clone()).or_insert_with(|| {
                order.push(id.clone());
                [None, None]
            });
            if let Some(first) = slot[c] {
                return Err(RiffleError::bad_input(
                    &sheet.path,
                    format!("rows {} and {}", sheet.line_of(first), sheet.line_of(r)),
                    format!(
                        "pair '{id}' has two samples in '{}'; each pair needs one sample per condition",
                        groups.levels[c]
                    ),
                ));
            }
            slot[c] = Some(r);
        }
        let mut a = Vec::new();
        let mut b = Vec::new();
        for id in &order {
            let slot = members[id];
            match slot {
                [Some(x), Some(y)] => {
                    a.push(sheet.sample(x).to_string());
                    b.push(sheet.sample(y).to_string());
                }
                _ => {
                    let missing = if slot[0].is_none() {
                        &groups.levels[0]
                    } else {
                        &groups.levels[1]
                    };
                    return Err(RiffleError::bad_input(
                        &sheet.path,
                        format!("column '{pair}'"),
                        format!("pair '{id}' has no sample in '{missing}'"),
                    ));
                }
            }
        }
        if order.len() < 2 {
            return Err(RiffleError::bad_input(
                &sheet.path,
                format!("column '{pair}'"),
                "a paired test needs at least 2 complete pairs",
            ));
        }
        let mut samples = a;
        samples.extend(b);
        Ok(StudyDesign {
            kind: DesignKind::Paired,
            columns: DesignColumns::default(),
            samples,
            classes: Vec::new(),
            levels: groups.levels,
            group_sizes: vec![order.len(), order.len()],
            trait_values: Vec::new(),
            strata: None,
            pairs: order,
            model: None,
        })
    }

    /// The per-feature linear model with the covariates; the effect of
    /// interest is the group (B against A, or all levels against the first)
    /// or the trait.
    fn linear_model(&self, sheet: &SampleSheet, columns: &DesignColumns) -> Result<LinearModel> {
        let (xs, name): (Vec<Vec<f64>>, String) =
            match self.kind {
                // One indicator per level but the first (the reference): the
                // F test of all of them; with two levels, the t of group B.
                DesignKind::Groups => (
                    (1..self.levels.len())
                        .map(|level| {
                            self.classes
                                .iter()
                                .map(|&c| f64::from(u8::from(usize::from(c) == level)))
                                .collect()
                        })
                        .collect(),
                    columns.group.clone().unwrap_or_default(),
                ),
                DesignKind::Trait => (
                    vec![self.trait_values.clone()],
                    columns.trait_column.clone().unwrap_or_default(),
                ),
                DesignKind::Paired => return Err(RiffleError::options(
                    "--covariates works with groups (--test student, or anova for k groups) or a \
                     trait (--test pearson); paired models are not offered yet",
                )),
            };
        let row_of: BTreeMap<&str, usize> = (0..sheet.rows.len())
            .map(|r| (sheet.sample(r), r))
            .collect();
        let rows: Vec<usize> = self.samples.iter().map(|s| row_of[s.as_str()]).collect();
        LinearModel::build(sheet, &columns.covariates, &rows, &xs, &name)
    }

    /// Stratum of each unit, by the strata column (paired: both samples of
    /// a pair must share it).
    fn stratum_ids(&self, sheet: &SampleSheet, col: usize) -> Result<Vec<u32>> {
        let name = &sheet.columns[col];
        let row_of: BTreeMap<&str, usize> = sheet
            .rows
            .iter()
            .enumerate()
            .map(|(r, _)| (sheet.sample(r), r))
            .collect();
        let mut ids: BTreeMap<String, u32> = BTreeMap::new();
        let mut id_of = |value: &str| -> u32 {
            let next = ids.len() as u32;
            *ids.entry(value.to_string()).or_insert(next)
        };
        let units = self.units();
        let mut out = Vec::with_capacity(units);
        for u in 0..units {
            let r = row_of[self.samples[u].as_str()];
            let value = sheet.rows[r][col].as_str();
            if value.is_empty() {
                return Err(RiffleError::bad_input(
                    &sheet.path,
                    format!("row {}, column '{name}'", sheet.line_of(r)),
                    format!("sample '{}' has no stratum", sheet.sample(r)),
                ));
            }
            if self.kind == DesignKind::Paired {
                let r2 = row_of[self.samples[units + u].as_str()];
                if sheet.rows[r2][col] != value {
                    return Err(RiffleError::bad_input(
                        &sheet.path,
                        format!(
                            "rows {} and {}, column '{name}'",
                            sheet.line_of(r),
                            sheet.line_of(r2)
                        ),
                        format!("pair '{}' spans two strata", self.pairs[u]),
                    ));
                }
            }
            out.push(id_of(value));
        }
        Ok(out)
    }
}

fn join_counts(counts: &BTreeMap<&str, usize>) -> String {
    counts
        .iter()
        .map(|(k, n)| format!("'{k}' ({n})"))
        .collect::<Vec<_>>()
        .join(", ")
}
