//! Generalized Pareto distribution (GPD) for threshold exceedances: CDF,
//! survival function, log-likelihood and the maximum-likelihood fit.
//!
//! Parametrisation: F(y) = 1 - (1 + shape * y / scale)^(-1 / shape) for
//! y >= 0, with the exponential limit 1 - exp(-y / scale) at shape = 0. A
//! positive shape is a heavy tail; a negative shape ends the support at
//! scale / |shape|. This is the sign convention of scipy.stats.genpareto
//! (its `c`) and the opposite of Choulakian & Stephens' `k`.

/// A fitted GPD. `log_likelihood` is the maximised log-likelihood of the
/// exceedances it was fitted to.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct GpdFit {
    pub shape: f64,
    pub scale: f64,
    pub log_likelihood: f64,
}

impl GpdFit {
    /// Upper end of the support (infinite unless the shape is negative).
    pub fn upper_endpoint(&self) -> f64 {
        if self.shape < 0.0 {
            self.scale / -self.shape
        } else {
            f64::INFINITY
        }
    }
}

/// ln P(Y > y). Written with `ln_1p` so that it stays accurate for shapes
/// near zero, where (1 + s x)^(-1/s) -> exp(-x) without a special branch
/// (only shape == 0 exactly needs one).
pub fn gpd_ln_sf(y: f64, shape: f64, scale: f64) -> f64 {
    if y.is_nan() || shape.is_nan() || scale.is_nan() || scale <= 0.0 {
        return f64::NAN;
    }
    if y <= 0.0 {
        return 0.0;
    }
    let x = y / scale;
    if shape == 0.0 {
        return -x;
    }
    let base = shape * x;
    if base <= -1.0 {
        return f64::NEG_INFINITY;
    }
    -base.ln_1p() / shape
}

/// Survival function P(Y > y) of the GPD.
pub fn gpd_sf(y: f64, shape: f64, scale: f64) -> f64 {
    gpd_ln_sf(y, shape, scale).exp()
}

/// Distribution function P(Y <= y) of the GPD; `-expm1` keeps digits when
/// the CDF is tiny (y near 0).
pub fn gpd_cdf(y: f64, shape: f64, scale: f64) -> f64 {
    -gpd_ln_sf(y, shape, scale).exp_m1()
}

/// Log-likelihood of exceedances `y` (all >= 0) under GPD(shape, scale);
/// minus infinity when a point lies outside the support.
pub fn gpd_log_likelihood(exceedances: &[f64], shape: f64, scale: f64) -> f64 {
    if scale.is_nan() || scale <= 0.0 || shape.is_nan() {
        return f64::NAN;
    }
    let n = exceedances.len() as f64;
    if shape == 0.0 {
        let total: f64 = exceedances.iter().sum();
        return -n * scale.ln() - total / scale;
    }
    let mut sum_log = 0.0;
    for &y in exceedances {
        let base = shape * y / scale;
        if base <= -1.0 {
            // At the endpoint the density is finite and nonzero only for
            // shape = -1 (uniform); elsewhere it is zero or unbounded.
            if shape == -1.0 && base == -1.0 {
                continue;
            }
            return f64::NEG_INFINITY;
        }
        sum_log += base.ln_1p();
    }
    -n * scale.ln() - (1.0 + 1.0 / shape) * sum_log
}

/// Maximum-likelihood fit of a GPD to exceedances (values >= 0, at least
/// one > 0, at least 3 of them). `None` when the data cannot support a fit.
pub fn fit_gpd(exceedances: &[f64]) -> Option<GpdFit> {
    fit_gpd_impl(exceedances, None)
}

/// Maximum-likelihood fit restricted to GPDs whose support reaches at least
/// `min_endpoint` (shape >= 0, or scale / |shape| >= min_endpoint). Used so
/// that an observed statistic beyond the fitted end of a short tail keeps a
/// positive tail probability (Peschel, Boulesteix, von Mutius & Müller 2026,
/// arXiv:2602.22975, "support constraint").
pub fn fit_gpd_bounded(exceedances: &[f64], min_endpoint: f64) -> Option<GpdFit> {
    if min_endpoint <= 0.0 || !min_endpoint.is_finite() {
        return None;
    }
    fit_gpd_impl(exceedances, Some(min_endpoint))
}

