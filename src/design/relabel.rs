//! The shared relabelings: drawn once from the seed, used by every feature.
//!
//! Stability promise: for a given seed, sample order and labels, the
//! relabelings are the same on every machine, thread count, chunk size and
//! shard count, and across riffle versions with the same `GENERATOR` tag.
//! Relabelling b (b = 1..B) is the b-th Fisher–Yates shuffle of the sample
//! positions (i from n-1 down to 1, j uniform in 0..=i by Lemire's
//! multiply-and-reject on 64-bit words), all drawn in order from one ChaCha20
//! keystream whose 32-byte key is the seed (u64, little endian) followed by
//! the ASCII bytes of `GENERATOR` padded with zeros. Relabelled labels are
//! `labels_b[i] = labels[perm_b[i]]`.

use rand_chacha::ChaCha20Rng;
use rand_core::{RngCore, SeedableRng};

/// Version tag of the relabelling stream; part of the seed material.
pub const GENERATOR: &str = "riffle-relabel-v1";

/// How samples may be relabelled.
#[derive(Debug, Clone)]
pub enum Scheme<'a> {
    /// Shuffle the units' classes (group labels, or trait-value ids);
    /// with strata, only units of the same stratum swap.
    Permute {
        classes: &'a [u8],
        strata: Option<&'a [u32]>,
    },
    /// Flip the sign of each unit independently (paired designs: the unit
    /// is a pair's difference).
    SignFlip { n: usize },
}

/// B relabelings of the observed design (the observed one is not among
/// them). When `exact`, they are every distinct relabelling except the
/// observed one, so (b + 1) / (B + 1) is the exact permutation p-value.
#[derive(Debug, Clone)]
pub struct Relabelings {
    pub n: usize,
    pub count: usize,
    pub exact: bool,
    pub sign_flips: bool,
    /// `count x n`. Permutations: the class each unit gets under relabelling
    /// b + 1. Sign flips: 1 where unit i is flipped.
    pub labels: Vec<u8>,
    /// `count x n`, permutations only: the unit whose class (or trait value)
    /// unit i takes.
    pub sources: Vec<u32>,
}

impl Relabelings {
    pub fn row(&self, b: usize) -> &[u8] {
        &self.labels[b * self.n..(b + 1) * self.n]
    }

    pub fn source_row(&self, b: usize) -> &[u32] {
        &self.sources[b * self.n..(b + 1) * self.n]
    }

    /// Two groups of exchangeable samples (labels 0 and 1).
    pub fn draw(observed: &[u8], requested: usize, seed: u64) -> Self {
        Self::generate(
            &Scheme::Permute {
                classes: observed,
                strata: None,
            },
            requested,
            seed,
        )
    }

    /// Exchangeable samples with any number of classes.
    pub fn draw_classes(classes: &[u8], requested: usize, seed: u64) -> Self {
        Self::generate(
            &Scheme::Permute {
                classes,
                strata: None,
            },
            requested,
            seed,
        )
    }

    /// Number of distinct relabelings the scheme allows, the observed one
    /// included (saturating at u128::MAX).
    pub fn space_size(scheme: &Scheme<'_>) -> u128 {
        match scheme {
            Scheme::Permute { classes, strata } => strata_blocks(classes.len(), *strata)
                .iter()
                .fold(1u128, |acc, block| {
                    let mut per_class = [0usize; 256];
                    for &u in block {
                        per_class[classes[u] as usize] += 1;
                    }
                    acc.saturating_mul(multinomial_count(block.len(), &per_class))
                }),
            Scheme::SignFlip { n } => {
                if *n < 128 {
                    1u128 << n
                } else {
                    u128::MAX
                }
            }
        }
    }

