//! Step-down's "reached" counts: after every row of the rank pass, how many
//! running maxima of a column tile are at least the row's threshold.
//!
//! Counting them by a pass over the tile's maxima costs one compare per
//! relabelling per row, ~12% of the multiply's time in a Student step-down
//! run. The maxima change rarely (a relabelling's running maximum over k
//! rows rises about ln k times), so each tile keeps its maxima also in
//! ascending order, updated on every rise, with the position of the last
//! row's threshold in it. Rows come in ascending order of their threshold,
//! so that position only moves up, by the few maxima passed between two
//! rows: a row's count costs a compare or two (a binary search per row
//! cost 60% as much as the full pass). The count is the same integer
//! either way.

/// The running maxima of one column tile, in ascending order.
pub(super) struct SortedMaxima<'a> {
    pub sorted: &'a mut [f64],
    /// Maxima below the last threshold asked for (a hint: any value works).
    pub below: &'a mut u32,
}

impl SortedMaxima<'_> {
    /// Maxima at or above `threshold` (none of them is NaN: a maximum only
    /// takes values that compare greater than the previous one).
    #[inline]
    pub fn count_at_least(&mut self, threshold: f64) -> u64 {
        let s = &*self.sorted;
        let mut c = (*self.below as usize).min(s.len());
        // Either walk ends at the first maximum >= threshold: after the
        // first, s[c] >= threshold (or c = len); the second keeps that and
        // stops where s[c - 1] < threshold (or c = 0).
        while c < s.len() && s[c] < threshold {
            c += 1;
        }
        while c > 0 && s[c - 1] >= threshold {
            c -= 1;
        }
        *self.below = c as u32;
        (s.len() - c) as u64
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
    /// equal values (the starting -inf, repeated maxima, maxima equal to
    /// the threshold).
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
            let mut below = 0u32;
            for step in 0..2000 {
                let j = next() as usize % len;
                // Coarse values, so that ties between maxima are common.
                let v = (next() % 40) as f64 / 4.0 - 3.0;
                if v > maxima[j] {
                    SortedMaxima {
                        sorted: &mut sorted,
                        below: &mut below,
                    }
                    .replace(maxima[j], v);
                    maxima[j] = v;
                }
                let mut want = maxima.clone();
                want.sort_by(f64::total_cmp);
                assert_eq!(sorted, want, "len {len} step {step}");
                // Thresholds mostly rising (as in the rank pass), at times
                // falling back, and the hint left anywhere.
                let threshold = (step / 50) as f64 / 4.0 - 4.0 - (next() % 5 == 0) as u8 as f64;
                let count = maxima.iter().filter(|&&m| m >= threshold).count() as u64;
                let mut view = SortedMaxima {
                    sorted: &mut sorted,
                    below: &mut below,
                };
                assert_eq!(view.count_at_least(threshold), count);
                if step % 97 == 0 {
                    assert_eq!(view.count_at_least(f64::NEG_INFINITY), len as u64);
                    *view.below = (next() % 600) as u32;
                }
            }
        }
    }
}