// Method: Grimshaw (1993), "Computing maximum likelihood estimates for the
// generalized Pareto distribution", Technometrics 35(2):185-191. With
// theta = shape / scale, the likelihood equation for the shape at fixed theta
// has the closed form shape(theta) = mean(ln(1 + theta * y)), so the 2-D
// problem becomes the 1-D profile
//     l(theta) = -n * (ln(scale(theta)) + shape(theta) + 1),
//     scale(theta) = shape(theta) / theta  (-> mean(y) as theta -> 0),
// over theta > -1 / max(y). Grimshaw searches the roots of the profile's
// derivative; we maximise the profile itself (a coarse grid, then Brent's
// 1-D minimiser on the best bracket), which needs no derivative and behaves
// at theta = 0, where the shape crosses zero, because ln_1p keeps
// shape(theta)/theta accurate there.
//
// The profile grows without bound as theta -> -1/max(y) (shape -> -inf),
// where the likelihood itself is unbounded for shape < -1 (Smith 1985,
// Biometrika 72:67-90): we search only shape >= -1, where the MLE is the
// local maximum the literature means. To work on a scale-free variable we
// use tau = theta * max(y) in (-1, inf) and search u = ln(1 + tau).
fn fit_gpd_impl(exceedances: &[f64], min_endpoint: Option<f64>) -> Option<GpdFit> {
    let n = exceedances.len();
    if n < 3 {
        return None;
    }
    let mut y_max = 0.0f64;
    for &y in exceedances {
        if y < 0.0 || !y.is_finite() {
            return None;
        }
        y_max = y_max.max(y);
    }
    if y_max <= 0.0 {
        return None;
    }
    let profile = Profile {
        scaled: exceedances.iter().map(|&y| y / y_max).collect(),
        y_max,
    };
    // A support ending at or beyond min_endpoint means theta >= -1/min_endpoint.
    // The data themselves already force theta > -1/y_max.
    let u_floor = match min_endpoint {
        Some(end) if end > y_max => (1.0 - y_max / end).ln(), // ln(1 + tau_min)
        _ => U_LOWEST,
    };
    let u_low = u_floor.max(U_LOWEST);
    let (u_best, _) = maximise_profile(&profile, u_low, U_HIGHEST)?;
    let (shape, scale) = profile.parameters(u_best)?;
    let log_likelihood = gpd_log_likelihood(exceedances, shape, scale);
    if !log_likelihood.is_finite() {
        return None;
    }
    Some(GpdFit {
        shape,
        scale,
        log_likelihood,
    })
}

// tau = expm1(u): u = -14 is tau ~ -1 + 8e-7 (a support ending within a
// millionth of the largest point); u = 22 is tau ~ 3.6e9, far beyond any
// shape a permutation null produces (tau ~ n^shape for heavy tails).
const U_LOWEST: f64 = -14.0;
const U_HIGHEST: f64 = 22.0;
const GRID_STEP: f64 = 1.5;

struct Profile {
    scaled: Vec<f64>,
    y_max: f64,
}

impl Profile {
    /// (shape, scale) on the profile at u; `None` outside shape >= -1.
    fn parameters(&self, u: f64) -> Option<(f64, f64)> {
        let tau = u.exp_m1();
        let n = self.scaled.len() as f64;
        if tau == 0.0 {
            let mean: f64 = self.scaled.iter().sum::<f64>() / n;
            return Some((0.0, mean * self.y_max));
        }
        let mut sum_log = 0.0;
        for &s in &self.scaled {
            sum_log += (tau * s).ln_1p();
        }
        let shape = sum_log / n;
        if shape.is_nan() || shape < -1.0 {
            return None;
        }
        let scale = self.y_max * shape / tau;
        if scale <= 0.0 || !scale.is_finite() {
            return None;
        }
        Some((shape, scale))
    }