    /// All distinct relabelings when they number at most `requested`
    /// (listed in a fixed order), else `requested` seeded draws — each an
    /// independent uniform draw, so the same relabelling (the observed one
    /// too) may come up more than once: sampling WITH replacement.
    pub fn generate(scheme: &Scheme<'_>, requested: usize, seed: u64) -> Self {
        match scheme {
            Scheme::Permute { classes, strata } => {
                let blocks = strata_blocks(classes.len(), *strata);
                let distinct = Self::space_size(scheme);
                if distinct <= requested as u128 {
                    enumerate_arrangements(classes, &blocks)
                } else {
                    shuffled(classes, &blocks, requested, seed)
                }
            }
            Scheme::SignFlip { n } => {
                let n = *n;
                if n < 127 && (1u128 << n) <= requested as u128 {
                    enumerate_flips(n)
                } else {
                    random_flips(n, requested, seed)
                }
            }
        }
    }
}

/// Unit positions of each stratum (strata in order of first appearance;
/// one block of everything without strata).
fn strata_blocks(n: usize, strata: Option<&[u32]>) -> Vec<Vec<usize>> {
    match strata {
        None => vec![(0..n).collect()],
        Some(ids) => {
            let mut order: Vec<u32> = Vec::new();
            let mut blocks: Vec<Vec<usize>> = Vec::new();
            for (u, &id) in ids.iter().enumerate() {
                match order.iter().position(|&o| o == id) {
                    Some(k) => blocks[k].push(u),
                    None => {
                        order.push(id);
                        blocks.push(vec![u]);
                    }
                }
            }
            blocks
        }
    }
}

/// Fisher–Yates within each block in turn (see the module documentation);
/// without strata this is one shuffle of all units.
fn shuffled(classes: &[u8], blocks: &[Vec<usize>], count: usize, seed: u64) -> Relabelings {
    let n = classes.len();
    let mut rng = seeded_stream(seed);
    let mut perm: Vec<usize> = (0..n).collect();
    let mut labels = Vec::with_capacity(count * n);
    let mut sources = Vec::with_capacity(count * n);
    for _ in 0..count {
        for (i, p) in perm.iter_mut().enumerate() {
            *p = i;
        }
        for block in blocks {
            for i in (1..block.len()).rev() {
                let j = uniform_below(&mut rng, i as u64 + 1) as usize;
                perm.swap(block[i], block[j]);
            }
        }
        labels.extend(perm.iter().map(|&p| classes[p]));
        sources.extend(perm.iter().map(|&p| p as u32));
    }
    Relabelings {
        n,
        count,
        exact: false,
        sign_flips: false,
        labels,
        sources,
    }
}

/// Every distinct arrangement of the classes within each block (blocks
/// varied like an odometer, the last block fastest; arrangements of a block
/// in lexicographic order), except the observed one.
fn enumerate_arrangements(classes: &[u8], blocks: &[Vec<usize>]) -> Relabelings {
    let n = classes.len();
    let block_classes: Vec<Vec<u8>> = blocks
        .iter()
        .map(|b| {
            let mut c: Vec<u8> = b.iter().map(|&u| classes[u]).collect();
            c.sort_unstable();
            c
        })
        .collect();
    let mut current = block_classes.clone();
    let mut labels = Vec::new();
    let mut sources = Vec::new();
    let mut count = 0;
    let mut row = vec![0u8; n];
    loop {
        for (block, arrangement) in blocks.iter().zip(&current) {
            for (&u, &c) in block.iter().zip(arrangement) {
                row[u] = c;
            }
        }
        if row != classes {
            labels.extend_from_slice(&row);
            // A unit of the same class in the same block, taken in order.
            let mut src = vec![0u32; n];
            for block in blocks {
                let mut pools: Vec<Vec<usize>> = vec![Vec::new(); 256];
                for &u in block.iter().rev() {
                    pools[classes[u] as usize].push(u);
                }
                for &u in block {
                    src[u] = pools[row[u] as usize].pop().unwrap_or(u) as u32;
                }
            }
            sources.extend_from_slice(&src);
            count += 1;
        }
        // Advance the odometer.
        let mut k = blocks.len();
        loop {
            if k == 0 {
                return Relabelings {
                    n,
                    count,
                    exact: true,
                    sign_flips: false,
                    labels,
                    sources,
                };
            }
            k -= 1;
            if next_permutation(&mut current[k]) {
                break;
            }
            current[k].clone_from(&block_classes[k]);
        }
    }
}

