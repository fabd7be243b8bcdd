#!/usr/bin/env bash
# End-to-end scan figures: throughput against the machine's own f32 GEMM
# (measured in the same run by `cargo bench --bench kernel`), and peak
# resident memory at two sizes. Usage: bash benches/scan.sh [SCRATCH_DIR]
# Environment: FEATURES (200000), BIG (2000000), SAMPLES (48), PERMS
# (10000), SMALL_PERMS (200), THREADS (2), MISSING (0.1: share of missing
# values in the missing-values section), MISSING_ONLY (1: run only that
# section).
set -euo pipefail
cd "$(dirname "$0")/.."
scratch=${1:-$(mktemp -d)}
features=${FEATURES:-200000}
big=${BIG:-2000000}
samples=${SAMPLES:-48}
perms=${PERMS:-10000}
small_perms=${SMALL_PERMS:-200}
threads=${THREADS:-2}
half=$((samples / 2))
cargo build --release --quiet
riffle=${CARGO_TARGET_DIR:-target}/release/riffle
echo "machine: $(nproc) cores, $(grep -m1 'model name' /proc/cpuinfo | cut -d: -f2), load $(cut -d' ' -f1-3 /proc/loadavg)"

echo "== GEMM reference on the scan's shape"
RIFFLE_BENCH_FEATURES=20000 RIFFLE_BENCH_SAMPLES=$samples RIFFLE_BENCH_PERMS=$perms \
  cargo bench --quiet --bench kernel 2>/dev/null | grep -E "GEMM|kernel"

measure() { # label, then the command
  local label=$1; shift
  /usr/bin/time -f "%e %M" -o "$scratch/time" "$@" >/dev/null 2>"$scratch/err" || { cat "$scratch/err"; exit 1; }
  read -r secs kb < "$scratch/time"
  echo "$label: ${secs} s, peak RSS $((kb / 1024)) MiB"
}

rate() {
  python3 -c "import json; r=json.load(open('$scratch/out/run.json')); t=r['timing']; print(f\"   {t['feature_relabelings_per_second']:.3e} feature-relabelings/s; read {t['read_seconds']:.1f} s of {t['seconds']:.1f} s\")"
}

missing_section() {
  # The same simulated values, complete and with a share left missing
  # (`simulate --missing-fraction` keeps the other values' bytes).
  local share=${MISSING:-0.1}
  [ -f "$scratch/m$features.arrow" ] || $riffle simulate --out "$scratch/m$features.arrow" --sheet "$scratch/s.tsv" \
    --features "$features" --group-sizes "$half,$half" --seed 1
  [ -f "$scratch/m$features-missing.arrow" ] || $riffle simulate --out "$scratch/m$features-missing.arrow" \
    --sheet "$scratch/s.tsv" --features "$features" --group-sizes "$half,$half" --seed 1 --missing-fraction "$share"
  echo "== missing values: $features x $samples, B = $perms, $threads threads, complete vs $share missing"
  for test in student welch; do
    for m in "m$features" "m$features-missing"; do
      measure "$test, single-step, $m" $riffle scan --matrix "$scratch/$m.arrow" --samples "$scratch/s.tsv" \
        --group group --test "$test" --perms "$perms" --threads "$threads" --maxt single \
        --out "$scratch/out" --quiet --no-report
      rate
    done
  done
}

if [ "${MISSING_ONLY:-0}" = 1 ]; then
  missing_section
  exit 0
fi

for n in "$features" "$big"; do
  [ -f "$scratch/m$n.arrow" ] || $riffle simulate --out "$scratch/m$n.arrow" --sheet "$scratch/s.tsv" \
    --features "$n" --group-sizes "$half,$half" --seed 1
done

echo "== throughput: $features x $samples, B = $perms, $threads threads"
for test in student welch; do
  for maxt in single step-down; do
    measure "$test ($maxt)" $riffle scan --matrix "$scratch/m$features.arrow" --samples "$scratch/s.tsv" \
      --group group --test "$test" --perms "$perms" --threads "$threads" --maxt "$maxt" \
      --out "$scratch/out" --quiet --no-report
    rate=$(python3 -c "import json; r=json.load(open('$scratch/out/run.json')); t=r['timing']; print(f\"{t['feature_relabelings_per_second']:.3e} feature-relabelings/s; read {t['read_seconds']:.1f} s of {t['seconds']:.1f} s\")")
    echo "   $rate"
  done
done
echo "== threads: student, step-down, 1 vs 2 threads"
for t in 1 2; do
  measure "threads $t" $riffle scan --matrix "$scratch/m$features.arrow" --samples "$scratch/s.tsv" \
    --group group --test student --perms "$perms" --threads "$t" --out "$scratch/out" --quiet --no-report
done
echo "== memory: B = $small_perms, step-down, 200k vs ${big} features"
for n in "$features" "$big"; do
  measure "$n features" $riffle scan --matrix "$scratch/m$n.arrow" --samples "$scratch/s.tsv" \
    --group group --test welch --perms "$small_perms" --memory 256M --out "$scratch/out" --quiet --no-report
done
missing_section
