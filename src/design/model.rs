//! Linear models for tests with covariates: the nuisance design (intercept
//! plus covariates from the sample sheet, text ones one-hot encoded against
//! a reference level) and the quantities Freedman–Lane permutation needs
//! (Winkler, Ridgway, Webster, Smith & Nichols 2014, "Permutation inference
//! for the general linear model", NeuroImage 92).

use crate::design::SampleSheet;
use crate::error::{Result, RiffleError};

/// What the kernel needs of a model y = X b + Z g + e, for an effect of
/// interest X of one column (a t test) or several (an F test, e.g. k - 1
/// group indicators).
#[derive(Debug, Clone)]
pub struct LinearModel {
    /// Orthonormal basis of span(Z) (intercept and covariates), units long.
    pub nuisance_basis: Vec<Vec<f64>>,
    /// x residualized on Z, scaled to unit length: the last basis vector of
    /// span([Z, x]) and, divided by `effect_norm`, the row of
    /// (M'M)^-1 M' that gives x's coefficient (Frisch–Waugh–Lovell).
    pub effect_direction: Vec<f64>,
    /// Further orthonormal directions of span(X) residualized on Z, when the
    /// effect has more than one column (empty for a t test).
    pub further_effects: Vec<Vec<f64>>,
    /// |x residualized on Z| (of the first effect column).
    pub effect_norm: f64,
    /// Residual degrees of freedom, n - rank(M).
    pub df: f64,
    /// Names of the nuisance columns (for the run record).
    pub terms: Vec<String>,
    /// The design columns before orthogonalization, units long: the
    /// nuisance columns (intercept first) and the effect columns. A feature
    /// with missing values refits the model on its observed units from them
    /// (`restricted`).
    pub raw_nuisance: Vec<Vec<f64>>,
    pub raw_effects: Vec<Vec<f64>>,
}

impl LinearModel {
    /// Columns of M (as basis).
    pub fn basis_len(&self) -> usize {
        self.nuisance_basis.len() + self.effect_columns()
    }

    /// Columns of the effect of interest (1 for a t test).
    pub fn effect_columns(&self) -> usize {
        1 + self.further_effects.len()
    }

    /// The orthonormal basis of span(M) in the kernel's column order: the
    /// effect directions first, then the nuisance basis.
    pub fn columns(&self) -> impl Iterator<Item = &Vec<f64>> {
        std::iter::once(&self.effect_direction)
            .chain(&self.further_effects)
            .chain(&self.nuisance_basis)
    }

    /// Builds the model from the effect columns `xs` (each units long) and
    /// the covariate columns of the sheet, for the sheet rows `rows` (one
    /// per unit, in unit order).
    pub fn build(
        sheet: &SampleSheet,
        covariates: &[String],
        rows: &[usize],
        xs: &[Vec<f64>],
        effect_name: &str,
    ) -> Result<Self> {
        let n = rows.len();
        let mut columns: Vec<(String, Vec<f64>)> = vec![("intercept".into(), vec![1.0; n])];
        for name in covariates {
            let col = sheet.column_index(name, "--covariates")?;
            let cells: Vec<&str> = rows.iter().map(|&r| sheet.rows[r][col].as_str()).collect();
            if let Some(i) = cells.iter().position(|c| c.is_empty()) {
                return Err(RiffleError::bad_input(
                    &sheet.path,
                    format!("row {}, column '{name}'", sheet.line_of(rows[i])),
                    format!(
                        "sample '{}' has no value for covariate '{name}'",
                        sheet.sample(rows[i])
                    ),
                ));
            }
            let numeric: Option<Vec<f64>> = cells.iter().map(|c| c.parse::<f64>().ok()).collect();
            match numeric {
                Some(values) if values.iter().all(|v| v.is_finite()) => {
                    columns.push((name.clone(), values))
                }
                _ => {
                    let mut levels: Vec<&str> = cells.clone();
                    levels.sort_unstable();
                    levels.dedup();
                    // The first level (sorted) is the reference.
                    for level in levels.iter().skip(1) {
                        columns.push((
                            format!("{name}={level}"),
                            cells
                                .iter()
                                .map(|c| f64::from(u8::from(c == level)))
                                .collect(),
                        ));
                    }
                    if levels.len() == 1 {
                        columns.push((name.clone(), vec![0.0; n]));
                    }
                }
            }
        }
        let mut basis: Vec<Vec<f64>> = Vec::new();
        let mut terms = Vec::new();
        for (name, column) in &columns {
            match orthogonal_remainder(column, &basis) {
                Some(q) => {
                    basis.push(q);
                    terms.push(name.clone());
                }
                None => {
                    return Err(RiffleError::bad_input(
                        &sheet.path,
                        format!("column '{}'", name.split('=').next().unwrap_or(name)),
                        if name == "intercept" {
                            "no samples".to_string()
                        } else {
                            format!(
                                "covariate '{name}' is constant or a combination of the intercept and \
                                 the covariates before it; remove it"
                            )
                        },
                    ));
                }
            }
        }
        let explained_by = |terms: &[String]| {
            if terms.len() > 1 {
                format!("the covariates ({})", terms[1..].join(", "))
            } else {
                "the intercept".to_string()
            }
        };
        let x = &xs[0];
        let mut residual = x.clone();
        for q in &basis {
            let c: f64 = q.iter().zip(&residual).map(|(a, b)| a * b).sum();
            residual.iter_mut().zip(q).for_each(|(r, qi)| *r -= c * qi);
        }
        let norm = residual.iter().map(|v| v * v).sum::<f64>().sqrt();
        let x_norm = x.iter().map(|v| v * v).sum::<f64>().sqrt();
        if norm <= 1e-10 * x_norm.max(1e-300) {
            return Err(RiffleError::bad_input(
                &sheet.path,
                format!("column '{effect_name}'"),
                format!(
                    "'{effect_name}' is fully explained by {}; nothing is left to test",
                    explained_by(&terms)
                ),
            ));
        }
        let effect_direction: Vec<f64> = residual.iter().map(|v| v / norm).collect();
        let mut spanned = basis.clone();
        spanned.push(effect_direction.clone());
        let mut further_effects = Vec::new();
        for x in &xs[1..] {
            match orthogonal_remainder(x, &spanned) {
                Some(q) => {
                    spanned.push(q.clone());
                    further_effects.push(q);
                }
                None => {
                    return Err(RiffleError::bad_input(
                        &sheet.path,
                        format!("column '{effect_name}'"),
                        format!(
                            "a level of '{effect_name}' is fully explained by {} and the other \
                             levels; nothing is left to test for it",
                            explained_by(&terms)
                        ),
                    ))
                }
            }
        }
        let df = n as f64 - spanned.len() as f64;
        if df < 1.0 {
            return Err(RiffleError::bad_input(
                &sheet.path,
                "covariates",
                format!(
                    "{} model terms for {n} units leave no residual degrees of freedom",
                    spanned.len()
                ),
            ));
        }
        Ok(LinearModel {
            nuisance_basis: basis,
            effect_direction,
            further_effects,
            effect_norm: norm,
            df,
            terms,
            raw_nuisance: columns.into_iter().map(|(_, c)| c).collect(),
            raw_effects: xs.to_vec(),
        })
    }

