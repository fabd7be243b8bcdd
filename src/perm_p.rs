//! The permutation p-value of one feature from its exceedance count, by the
//! rule the scan's options pick, and the `p_source` naming that rule.

use crate::design::{Relabelings, StudyDesign};
use crate::spill::PSource;

/// Turns (exceedances, relabelings used) into p_perm and its source.
#[derive(Debug, Clone)]
pub struct PermPRule {
    b_total: u64,
    exact: bool,
    stop_after: Option<u64>,
    /// m_t, the number of distinct relabelings, when Phipson–Smyth is asked.
    space: Option<u128>,
    /// Phipson–Smyth p per exceedance count (NaN until computed): b takes
    /// at most B + 1 values while features number millions.
    cache: Vec<f64>,
}

impl PermPRule {
    /// `exact`: the relabelings are the whole listed space (then neither
    /// sequential stopping nor Phipson–Smyth applies). `stop_after` is h
    /// of sequential stopping; `space` is m_t for Phipson–Smyth.
    pub fn new(b_total: usize, exact: bool, stop_after: Option<u64>, space: Option<u128>) -> Self {
        PermPRule {
            b_total: b_total as u64,
            exact,
            stop_after: stop_after.filter(|_| !exact),
            space: space.filter(|_| !exact),
            cache: Vec::new(),
        }
    }

    /// The rule of a scan's options over its design and relabelings.
    pub fn for_scan(
        options: &crate::scan::ScanOptions,
        design: &StudyDesign,
        b_total: usize,
        exact: bool,
    ) -> Self {
        let space = options
            .phipson_smyth
            .then(|| distinct_statistics(options, design));
        Self::new(b_total, exact, options.stop_after, space)
    }

    /// Sequential stopping in force (the kernel must stop at this h).
    pub fn stop_after(&self) -> Option<u64> {
        self.stop_after
    }

    /// p_perm and its source for `exceed` exceedances among `used`
    /// relabelings (`used` = B unless sequential stopping ended early).
    pub fn p(&mut self, exceed: u64, used: u64) -> (f64, PSource) {
        if let Some(h) = self.stop_after {
            if exceed >= h && used > 0 {
                return (h as f64 / used as f64, PSource::Sequential);
            }
        }
        let counted = (exceed + 1) as f64 / (self.b_total + 1) as f64;
        if self.exact {
            return (counted, PSource::Exact);
        }
        match self.space {
            Some(m_t) => {
                let b = exceed.min(self.b_total) as usize;
                if self.cache.is_empty() {
                    self.cache = vec![f64::NAN; self.b_total as usize + 1];
                }
                if self.cache[b].is_nan() {
                    self.cache[b] = crate::tail::phipson_smyth_exact(b as u64, self.b_total, m_t);
                }
                (self.cache[b], PSource::PhipsonSmyth)
            }
            None => (counted, PSource::Counted),
        }
    }
}

/// m_t of Phipson & Smyth: the number of distinct values the statistic can
/// take, i.e. the distinct relabelings, halved for a two-sided test with
/// two equal groups (swapping the groups gives the same statistic), as the
/// paper prescribes. The same mirror argument halves it for two-sided sign
/// flips (flipping every sign); that case is our extension of the rule.
pub fn distinct_statistics(options: &crate::scan::ScanOptions, design: &StudyDesign) -> u128 {
    use crate::stats::{DesignKind, Side};
    let classes = design.trait_classes();
    let space = Relabelings::space_size(&design.scheme(&classes));
    let plain = design.model.is_none() && design.strata.is_none();
    let mirrored = options.side == Side::Both
        && plain
        && match design.kind {
            DesignKind::Paired => true,
            DesignKind::Groups => {
                !options.test.is_k_group()
                    && design.group_sizes.len() == 2
                    && design.group_sizes[0] == design.group_sizes[1]
            }
            DesignKind::Trait => false,
        };
    if mirrored {
        space / 2
    } else {
        space
    }
}
