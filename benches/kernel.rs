//! Kernel benchmark: the machine's own single-precision GEMM on the scan's
//! shape, against riffle's kernel on the same shape, in one run, so that the
//! ratio holds even on a noisy machine.
//!
//! `cargo bench --bench kernel` (full) or `RIFFLE_BENCH_QUICK=1 cargo bench
//! --bench kernel` (seconds; CI uses it to check the benchmark still runs).
//! Environment: RIFFLE_BENCH_FEATURES (default 20000), RIFFLE_BENCH_SAMPLES
//! (48), RIFFLE_BENCH_PERMS (10000).

use std::sync::Arc;
use std::time::Instant;

use riffle::design::Relabelings;
use riffle::kernel::{Kernel, KernelScratch, PackedWeights};
use riffle::stats::prepare::TestSpec;
use riffle::stats::{Side, Sizes, TestKind};

fn env(name: &str, default: usize) -> usize {
    std::env::var(name)
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(default)
}

/// Output blocks the GEMM reference tries: the kernel's own tile (64 x 512)
/// and larger ones, which pack the right operand fewer times per product;
/// the best of them is "the machine's GEMM". The whole product (features x
/// relabelings) never fits in memory, so it is always computed in blocks.
const GEMM_BLOCKS: [(usize, usize); 4] = [(64, 512), (128, 512), (256, 1024), (1024, 2048)];

/// The benchmark's left (rows x n) and right (n x cols) operands.
fn operands(rows: usize, n: usize, cols: usize) -> (Vec<f32>, Vec<f32>) {
    let a = (0..rows * n)
        .map(|i| ((i * 7919) % 1000) as f32 / 1000.0)
        .collect();
    let b = (0..n * cols).map(|i| ((i * 104729) % 2) as f32).collect();
    (a, b)
}

/// Outputs per second of the product of `rows` left rows by `cols`
/// columns, computed block by block (`rb` x `cb` outputs per call of
/// `multiply(row0, block_rows, col0, block_cols, out)`), on `threads`
/// threads splitting the rows.
fn blocked_rate(
    rows: usize,
    cols: usize,
    threads: usize,
    (rb, cb): (usize, usize),
    multiply: impl Fn(usize, usize, usize, usize, &mut [f32]) + Sync,
) -> f64 {
    let started = Instant::now();
    std::thread::scope(|scope| {
        for t in 0..threads {
            let multiply = &multiply;
            scope.spawn(move || {
                let mut c = vec![0f32; rb * cb];
                let mut checksum = 0f32;
                let lo = rows * t / threads;
                let hi = rows * (t + 1) / threads;
                for r0 in (lo..hi).step_by(rb) {
                    let rt = rb.min(hi - r0);
                    for c0 in (0..cols).step_by(cb) {
                        let ct = cb.min(cols - c0);
                        multiply(r0, rt, c0, ct, &mut c);
                        checksum += c[0];
                    }
                }
                std::hint::black_box(checksum);
            });
        }
    });
    rows as f64 * cols as f64 / started.elapsed().as_secs_f64()
}

/// Plain f32 GEMM (matrixmultiply) of (rows x n) by (n x cols) in blocks.
fn gemm_rate(rows: usize, n: usize, cols: usize, threads: usize, blocks: (usize, usize)) -> f64 {
    let (a, b) = operands(rows, n, cols);
    blocked_rate(rows, cols, threads, blocks, |r0, rt, c0, ct, c| {
        // SAFETY: a holds rows x n and b n x cols values, both row-major;
        // c holds at least rt x ct outputs (a whole block).
        unsafe {
            matrixmultiply::sgemm(
                rt,
                n,
                ct,
                1.0,
                a.as_ptr().add(r0 * n),
                n as isize,
                1,
                b.as_ptr().add(c0),
                cols as isize,
                1,
                0.0,
                c.as_mut_ptr(),
                ct as isize,
                1,
            );
        }
    })
}

/// The kernel's own packed multiply (weights packed once, outside the
/// timing, as in a scan) on the same product in 64 x 512 blocks; `None`
/// where the CPU has no microkernel.
fn packed_rate(rows: usize, n: usize, cols: usize, threads: usize) -> Option<f64> {
    let (a, b) = operands(rows, n, cols);
    let packed = PackedWeights::new(&b, n, cols)?;
    Some(blocked_rate(
        rows,
        cols,
        threads,
        (64, 512),
        |r0, rt, c0, ct, c| packed.multiply(&a[r0 * n..], rt, c0, ct, c),
    ))
}