    /// The model refitted on the units `observed` (ascending) of a feature
    /// with missing values. Nuisance columns that add nothing on those
    /// units (a covariate level none of them has, a covariate constant on
    /// them) are dropped: the nuisance span, and so every fit, is the same
    /// without them, and the residual df count only what is left (as a
    /// least-squares fit by pseudo-inverse counts the rank). `None` when
    /// the effect (or one of its columns) is explained by the covariates on
    /// these units, or fewer than two residual df remain.
    pub fn restricted(&self, observed: &[usize]) -> std::result::Result<LinearModel, Unfit> {
        let take = |c: &Vec<f64>| -> Vec<f64> { observed.iter().map(|&i| c[i]).collect() };
        let mut basis: Vec<Vec<f64>> = Vec::new();
        for column in &self.raw_nuisance {
            if let Some(q) = orthogonal_remainder(&take(column), &basis) {
                basis.push(q);
            }
        }
        // A model without its design columns (itself refitted) has
        // nothing to refit from.
        let x = take(self.raw_effects.first().ok_or(Unfit::Confounded)?);
        let mut residual = x.clone();
        for q in &basis {
            let c: f64 = q.iter().zip(&residual).map(|(a, b)| a * b).sum();
            residual.iter_mut().zip(q).for_each(|(r, qi)| *r -= c * qi);
        }
        let norm = residual.iter().map(|v| v * v).sum::<f64>().sqrt();
        let x_norm = x.iter().map(|v| v * v).sum::<f64>().sqrt();
        if norm <= 1e-10 * x_norm.max(1e-300) {
            return Err(Unfit::Confounded);
        }
        let effect_direction: Vec<f64> = residual.iter().map(|v| v / norm).collect();
        let mut spanned = basis.clone();
        spanned.push(effect_direction.clone());
        let mut further_effects = Vec::new();
        for x in self.raw_effects.iter().skip(1) {
            let q = orthogonal_remainder(&take(x), &spanned).ok_or(Unfit::Confounded)?;
            spanned.push(q.clone());
            further_effects.push(q);
        }
        let df = observed.len() as f64 - spanned.len() as f64;
        if df < 2.0 {
            return Err(Unfit::TooFewUnits);
        }
        Ok(LinearModel {
            nuisance_basis: basis,
            effect_direction,
            further_effects,
            effect_norm: norm,
            df,
            terms: Vec::new(),
            raw_nuisance: Vec::new(),
            raw_effects: Vec::new(),
        })
    }

    /// y minus its projection on span(Z).
    pub fn residualize(&self, y: &[f64], out: &mut [f64]) {
        out.copy_from_slice(y);
        for q in &self.nuisance_basis {
            let c: f64 = q.iter().zip(out.iter()).map(|(a, b)| a * b).sum();
            out.iter_mut().zip(q).for_each(|(r, qi)| *r -= c * qi);
        }
    }
}

/// Why a model cannot be refitted on a feature's observed units.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Unfit {
    /// The effect is explained by the covariates there.
    Confounded,
    /// Fewer than two residual degrees of freedom.
    TooFewUnits,
}

/// `column` minus its projection on an orthonormal `basis`, normalized;
/// None when nothing independent is left (modified Gram–Schmidt, twice for
/// stability).
fn orthogonal_remainder(column: &[f64], basis: &[Vec<f64>]) -> Option<Vec<f64>> {
    let original = column.iter().map(|v| v * v).sum::<f64>().sqrt();
    if original == 0.0 {
        return None;
    }
    let mut v = column.to_vec();
    for _ in 0..2 {
        for q in basis {
            let c: f64 = q.iter().zip(&v).map(|(a, b)| a * b).sum();
            v.iter_mut().zip(q).for_each(|(r, qi)| *r -= c * qi);
        }
    }
    let norm = v.iter().map(|x| x * x).sum::<f64>().sqrt();
    (norm > 1e-9 * original).then(|| v.iter().map(|x| x / norm).collect())
}
