//! Storey's estimate of the proportion of true null hypotheses, pi0, from
//! counts of p-values between the points of a fixed lambda grid, so that
//! neither the estimate nor its bootstrap needs the p-values themselves.

use rand_chacha::ChaCha20Rng;
use rand_core::{RngCore, SeedableRng};

/// Grid 0, 0.05, ..., 0.95 of Storey, Taylor & Siegmund (2004), JRSS-B 66,
/// section 6 (bootstrap choice of lambda).
pub(crate) const GRID_LEN: usize = 20;

/// `k / 20` is the double nearest to the decimal 0.05 k, the same value a
/// user typing that lambda gets, unlike the accumulated `0.05 * k`.
pub(crate) fn grid_lambda(k: usize) -> f64 {
    k as f64 / GRID_LEN as f64
}

/// Counts of p-values in the intervals between grid points:
/// `counts[0]` holds p <= 0, `counts[i]` holds lambda_{i-1} < p <= lambda_i
/// (lambda_20 = 1), so `#{p > lambda_k} = sum(counts[k+1..])`.
#[derive(Debug, Clone, Default)]
pub(crate) struct GridCounts {
    pub counts: [u64; GRID_LEN + 1],
}

impl GridCounts {
    pub fn add(&mut self, p: f64) {
        let bin = (0..GRID_LEN).take_while(|&k| grid_lambda(k) < p).count();
        self.counts[bin] += 1;
    }

    fn above(counts: &[u64; GRID_LEN + 1], k: usize) -> u64 {
        counts[k + 1..].iter().sum()
    }
}

/// pi0(lambda) = #{p > lambda} / ((1 - lambda) m), uncapped.
pub(crate) fn storey_pi0(n_above: u64, lambda: f64, m: u64) -> f64 {
    n_above as f64 / ((1.0 - lambda) * m as f64)
}

/// Bootstrap choice of lambda of Storey, Taylor & Siegmund (2004), JRSS-B
/// 66: MSE(lambda) = mean_b (pi0*_b(lambda) - min_l pi0(l))^2 over `n_boot`
/// resamples; returns (lambda with the smallest MSE, pi0 at it, uncapped).
/// A resample of m p-values with replacement only changes the interval
/// counts, and those follow a multinomial law with the observed interval
/// frequencies, drawn here as a chain of conditional binomials.
pub(crate) fn bootstrap_lambda(grid: &GridCounts, m: u64, n_boot: u32, seed: u64) -> (f64, f64) {
    let observed: Vec<f64> = (0..GRID_LEN)
        .map(|k| storey_pi0(GridCounts::above(&grid.counts, k), grid_lambda(k), m))
        .collect();
    let min_observed = observed.iter().copied().fold(f64::INFINITY, f64::min);
    let mut rng = ChaCha20Rng::seed_from_u64(seed);
    let mut squared_error = [0.0f64; GRID_LEN];
    let mut resampled = [0u64; GRID_LEN + 1];
    for _ in 0..n_boot {
        let mut remaining_draws = m;
        let mut remaining_weight: u64 = grid.counts.iter().sum();
        for (bin, &weight) in grid.counts.iter().enumerate() {
            let drawn = if weight == remaining_weight {
                remaining_draws
            } else if weight == 0 {
                0
            } else {
                let prob = weight as f64 / remaining_weight as f64;
                binomial(&mut rng, remaining_draws, prob)
            };
            resampled[bin] = drawn;
            remaining_draws -= drawn;
            remaining_weight -= weight;
        }
        for (k, err) in squared_error.iter_mut().enumerate() {
            let pi0 = storey_pi0(GridCounts::above(&resampled, k), grid_lambda(k), m);
            let diff = pi0 - min_observed;
            *err += diff * diff;
        }
    }
    // First minimum: a deterministic choice when MSEs tie.
    let mut best = 0;
    for k in 1..GRID_LEN {
        if squared_error[k] < squared_error[best] {
            best = k;
        }
    }
    (grid_lambda(best), observed[best])
}

/// Uniform double in [0, 1) from the top 53 bits.
fn uniform(rng: &mut ChaCha20Rng) -> f64 {
    (rng.next_u64() >> 11) as f64 * (1.0 / (1u64 << 53) as f64)
}

