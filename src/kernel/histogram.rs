//! The pooled null: every relabelled statistic of every feature, binned.

/// All relabelled kernel statistics of all features, counted in fine bins
/// (1 sign, 8 exponent and 10 mantissa bits of the f32 value: a relative
/// resolution of 2^-10), merged by addition across chunks, workers and
/// shards. Gives the pooled-null p-value of an observed statistic: the
/// share of null statistics in its bin or above (Storey & Tibshirani 2003,
/// PNAS 100, null pooled over features and relabelings).
#[derive(Debug, Clone)]
pub struct NullHistogram {
    pub counts: Vec<u64>,
}

impl NullHistogram {
    pub const BINS: usize = 1 << 19;

    #[inline(always)]
    pub fn bin(v: f32) -> usize {
        let bits = v.to_bits();
        // Order-preserving map of f32 to u32, then the top 19 bits.
        let ordered = if bits >> 31 == 1 {
            !bits
        } else {
            bits | 0x8000_0000
        };
        (ordered >> 13) as usize
    }

    pub fn empty() -> Self {
        NullHistogram {
            counts: vec![0; Self::BINS],
        }
    }

    pub fn add(&mut self, other: &[u64]) {
        for (a, b) in self.counts.iter_mut().zip(other) {
            *a += b;
        }
    }

    /// Turns the counts into "null statistics in this bin or above".
    pub fn into_upper_tail(mut self) -> UpperTail {
        let mut running = 0u64;
        for c in self.counts.iter_mut().rev() {
            running += *c;
            *c = running;
        }
        UpperTail {
            total: running,
            at_or_above: self.counts,
        }
    }
}

pub struct UpperTail {
    pub total: u64,
    at_or_above: Vec<u64>,
}

impl UpperTail {
    /// Pooled-null p-value of an observed kernel statistic: null statistics
    /// in its bin or above, plus one, over all null statistics plus one
    /// (never 0, as with (b + 1)/(B + 1)).
    pub fn p_value(&self, observed: f64) -> f64 {
        let above = self.at_or_above[NullHistogram::bin(observed as f32)];
        ((above + 1) as f64 / (self.total + 1) as f64).min(1.0)
    }
}
