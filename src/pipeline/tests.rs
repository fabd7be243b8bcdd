//! The pipeline against a brute force written here: chunks run in kernel
//! pieces, out of order on several workers, with their buffers recycled
//! between chunks, must give every feature its own id, status and count,
//! whatever the thread count, chunk size and queue depth.

use std::sync::atomic::AtomicBool;
use std::sync::Arc;

use super::*;
use crate::design::Relabelings;
use crate::input::memory::MemorySource;
use crate::stats::prepare::{Status, TestSpec};
use crate::stats::{Side, Sizes, TestKind};

const N_A: usize = 8;
const N_B: usize = 8;
/// More than two kernel pieces (`PIECE_ROWS`) in the largest chunk.
const FEATURES: usize = 9_500;
const PERMS: usize = 40;

fn labels() -> Vec<u8> {
    (0..N_A + N_B).map(|i| u8::from(i >= N_A)).collect()
}

/// Deterministic values (a 64-bit LCG, Knuth's MMIX constants), with every
/// 997th row constant so that untested rows sit between tested ones.
fn matrix() -> (Vec<String>, Vec<f64>) {
    let n = N_A + N_B;
    let mut state = 0x2545_f491_4f6c_dd1du64;
    let mut values = Vec::with_capacity(FEATURES * n);
    for f in 0..FEATURES {
        for i in 0..n {
            state = state
                .wrapping_mul(6_364_136_223_846_793_005)
                .wrapping_add(1_442_695_040_888_963_407);
            let u = (state >> 11) as f64 / (1u64 << 53) as f64;
            let shift = if f % 7 == 0 && i >= N_A { 0.8 } else { 0.0 };
            values.push(if f % 997 == 3 { 2.5 } else { u + shift });
        }
    }
    let ids = (0..FEATURES).map(|f| format!("feature-{f}")).collect();
    (ids, values)
}

/// Pooled-variance t of raw values under a class assignment (textbook
/// formula; common practice, no single source).
fn pooled_t(row: &[f64], classes: &[u8]) -> f64 {
    let (mut sa, mut sb) = (0.0, 0.0);
    for (&v, &c) in row.iter().zip(classes) {
        if c == 1 {
            sb += v;
        } else {
            sa += v;
        }
    }
    let (ma, mb) = (sa / N_A as f64, sb / N_B as f64);
    let ss: f64 = row
        .iter()
        .zip(classes)
        .map(|(&v, &c)| {
            let d = v - if c == 1 { mb } else { ma };
            d * d
        })
        .sum();
    let sp2 = ss / (N_A + N_B - 2) as f64;
    (mb - ma) / (sp2 * (1.0 / N_A as f64 + 1.0 / N_B as f64)).sqrt()
}

#[derive(Default, PartialEq, Debug)]
struct Collected {
    first_indexes: Vec<u64>,
    ids: Vec<String>,
    statuses: Vec<Status>,
    exceed: Vec<u64>,
    relabelings: Vec<u64>,
    null_max: Vec<u64>,
    standardized: Vec<u64>,
}

impl ChunkSink for Collected {
    fn accept(&mut self, chunk: &FinishedChunk) -> Result<()> {
        self.first_indexes.push(chunk.first_index);
        self.ids.extend(chunk.ids.iter().cloned());
        for f in &chunk.outcome.features {
            self.statuses.push(f.prepared.status);
            self.exceed.push(f.exceed);
            self.relabelings.push(f.relabelings);
        }
        if self.null_max.is_empty() {
            self.null_max = vec![f64::NEG_INFINITY.to_bits(); chunk.outcome.null_max.len()];
        }
        for (m, v) in self.null_max.iter_mut().zip(&chunk.outcome.null_max) {
            *m = f64::from_bits(*m).max(*v).to_bits();
        }
        self.standardized
            .extend(chunk.outcome.standardized.iter().map(|v| v.to_bits()));
        Ok(())
    }
}