    /// Negative profile log-likelihood divided by n (minimised).
    fn objective(&self, u: f64) -> f64 {
        match self.parameters(u) {
            Some((shape, scale)) => scale.ln() + shape + 1.0,
            None => f64::INFINITY,
        }
    }
}

fn maximise_profile(profile: &Profile, u_low: f64, u_high: f64) -> Option<(f64, f64)> {
    let steps = ((u_high - u_low) / GRID_STEP).ceil().max(2.0) as usize;
    let step = (u_high - u_low) / steps as f64;
    let mut best_index = 0;
    let mut best_value = f64::INFINITY;
    for index in 0..=steps {
        let value = profile.objective(u_low + step * index as f64);
        if value < best_value {
            best_value = value;
            best_index = index;
        }
    }
    if !best_value.is_finite() {
        return None;
    }
    let a = u_low + step * best_index.saturating_sub(1) as f64;
    let b = u_low + step * (best_index + 1).min(steps) as f64;
    let (u, value) = brent_minimise(|u| profile.objective(u), a, b, 1e-9);
    if value <= best_value {
        Some((u, value))
    } else {
        Some((u_low + step * best_index as f64, best_value))
    }
}

/// Brent's (1973) minimiser ("Algorithms for Minimization without
/// Derivatives", ch. 5): golden section with parabolic steps. Parabolic
/// steps are skipped while any of the three points is infinite, so the
/// objective may return +inf outside its domain.
fn brent_minimise(f: impl Fn(f64) -> f64, mut a: f64, mut b: f64, tol: f64) -> (f64, f64) {
    const GOLDEN: f64 = 0.381_966_011_250_105_1;
    let mut x = a + GOLDEN * (b - a);
    let (mut w, mut v) = (x, x);
    let mut fx = f(x);
    let (mut fw, mut fv) = (fx, fx);
    let mut d: f64 = 0.0;
    let mut e: f64 = 0.0;
    for _ in 0..200 {
        let middle = 0.5 * (a + b);
        let tol1 = tol * x.abs() + 1e-12;
        let tol2 = 2.0 * tol1;
        if (x - middle).abs() <= tol2 - 0.5 * (b - a) {
            break;
        }
        let mut golden_step = true;
        if e.abs() > tol1 && fx.is_finite() && fw.is_finite() && fv.is_finite() {
            let r = (x - w) * (fx - fv);
            let mut q = (x - v) * (fx - fw);
            let mut p = (x - v) * q - (x - w) * r;
            q = 2.0 * (q - r);
            if q > 0.0 {
                p = -p;
            }
            q = q.abs();
            let e_previous = e;
            if p.abs() < (0.5 * q * e_previous).abs() && p > q * (a - x) && p < q * (b - x) {
                e = d;
                d = p / q;
                let trial = x + d;
                if trial - a < tol2 || b - trial < tol2 {
                    d = if middle > x { tol1 } else { -tol1 };
                }
                golden_step = false;
            }
        }
        if golden_step {
            e = if x >= middle { a - x } else { b - x };
            d = GOLDEN * e;
        }
        let u = if d.abs() >= tol1 {
            x + d
        } else if d > 0.0 {
            x + tol1
        } else {
            x - tol1
        };
        let fu = f(u);
        if fu <= fx {
            if u >= x {
                a = x;
            } else {
                b = x;
            }
            v = w;
            fv = fw;
            w = x;
            fw = fx;
            x = u;
            fx = fu;
        } else {
            if u < x {
                a = u;
            } else {
                b = u;
            }
            if fu <= fw || w == x {
                v = w;
                fv = fw;
                w = u;
                fw = fu;
            } else if fu <= fv || v == x || v == w {
                v = u;
                fv = fu;
            }
        }
    }
    (x, fx)
}
