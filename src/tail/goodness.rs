//! Anderson–Darling goodness of fit of a fitted GPD, judged with the
//! percentage points of Choulakian & Stephens (2001), "Goodness-of-fit tests
//! for the generalized Pareto distribution", Technometrics 43(4):478-484,
//! Table 2 (A^2 when both shape and scale are estimated by maximum
//! likelihood). These are asymptotic points; the paper reports they serve
//! well for moderate n, which is how Knijnenburg et al. (2009) use them.

use super::gpd::gpd_ln_sf;

/// Upper-tail probabilities of the table's columns.
const LEVELS: [f64; 8] = [0.5, 0.25, 0.10, 0.05, 0.025, 0.01, 0.005, 0.001];

/// Rows of Table 2 by shape in OUR convention (shape = -k of the paper,
/// whose rows run k = -0.9, -0.5, -0.2, -0.1, 0, 0.1, ..., 0.5). The values
/// were transcribed from a public reproduction of the table; each row
/// increases along the levels and down the shapes, which the unit tests
/// check, and tests/python/check_ad_points.py (run by .ci/run) compares
/// the rows for shapes 0.5, 0.2, 0 and -0.2 with A^2 simulated from scipy's
/// genpareto fits (within 10%; measured 0-7%).
const SHAPES: [f64; 10] = [0.9, 0.5, 0.2, 0.1, 0.0, -0.1, -0.2, -0.3, -0.4, -0.5];
const POINTS: [[f64; 8]; 10] = [
    [0.339, 0.471, 0.641, 0.771, 0.905, 1.086, 1.226, 1.559],
    [0.356, 0.499, 0.685, 0.830, 0.978, 1.180, 1.336, 1.707],
    [0.376, 0.534, 0.741, 0.903, 1.069, 1.296, 1.471, 1.893],
    [0.386, 0.550, 0.766, 0.935, 1.110, 1.348, 1.532, 1.966],
    [0.397, 0.569, 0.796, 0.974, 1.158, 1.409, 1.603, 2.064],
    [0.410, 0.591, 0.831, 1.020, 1.215, 1.481, 1.687, 2.176],
    [0.426, 0.617, 0.873, 1.074, 1.283, 1.567, 1.788, 2.314],
    [0.445, 0.649, 0.924, 1.140, 1.365, 1.672, 1.909, 2.475],
    [0.468, 0.688, 0.985, 1.221, 1.465, 1.799, 2.058, 2.674],
    [0.496, 0.735, 1.061, 1.321, 1.590, 1.958, 2.243, 2.922],
];

/// Anderson–Darling A^2 of exceedances sorted ASCENDING against
/// GPD(shape, scale):
///     A^2 = -n - (1/n) * sum_i (2i - 1) * [ln z_i + ln(1 - z_(n+1-i))],
/// z_i = F(y_(i)) (Stephens 1974, JASA 69:730-737; common practice). Both
/// logs come from ln P(Y > y) so that neither tail loses digits. Infinite
/// when a point sits where the fitted CDF is 0 or 1.
pub fn anderson_darling(sorted_exceedances: &[f64], shape: f64, scale: f64) -> f64 {
    let n = sorted_exceedances.len();
    if n == 0 {
        return f64::NAN;
    }
    let mut total = 0.0;
    for (i, &y) in sorted_exceedances.iter().enumerate() {
        let ln_sf_low = gpd_ln_sf(y, shape, scale);
        let ln_cdf = ln_one_minus_exp(ln_sf_low);
        let ln_sf_high = gpd_ln_sf(sorted_exceedances[n - 1 - i], shape, scale);
        total += (2 * i + 1) as f64 * (ln_cdf + ln_sf_high);
    }
    let a2 = -(n as f64) - total / n as f64;
    if a2.is_nan() {
        f64::INFINITY
    } else {
        a2
    }
}

/// ln(1 - exp(x)) for x <= 0, accurate at both ends (Mächler 2012,
/// "Accurately computing log(1 - exp(-|a|))", CRAN Rmpfr vignette).
fn ln_one_minus_exp(x: f64) -> f64 {
    if x > -std::f64::consts::LN_2 {
        (-x.exp_m1()).ln()
    } else {
        (-x.exp()).ln_1p()
    }
}

/// Critical value of A^2 at upper-tail `level` for a fitted `shape`.
/// Linear in the shape between rows (clamped to the table's range -0.5..0.9:
/// below -0.5 the MLE is not regular and no table exists, so the nearest row
/// is the best available approximation) and linear in ln(level) between
/// columns (clamped to 0.001..0.5).
pub fn ad_critical_value(shape: f64, level: f64) -> f64 {
    let shape = shape.clamp(SHAPES[SHAPES.len() - 1], SHAPES[0]);
    let level = if level.is_nan() {
        0.05
    } else {
        level.clamp(LEVELS[LEVELS.len() - 1], LEVELS[0])
    };
    // SHAPES decreases; find the row pair bracketing `shape`.
    let mut row = 0;
    while row + 2 < SHAPES.len() && shape < SHAPES[row + 1] {
        row += 1;
    }
    let weight_row = (SHAPES[row] - shape) / (SHAPES[row] - SHAPES[row + 1]);
    let mut column = 0;
    while column + 2 < LEVELS.len() && level < LEVELS[column + 1] {
        column += 1;
    }
    let weight_column =
        (LEVELS[column].ln() - level.ln()) / (LEVELS[column].ln() - LEVELS[column + 1].ln());
    let at =
        |r: usize| POINTS[r][column] + weight_column * (POINTS[r][column + 1] - POINTS[r][column]);
    at(row) + weight_row * (at(row + 1) - at(row))
}

/// Whether A^2 passes (does not reject the GPD) at `level`.
pub fn gpd_fit_accepted(sorted_exceedances: &[f64], shape: f64, scale: f64, level: f64) -> bool {
    anderson_darling(sorted_exceedances, shape, scale) <= ad_critical_value(shape, level)
}

#[cfg(test)]
pub(super) fn table() -> (&'static [f64], &'static [f64], &'static [[f64; 8]]) {
    (&SHAPES, &LEVELS, &POINTS)
}
