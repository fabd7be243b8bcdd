//! Stable-Rust stand-in for the cargo-fuzz targets in `fuzz/`: every file of
//! `fuzz/corpus/<target>/` (seeds and cases the fuzzer found) goes through
//! the target function, then a few thousand seeded mutations of them
//! (bit flips, byte overwrites with boundary integers, cuts, splices,
//! insertions; the usual mutation kinds of coverage-guided fuzzers, common
//! practice, no single source). Deterministic; a panic fails the test.

#[path = "../fuzz/harness.rs"]
mod harness;

use std::path::Path;
use std::time::Instant;

/// SplitMix64 (Steele, Lea & Flood 2014): small, seedable, independent of
/// riffle's own generators.
struct Mix(u64);

impl Mix {
    fn next(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }
    fn below(&mut self, n: usize) -> usize {
        (self.next() % n.max(1) as u64) as usize
    }
}

fn mutate(seed: &[u8], rng: &mut Mix) -> Vec<u8> {
    let mut data = seed.to_vec();
    for _ in 0..1 + rng.below(4) {
        let len = data.len();
        match rng.below(7) {
            0 if len > 0 => {
                let i = rng.below(len);
                data[i] ^= 1 << rng.below(8);
            }
            1 if len > 0 => {
                let i = rng.below(len);
                data[i] = rng.next() as u8;
            }
            2 if len >= 4 => {
                let i = rng.below(len - 3);
                let v: u32 = match rng.below(5) {
                    0 => 0,
                    1 => u32::MAX,
                    2 => i32::MAX as u32,
                    3 => len as u32,
                    _ => 0x8000_0000,
                };
                data[i..i + 4].copy_from_slice(&v.to_le_bytes());
            }
            3 => data.truncate(rng.below(len + 1)),
            4 if len > 0 => {
                let from = rng.below(len);
                let to = (from + 1 + rng.below(64)).min(len);
                let piece = data[from..to].to_vec();
                let at = rng.below(len);
                data.splice(at..at, piece);
            }
            5 => {
                let at = rng.below(len + 1);
                let extra: Vec<u8> = (0..1 + rng.below(16)).map(|_| rng.next() as u8).collect();
                data.splice(at..at, extra);
            }
            _ if len > 0 => {
                let from = rng.below(len);
                let to = (from + rng.below(32)).min(len);
                data.drain(from..to);
            }
            _ => {}
        }
    }
    data
}

fn corpus(target: &str) -> Vec<Vec<u8>> {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("fuzz/corpus")
        .join(target);
    let mut files: Vec<_> = std::fs::read_dir(&dir)
        .unwrap_or_else(|e| panic!("{}: {e}", dir.display()))
        .map(|e| e.unwrap().path())
        .collect();
    files.sort();
    assert!(!files.is_empty(), "{}: no seeds", dir.display());
    files.iter().map(|p| std::fs::read(p).unwrap()).collect()
}

fn replay(target: &str, run: fn(&[u8]), mutations: usize) {
    let started = Instant::now();
    let seeds = corpus(target);
    for seed in &seeds {
        run(seed);
    }
    let mut rng = Mix(0x5EED ^ target.len() as u64);
    for k in 0..mutations {
        let seed = &seeds[k % seeds.len()];
        let data = mutate(seed, &mut rng);
        let outcome = std::panic::catch_unwind(|| run(&data));
        if outcome.is_err() {
            let keep = std::env::temp_dir().join(format!("riffle-fuzz-{target}-{k}"));
            std::fs::write(&keep, &data).unwrap();
            panic!(
                "{target}: mutation {k} panicked; input saved to {} (add it to fuzz/corpus/{target}/)",
                keep.display()
            );
        }
    }
    eprintln!(
        "{target}: {} seeds + {mutations} mutations in {:.2} s",
        seeds.len(),
        started.elapsed().as_secs_f64()
    );
}

#[test]
fn sample_sheet_parser_survives_mutations() {
    replay("sample_sheet", harness::sample_sheet, 4000);
}

#[test]
fn matrix_readers_survive_mutations() {
    replay("matrix", harness::matrix, 2000);
}

#[test]
fn spill_reader_survives_mutations() {
    replay("spill", harness::spill, 3000);
}
