//! Exact p-value when relabelings are drawn at random WITH replacement:
//! Phipson & Smyth (2010), "Permutation P-values should never be zero:
//! calculating exact P-values when permutations are randomly drawn", Stat.
//! Appl. Genet. Mol. Biol. 9(1), Article 39.
//!
//! With m_t equally likely distinct relabelings (the observed one among
//! them), B draws and b of them at least as extreme as the observed
//! statistic, the p-value averages the binomial CDF over the unknown true
//! tail probability p_t in {1/m_t, 2/m_t, ..., 1}:
//!     p = (1/m_t) * sum_{i=1}^{m_t} F(b; B, i/m_t).
//! For large m_t the sum is a midpoint rule for the integral of F over
//! (0, 1], which equals (b+1)/(B+1), whence the paper's approximation
//!     p ~= (b+1)/(B+1) - integral_0^{0.5/m_t} F(b; B, p) dp.

use statrs::function::beta::beta_reg;
use std::sync::OnceLock;

/// Work allowed for the direct sum. Every m_t up to this is summed exactly;
/// larger m_t are also summed exactly when the terms die out within this
/// many (B large against m_t, where the midpoint rule would be poor).
const DIRECT_SUM_TERMS: u128 = 10_000;

/// Phipson–Smyth exact p-value. `b` is clamped to `big_b`; `m_t == 0` (no
/// relabeling space) gives NaN.
pub fn phipson_smyth_exact(b: u64, big_b: u64, m_t: u128) -> f64 {
    if m_t == 0 {
        return f64::NAN;
    }
    if b >= big_b {
        return 1.0;
    }
    if let Some(sum) = direct_sum(b, big_b, m_t) {
        return sum;
    }
    let p_upper = (b as f64 + 1.0) / (big_b as f64 + 1.0);
    let width = 0.5 / m_t as f64;
    (p_upper - integral_of_binomial_cdf(b, big_b, width)).clamp(0.0, p_upper)
}

/// Binomial CDF F(k; n, p) = I_{1-p}(n - k, k + 1) (regularised incomplete
/// beta; Abramowitz & Stegun 26.5.24).
pub fn binomial_cdf(k: u64, n: u64, p: f64) -> f64 {
    if k >= n || p <= 0.0 {
        return 1.0;
    }
    if p >= 1.0 {
        return 0.0;
    }
    beta_reg((n - k) as f64, k as f64 + 1.0, 1.0 - p)
}

/// The sum over i = 1..m_t, term i = F(b; B, i/m_t). Terms fall with i, so
/// once the remaining (m_t - i) terms, each at most the current one, cannot
/// move the total by a relative 1e-17 the rest is dropped: the result is
/// the exact sum to rounding. `None` if that needs more than the budget.
fn direct_sum(b: u64, big_b: u64, m_t: u128) -> Option<f64> {
    let m = m_t as f64;
    let mut total = 0.0;
    let mut i: u128 = 1;
    while i <= m_t {
        if i > DIRECT_SUM_TERMS {
            return None;
        }
        let term = binomial_cdf(b, big_b, i as f64 / m);
        total += term;
        let remaining = (m_t - i) as f64;
        if term * remaining <= 1e-17 * total {
            break;
        }
        i += 1;
    }
    Some(total / m)
}

/// integral_0^width F(b; B, p) dp by composite Gauss–Legendre. F moves on
/// the scale sqrt(b+1)/B in p, so the panels are made no wider than a few
/// of those; 32 nodes per panel then integrate it to rounding.
fn integral_of_binomial_cdf(b: u64, big_b: u64, width: f64) -> f64 {
    let feature_scale = ((b as f64 + 1.0).sqrt() / big_b as f64).max(f64::MIN_POSITIVE);
    let panels = (width / (4.0 * feature_scale)).ceil().clamp(1.0, 4096.0) as usize;
    let panel_width = width / panels as f64;
    let (nodes, weights) = gauss_legendre_32();
    let mut total = 0.0;
    for panel in 0..panels {
        let centre = (panel as f64 + 0.5) * panel_width;
        let half = 0.5 * panel_width;
        let mut panel_sum = 0.0;
        for (node, weight) in nodes.iter().zip(weights) {
            panel_sum += weight * binomial_cdf(b, big_b, centre + half * node);
        }
        total += half * panel_sum;
    }
    total
}

/// 32-point Gauss–Legendre nodes and weights on [-1, 1], by Newton's
/// method on P_32 from the Chebyshev-like initial guesses cos(pi (i - 1/4) /
/// (n + 1/2)) (Press et al., Numerical Recipes, 3rd ed., sec. 4.6).
fn gauss_legendre_32() -> &'static ([f64; 32], [f64; 32]) {
    static RULE: OnceLock<([f64; 32], [f64; 32])> = OnceLock::new();
    RULE.get_or_init(|| {
        const N: usize = 32;
        let mut nodes = [0.0; N];
        let mut weights = [0.0; N];
        for i in 0..N / 2 {
            let mut x = (std::f64::consts::PI * (i as f64 + 0.75) / (N as f64 + 0.5)).cos();
            let mut derivative = 0.0;
            for _ in 0..100 {
                let (mut p0, mut p1) = (1.0, x);
                for k in 2..=N {
                    let k = k as f64;
                    let p2 = ((2.0 * k - 1.0) * x * p1 - (k - 1.0) * p0) / k;
                    p0 = p1;
                    p1 = p2;
                }
                derivative = N as f64 * (x * p1 - p0) / (x * x - 1.0);
                let step = p1 / derivative;
                x -= step;
                if step.abs() < 1e-16 {
                    break;
                }
            }
            let weight = 2.0 / ((1.0 - x * x) * derivative * derivative);
            nodes[i] = -x;
            nodes[N - 1 - i] = x;
            weights[i] = weight;
            weights[N - 1 - i] = weight;
        }
        (nodes, weights)
    })
}

#[cfg(test)]
pub(super) fn quadrature_rule() -> &'static ([f64; 32], [f64; 32]) {
    gauss_legendre_32()
}