/// Lexicographic successor of a sequence; false (and unchanged) at the last.
fn next_permutation(v: &mut [u8]) -> bool {
    if v.len() < 2 {
        return false;
    }
    let mut i = v.len() - 1;
    while i > 0 && v[i - 1] >= v[i] {
        i -= 1;
    }
    if i == 0 {
        return false;
    }
    let mut j = v.len() - 1;
    while v[j] <= v[i - 1] {
        j -= 1;
    }
    v.swap(i - 1, j);
    v[i..].reverse();
    true
}

fn enumerate_flips(n: usize) -> Relabelings {
    let total = 1usize << n;
    let mut labels = Vec::with_capacity((total - 1) * n);
    for mask in 1..total {
        labels.extend((0..n).map(|i| ((mask >> i) & 1) as u8));
    }
    Relabelings {
        n,
        count: total - 1,
        exact: true,
        sign_flips: true,
        labels,
        sources: Vec::new(),
    }
}

/// Sign flips: unit i of a relabelling is flipped when bit (i mod 64) of
/// the relabelling's (i / 64)-th 64-bit word of the stream is set.
fn random_flips(n: usize, count: usize, seed: u64) -> Relabelings {
    let mut rng = seeded_stream(seed);
    let mut labels = Vec::with_capacity(count * n);
    for _ in 0..count {
        let mut word = 0u64;
        for i in 0..n {
            if i % 64 == 0 {
                word = rng.next_u64();
            }
            labels.push(((word >> (i % 64)) & 1) as u8);
        }
    }
    Relabelings {
        n,
        count,
        exact: false,
        sign_flips: true,
        labels,
        sources: Vec::new(),
    }
}

/// n! / prod(c!) saturating at u128::MAX.
pub fn multinomial_count(n: usize, per_level: &[usize]) -> u128 {
    let mut total: u128 = 1;
    let mut placed = 0usize;
    for &c in per_level {
        for i in 1..=c {
            placed += 1;
            // total * placed / i stays an integer at every step: it is
            // the running product of binomial coefficients.
            total = match total.checked_mul(placed as u128) {
                Some(v) => v / i as u128,
                None => return u128::MAX,
            };
        }
    }
    debug_assert_eq!(placed, n);
    total
}

/// The generator behind every relabelling: see the module documentation.
pub fn seeded_stream(seed: u64) -> ChaCha20Rng {
    let mut key = [0u8; 32];
    key[..8].copy_from_slice(&seed.to_le_bytes());
    key[8..8 + GENERATOR.len()].copy_from_slice(GENERATOR.as_bytes());
    ChaCha20Rng::from_seed(key)
}