/// Exact binomial draw by inversion, visiting outcomes outward from the
/// mode (mode, mode+1, mode-1, ...): the expected number of steps grows as
/// sqrt(n p (1-p)), a few thousand for n = 10^8, and needs no table.
pub(crate) fn binomial(rng: &mut ChaCha20Rng, n: u64, prob: f64) -> u64 {
    if n == 0 || prob <= 0.0 {
        return 0;
    }
    if prob >= 1.0 {
        return n;
    }
    // Walking the smaller tail keeps the ratio p/q <= 1.
    if prob > 0.5 {
        return n - binomial(rng, n, 1.0 - prob);
    }
    let q = 1.0 - prob;
    let odds = prob / q;
    let mode = (((n + 1) as f64 * prob).floor() as u64).min(n);
    let pmf_mode = binomial_ln_pmf(mode, n, prob).exp();
    let u = uniform(rng);
    let mut cumulative = pmf_mode;
    if u < cumulative {
        return mode;
    }
    let (mut hi, mut pmf_hi) = (mode, pmf_mode);
    let (mut lo, mut pmf_lo) = (mode, pmf_mode);
    loop {
        let can_go_up = hi < n && pmf_hi > 0.0;
        let can_go_down = lo > 0 && pmf_lo > 0.0;
        if !can_go_up && !can_go_down {
            // Rounding left the total a hair below u: the mass not yet
            // visited is below the double precision of the sum.
            return mode;
        }
        if can_go_up {
            pmf_hi *= (n - hi) as f64 / (hi + 1) as f64 * odds;
            hi += 1;
            cumulative += pmf_hi;
            if u < cumulative {
                return hi;
            }
        }
        if can_go_down {
            pmf_lo *= lo as f64 / (n - lo + 1) as f64 / odds;
            lo -= 1;
            cumulative += pmf_lo;
            if u < cumulative {
                return lo;
            }
        }
    }
}

/// ln P(X = k), X ~ Binomial(n, p), in the saddle-point form of Loader
/// (2000), "Fast and accurate computation of binomial probabilities"
/// (formulas written from memory), which avoids the cancellation of
/// ln n! - ln k! - ln (n-k)! for large n.
pub(crate) fn binomial_ln_pmf(k: u64, n: u64, p: f64) -> f64 {
    let q = 1.0 - p;
    if k == 0 {
        return n as f64 * (-p).ln_1p();
    }
    if k == n {
        return n as f64 * p.ln();
    }
    let (nf, kf, rf) = (n as f64, k as f64, (n - k) as f64);
    stirling_error(n)
        - stirling_error(k)
        - stirling_error(n - k)
        - deviance_term(kf, nf * p)
        - deviance_term(rf, nf * q)
        + 0.5 * (nf / (2.0 * std::f64::consts::PI * kf * rf)).ln()
}

/// ln n! - ln(sqrt(2 pi n) (n/e)^n).
fn stirling_error(n: u64) -> f64 {
    let nf = n as f64;
    if n <= 15 {
        // 15! is exact in a double.
        let factorial: f64 = (1..=n).map(|i| i as f64).product();
        return factorial.ln() - (nf + 0.5) * nf.ln() + nf
            - 0.5 * (2.0 * std::f64::consts::PI).ln();
    }
    // Stirling series 1/12n - 1/360n^3 + 1/1260n^5 - 1/1680n^7 + 1/1188n^9.
    const S0: f64 = 1.0 / 12.0;
    const S1: f64 = 1.0 / 360.0;
    const S2: f64 = 1.0 / 1260.0;
    const S3: f64 = 1.0 / 1680.0;
    const S4: f64 = 1.0 / 1188.0;
    let nn = nf * nf;
    (S0 - (S1 - (S2 - (S3 - S4 / nn) / nn) / nn) / nn) / nf
}

/// x ln(x / mean) + mean - x, by its series when x is near the mean, where
/// the direct form cancels.
fn deviance_term(x: f64, mean: f64) -> f64 {
    if (x - mean).abs() < 0.1 * (x + mean) {
        let v = (x - mean) / (x + mean);
        let mut sum = (x - mean) * v;
        let mut term = 2.0 * x * v;
        let v2 = v * v;
        for j in 1..1000 {
            term *= v2;
            let next = sum + term / (2 * j + 1) as f64;
            if next == sum {
                return next;
            }
            sum = next;
        }
        return sum;
    }
    x * (x / mean).ln() + mean - x
}