fn run_once(
    kernel: &Arc<Kernel>,
    threads: usize,
    chunk_rows: usize,
    queue_depth: usize,
    prepare_only: bool,
) -> Collected {
    let (ids, values) = matrix();
    let samples = (0..N_A + N_B).map(|i| format!("s{i}")).collect();
    let source = MemorySource::new(ids, samples, values).unwrap();
    let options = PipelineOptions {
        threads,
        chunk_rows,
        queue_depth,
        prepare_only,
    };
    let mut sink = Collected::default();
    let stop = AtomicBool::new(false);
    let stats = run(
        Box::new(source),
        kernel.clone(),
        &options,
        &stop,
        &mut sink,
        &mut |_| {},
    )
    .unwrap();
    assert_eq!(stats.features, FEATURES as u64);
    sink
}

#[test]
fn pieces_and_recycled_buffers_match_brute_force_and_each_other() {
    let labels = labels();
    let relabel = Relabelings::draw(&labels, PERMS, 11);
    assert_eq!(relabel.count, PERMS);
    let spec = TestSpec::two_group(TestKind::Student, Side::Both, Sizes { n_a: N_A, n_b: N_B });
    let kernel = Arc::new(Kernel::new(spec, labels.clone(), relabel.clone()));
    let (ids, values) = matrix();
    let n = N_A + N_B;

    let reference = run_once(&kernel, 1, FEATURES, 1, false);
    assert_eq!(reference.ids, ids, "ids out of place");
    let mut tested = 0;
    for f in 0..FEATURES {
        let row = &values[f * n..(f + 1) * n];
        if f % 997 == 3 {
            assert_eq!(reference.statuses[f], Status::Constant);
            assert_eq!(reference.exceed[f], 0);
            continue;
        }
        tested += 1;
        assert_eq!(reference.statuses[f], Status::Tested, "feature {f}");
        assert_eq!(reference.relabelings[f], PERMS as u64);
        // Two-sided: |t| of each relabelling against the observed |t|,
        // with a margin either way for rounding between formulas.
        let obs = pooled_t(row, &labels).abs();
        let ts: Vec<f64> = (0..PERMS)
            .map(|b| pooled_t(row, relabel.row(b)).abs())
            .collect();
        let surely = ts.iter().filter(|&&t| t >= obs * (1.0 + 1e-9)).count() as u64;
        let maybe = ts.iter().filter(|&&t| t >= obs * (1.0 - 1e-9)).count() as u64;
        let got = reference.exceed[f];
        assert!(
            (surely..=maybe).contains(&got),
            "feature {f}: {got} not in {surely}..={maybe}"
        );
    }
    assert!(reference.exceed.iter().any(|&e| e > 0));
    assert!(reference.exceed.iter().any(|&e| e < PERMS as u64 / 2));
    // A counting run never hands standardized rows to the writer.
    assert!(reference.standardized.is_empty());

    for (threads, chunk_rows, depth) in [(3, 700, 2), (2, 5_000, 1), (2, FEATURES, 3), (4, 97, 1)] {
        let mut other = run_once(&kernel, threads, chunk_rows, depth, false);
        let expected_starts: Vec<u64> = (0..FEATURES as u64).step_by(chunk_rows).collect();
        assert_eq!(other.first_indexes, expected_starts);
        other.first_indexes = reference.first_indexes.clone();
        assert_eq!(
            other, reference,
            "{threads} threads, chunks of {chunk_rows}, queue {depth}"
        );
    }

    // Prepare-only (step-down) runs keep one standardized row per tested
    // feature, zero mean and unit SD (n - 1 denominator), in feature order.
    for (threads, chunk_rows) in [(1, FEATURES), (3, 450)] {
        let prepared = run_once(&kernel, threads, chunk_rows, 2, true);
        assert_eq!(prepared.ids, ids);
        assert!(prepared.exceed.iter().all(|&e| e == 0));
        assert_eq!(prepared.standardized.len(), tested * n);
        for (k, f) in (0..FEATURES).filter(|f| f % 997 != 3).enumerate() {
            let z: Vec<f64> = prepared.standardized[k * n..(k + 1) * n]
                .iter()
                .map(|&b| f64::from_bits(b))
                .collect();
            let row = &values[f * n..(f + 1) * n];
            let mean = row.iter().sum::<f64>() / n as f64;
            let sd =
                (row.iter().map(|v| (v - mean) * (v - mean)).sum::<f64>() / (n - 1) as f64).sqrt();
            for (zi, v) in z.iter().zip(row) {
                assert!((zi - (v - mean) / sd).abs() < 1e-9, "feature {f}");
            }
        }
    }
}