/// Uniform integer in 0..bound (Lemire 2019, "Fast random integer generation
/// in an interval", ACM TOMACS 29(1)), bias-free by rejection.
pub fn uniform_below(rng: &mut impl RngCore, bound: u64) -> u64 {
    debug_assert!(bound > 0);
    let threshold = bound.wrapping_neg() % bound;
    loop {
        let product = rng.next_u64() as u128 * bound as u128;
        if (product as u64) >= threshold {
            return (product >> 64) as u64;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn counts_distinct_labelings() {
        assert_eq!(multinomial_count(9, &[4, 5]), 126);
        assert_eq!(multinomial_count(8, &[4, 4]), 70);
        assert_eq!(multinomial_count(6, &[2, 2, 2]), 90);
        assert_eq!(multinomial_count(400, &[200, 200]), u128::MAX);
    }

    #[test]
    fn enumeration_lists_every_other_split_once() {
        let observed = [0, 1, 0, 1, 1, 0, 0, 1, 1];
        let r = Relabelings::draw(&observed, 1000, 7);
        assert!(r.exact);
        assert_eq!(r.count, 125);
        let mut seen = std::collections::HashSet::new();
        for b in 0..r.count {
            let row = r.row(b);
            assert_eq!(row.iter().filter(|&&l| l == 1).count(), 5);
            assert_ne!(row, &observed);
            assert!(seen.insert(row.to_vec()));
        }
    }

    #[test]
    fn shuffles_keep_group_sizes_and_are_seed_stable() {
        let observed: Vec<u8> = (0..20).map(|i| u8::from(i % 3 == 0)).collect();
        let a = Relabelings::draw(&observed, 50, 42);
        let b = Relabelings::draw(&observed, 50, 42);
        let c = Relabelings::draw(&observed, 50, 43);
        assert!(!a.exact);
        assert_eq!(a.labels, b.labels);
        assert_ne!(a.labels, c.labels);
        for i in 0..a.count {
            assert_eq!(a.row(i).iter().filter(|&&l| l == 1).count(), 7);
        }
    }

    #[test]
    fn strata_are_never_crossed() {
        let classes: Vec<u8> = (0..30).map(|i| (i % 3) as u8).collect();
        let strata: Vec<u32> = (0..30).map(|i| (i / 7) as u32).collect();
        let scheme = Scheme::Permute {
            classes: &classes,
            strata: Some(&strata),
        };
        let r = Relabelings::generate(&scheme, 500, 9);
        assert!(!r.exact);
        for b in 0..r.count {
            for (u, &src) in r.source_row(b).iter().enumerate() {
                assert_eq!(
                    strata[u], strata[src as usize],
                    "relabelling {b} moves unit {src}"
                );
                assert_eq!(r.row(b)[u], classes[src as usize]);
            }
        }
        // Small stratified design: every arrangement within strata, once.
        let classes = [0u8, 1, 0, 1, 1, 0, 2];
        let strata = [0u32, 0, 0, 1, 1, 1, 1];
        let scheme = Scheme::Permute {
            classes: &classes,
            strata: Some(&strata),
        };
        let r = Relabelings::generate(&scheme, 10_000, 1);
        assert!(r.exact);
        // 3!/(2!1!) * 4!/(2!1!1!) = 3 * 12 = 36 arrangements, less the observed.
        assert_eq!(r.count, 35);
        let distinct: std::collections::HashSet<&[u8]> = (0..r.count).map(|b| r.row(b)).collect();
        assert_eq!(distinct.len(), 35);
    }

    #[test]
    fn sign_flips_enumerate_and_sample() {
        let r = Relabelings::generate(&Scheme::SignFlip { n: 5 }, 100, 3);
        assert!(r.exact && r.sign_flips);
        assert_eq!(r.count, 31);
        let r = Relabelings::generate(&Scheme::SignFlip { n: 12 }, 100, 3);
        assert!(!r.exact);
        assert_eq!(r.count, 100);
        let ones = r.labels.iter().filter(|&&f| f == 1).count();
        assert!((500..700).contains(&ones), "{ones} flips of 1200");
    }

    #[test]
    fn k_groups_enumerate_all_arrangements() {
        let classes = [0u8, 0, 1, 1, 2, 2];
        let r = Relabelings::generate(
            &Scheme::Permute {
                classes: &classes,
                strata: None,
            },
            1000,
            1,
        );
        assert!(r.exact);
        assert_eq!(r.count, 89);
    }

    /// Pins the generator: a change here changes every user's p-values for
    /// a given seed, so it must come with a new GENERATOR tag.
    #[test]
    fn generator_stream_is_pinned() {
        let mut rng = seeded_stream(2026);
        let draws: Vec<u64> = (0..4).map(|_| uniform_below(&mut rng, 1000)).collect();
        let again: Vec<u64> = {
            let mut rng = seeded_stream(2026);
            (0..4).map(|_| uniform_below(&mut rng, 1000)).collect()
        };
        assert_eq!(draws, again);
        assert_eq!(draws, PINNED_DRAWS);
    }

    const PINNED_DRAWS: [u64; 4] = [712, 144, 800, 103];

    /// The keystream itself: RFC 7539 (ChaCha20 and Poly1305 for IETF
    /// protocols), appendix A.1, test vector #1 (all-zero key and nonce),
    /// first keystream bytes 76 b8 e0 ad a0 f1 3d 90 (from memory).
    #[test]
    fn chacha20_keystream_matches_rfc7539() {
        let mut rng = ChaCha20Rng::from_seed([0u8; 32]);
        assert_eq!(rng.next_u32(), 0xade0_b876);
        assert_eq!(rng.next_u32(), 0x903d_f1a0);
    }
}
