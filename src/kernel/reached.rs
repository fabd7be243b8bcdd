//! Step-down's "reached" counts: after every row of the rank pass, how many
//! running maxima of a column tile are at least the row's threshold.
//!
//! Counting them by a pass over the tile's maxima costs one compare per
//! relabelling per row, ~12% of the multiply's time in a Student step-down
//! run. The maxima change rarely (a relabelling's running maximum over k
//! rows rises about ln k times), so each tile keeps its maxima also in
//! ascending order, updated on every rise, and a row's count is one binary
//! search. The count is the same integer either way.

/// The running maxima of one column tile, in ascending order.
pub(super) struct SortedMaxima<'a> {
    pub sorted: &'a mut [f64],
}

impl SortedMaxima<'_> {
    /// Maxima at or above `threshold` (none of them is NaN: a maximum only
    /// takes values that compare greater than the previous one).
    #[inline]
    pub fn count_at_least(&self, threshold: f64) -> u64 {
        (self.sorted.len() - self.sorted.partition_point(|&m| m < threshold)) as u64
    }

    /// One maximum rose from `old` (present) to `new > old`.
    #[inline]
    pub fn replace(&mut self, old: f64, new: f64) {
        let s = &mut *self.sorted;
        // Any copy of `old` will do: equal values are interchangeable.
        let from = s.partition_point(|&m| m < old);
        let to = s.partition_point(|&m| m < new);
        debug_assert!(from < to && s[from] == old);
        s[from..to].rotate_left(1);
        s[to - 1] = new;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Random rises against a plain filter count (brute force), with many
    /// equal values (the starting -inf, repeated maxima).
    #[test]
    fn counts_after_random_rises_equal_a_filter() {
        let mut state = 11u64;
        let mut next = || {
            state = state
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            state >> 33
        };
        for len in [1usize, 2, 7, 88, 512] {
            let mut maxima = vec![f64::NEG_INFINITY; len];
            let mut sorted = maxima.clone();
            for step in 0..2000 {
                let j = next() as usize % len;
                // Coarse values, so that ties between maxima are common.
                let v = (next() % 40) as f64 / 4.0 - 3.0;
                if v > maxima[j] {
                    SortedMaxima {
                        sorted: &mut sorted,
                    }
                    .replace(maxima[j], v);
                    maxima[j] = v;
                }
                let mut want = maxima.clone();
                want.sort_by(f64::total_cmp);
                assert_eq!(sorted, want, "len {len} step {step}");
                let threshold = (next() % 48) as f64 / 4.0 - 4.0;
                let count = maxima.iter().filter(|&&m| m >= threshold).count() as u64;
                let view = SortedMaxima {
                    sorted: &mut sorted,
                };
                assert_eq!(view.count_at_least(threshold), count);
                assert_eq!(view.count_at_least(f64::NEG_INFINITY), len as u64);
            }
        }
    }
}