fn kernel_rate(
    test: TestKind,
    rows: usize,
    n: usize,
    perms: usize,
    threads: usize,
    general: bool,
) -> f64 {
    let labels: Vec<u8> = (0..n).map(|i| u8::from(i >= n / 2)).collect();
    let relabel = Relabelings::draw(&labels, perms, 1);
    let spec = TestSpec::two_group(
        test,
        Side::Both,
        Sizes {
            n_a: n / 2,
            n_b: n - n / 2,
        },
    );
    let mut kernel = Kernel::new(spec, labels, relabel);
    if general {
        kernel = kernel.with_general_multiply();
    }
    let kernel = Arc::new(kernel);
    // Independent values (SplitMix64 of the index): structured data would
    // make features near-copies of each other and flood the tie checks.
    let raw: Vec<f64> = (0..rows * n as u64 as usize)
        .map(|i| {
            let mut x = (i as u64).wrapping_add(0x9E37_79B9_7F4A_7C15);
            x = (x ^ (x >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
            x = (x ^ (x >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
            x ^= x >> 31;
            (x >> 11) as f64 / (1u64 << 53) as f64
        })
        .collect();
    let chunk = 2048;
    let started = Instant::now();
    std::thread::scope(|scope| {
        for t in 0..threads {
            let (kernel, raw) = (kernel.clone(), &raw);
            scope.spawn(move || {
                let mut scratch = KernelScratch::default();
                let chunks = rows.div_ceil(chunk);
                for c in (t..chunks).step_by(threads) {
                    let r0 = c * chunk;
                    let rt = chunk.min(rows - r0);
                    let out = kernel.run_chunk(&raw[r0 * n..(r0 + rt) * n], rt, true, &mut scratch);
                    std::hint::black_box(out.features.len());
                }
            });
        }
    });
    rows as f64 * perms as f64 / started.elapsed().as_secs_f64()
}

fn main() {
    let quick = std::env::var("RIFFLE_BENCH_QUICK").is_ok();
    let rows = env("RIFFLE_BENCH_FEATURES", if quick { 2000 } else { 20_000 });
    let n = env("RIFFLE_BENCH_SAMPLES", 48);
    let perms = env("RIFFLE_BENCH_PERMS", if quick { 1000 } else { 10_000 });
    println!("kernel benchmark: {rows} features x {n} samples, {perms} relabelings");
    let mut best_by_threads = Vec::new();
    for threads in [1, 2] {
        let plural = if threads > 1 { "s" } else { "" };
        let mut gemm = 0f64;
        for block in GEMM_BLOCKS {
            let rate = gemm_rate(rows, n, perms, threads, block);
            println!(
                "  f32 GEMM {}x{} blocks ({threads} thread{plural}): {rate:.3e} feature-relabelings/s ({:.1} GFLOP/s)",
                block.0,
                block.1,
                rate * 2.0 * n as f64 / 1e9
            );
            gemm = gemm.max(rate);
        }
        if let Some(rate) = packed_rate(rows, n, perms, threads) {
            println!(
                "  f32 packed microkernel 64x512 blocks ({threads} thread{plural}): {rate:.3e} feature-relabelings/s ({:.1} GFLOP/s)",
                rate * 2.0 * n as f64 / 1e9
            );
            gemm = gemm.max(rate);
        }
        println!(
            "  f32 GEMM best ({threads} thread{plural}): {gemm:.3e} feature-relabelings/s ({:.1} GFLOP/s)",
            gemm * 2.0 * n as f64 / 1e9
        );
        best_by_threads.push(gemm);
        for test in [TestKind::Student, TestKind::Welch] {
            for (general, how) in [(false, ""), (true, " on the general GEMM")] {
                let rate = kernel_rate(test, rows, n, perms, threads, general);
                println!(
                    "  kernel {:8}{how} ({threads} thread{plural}): {:.3e} feature-relabelings/s = {:.0}% of GEMM",
                    test.name(),
                    rate,
                    100.0 * rate / gemm
                );
            }
        }
    }
    println!(
        "  f32 GEMM best, 2 threads / 1 thread: {:.2}x",
        best_by_threads[1] / best_by_threads[0]
    );
}
