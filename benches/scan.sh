#!/usr/bin/env bash
# End-to-end figures of `riffle scan`, every ratio measured within this one
# run so that it holds on a busy machine:
#   1. throughput (Student and Welch t, single-step and step-down maxT)
#      against the machine's best f32 GEMM on the same multiply (measured
#      here by `cargo bench --bench kernel`);
#   2. thread scaling of the scan, beside the GEMM's own 1 -> 2 thread ratio;
#   3. peak resident memory at a small and a very large number of features
#      (step-down maxT and BH, --memory 256M);
#   4. wall time against features x relabelings at 4 points, and the
#      reader's share of the wall time at B >= 1,000;
#   5. B = 100 against reading the file once with `cat` (warm cache).
# Ends with a summary table.
#
# Usage: bash benches/scan.sh [SCRATCH_DIR]     (default: a fresh temp dir)
#        QUICK=1 bash benches/scan.sh ...       (small sizes; a few minutes)
# The full run writes a ~2 GB matrix (10,000,000 x 48 f32) plus ~4 GB of
# sorted runs to the scratch dir and deletes them at the end.
# Environment overrides: FEATURES, SMALL, BIG, SAMPLES, PERMS, MEM_PERMS,
# THREADS, MEMORY.
set -euo pipefail
cd "$(dirname "$0")/.."
scratch=${1:-$(mktemp -d)}
mkdir -p "$scratch"
if [ -n "${QUICK:-}" ]; then
  features=${FEATURES:-50000}; small=${SMALL:-100000}; big=${BIG:-500000}; perms=${PERMS:-4000}
else
  features=${FEATURES:-200000}; small=${SMALL:-100000}; big=${BIG:-10000000}; perms=${PERMS:-10000}
fi
samples=${SAMPLES:-48}
mem_perms=${MEM_PERMS:-1000}
threads=${THREADS:-2}
memory=${MEMORY:-256M}
half=$((samples / 2))
target=${CARGO_TARGET_DIR:-target}
cargo build --release --quiet
riffle=$target/release/riffle
summary=$scratch/summary.tsv
: > "$summary"
note() { printf '%s\t%s\n' "$1" "$2" >> "$summary"; }

echo "machine: $(nproc) cores,$(grep -m1 'model name' /proc/cpuinfo | cut -d: -f2); $(uptime)"
note machine "$(nproc) cores,$(grep -m1 'model name' /proc/cpuinfo | cut -d: -f2)"
note load_at_start "$(cut -d' ' -f1-3 /proc/loadavg)"

echo "== GEMM reference and kernel on the scan's shape (cargo bench --bench kernel)"
RIFFLE_BENCH_FEATURES=$((features < 20000 ? features : 20000)) RIFFLE_BENCH_SAMPLES=$samples \
  RIFFLE_BENCH_PERMS=$perms cargo bench --quiet --bench kernel 2>/dev/null | tee "$scratch/bench.txt"
gemm1=$(sed -n 's/.*f32 GEMM best (1 thread): \([0-9.e+]*\).*/\1/p' "$scratch/bench.txt")
gemm2=$(sed -n 's/.*f32 GEMM best (2 threads): \([0-9.e+]*\).*/\1/p' "$scratch/bench.txt")
note gemm1 "$gemm1"
note gemm2 "$gemm2"

matrix() { # features -> path (made once)
  local path=$scratch/m$1.arrow
  [ -f "$path" ] || $riffle simulate --out "$path" --sheet "$scratch/s.tsv" --features "$1" \
    --group-sizes "$half,$half" --seed 1 >/dev/null
  echo "$path"
}

# scan KEY FEATURES PERMS THREADS EXTRA...: records wall seconds, peak RSS,
# the scan's own throughput and the reader's seconds under KEY.
scan() {
  local key=$1 n=$2 b=$3 t=$4; shift 4
  local m; m=$(matrix "$n")
  /usr/bin/time -f "%e %M" -o "$scratch/time" $riffle scan --matrix "$m" --samples "$scratch/s.tsv" \
    --group group --perms "$b" --threads "$t" --out "$scratch/out" --quiet --no-report "$@" \
    >/dev/null 2>"$scratch/err" || { cat "$scratch/err"; exit 1; }
  local secs kb
  read -r secs kb < "$scratch/time"
  local timing phases
  timing=$(python3 -c "import json; t=json.load(open('$scratch/out/run.json'))['timing']; print(t['feature_relabelings_per_second'], t['read_seconds'])")
  # Pipeline (read, standardize, relabel) and final pass (adjustments,
  # results table) seconds.
  phases=$(python3 -c "import json; t=json.load(open('$scratch/out/run.json'))['timing']; print(t['pipeline_seconds'], t.get('final_seconds', 0))")
  note "$key" "$secs $((kb / 1024)) $timing $n $b $phases"
  echo "$key: $n x $samples, B = $b, $t thread(s) $*: ${secs} s, peak RSS $((kb / 1024)) MiB, (rate, read s) = $timing"
  rm -rf "$scratch/out"
}

echo "== 1. throughput: $features x $samples, B = $perms, $threads threads"
for test in student welch; do
  for maxt in single step-down; do
    scan "tp_${test}_${maxt}" "$features" "$perms" "$threads" --test "$test" --maxt "$maxt"
  done
done

echo "== 2. threads: Student, step-down, 1 vs $threads"
scan "threads_1" "$features" "$perms" 1 --test student
scan "threads_$threads" "$features" "$perms" "$threads" --test student
note threads "$threads"

echo "== 3. memory: B = $mem_perms, Welch, step-down maxT and BH, --memory $memory"
for n in "$small" "$big"; do
  scan "mem_$n" "$n" "$mem_perms" "$threads" --test welch --maxt step-down --memory "$memory"
done
note mem_sizes "$small $big"

echo "== 4. linear cost: Student, single-step, 4 points of features x relabelings"
# Large enough that the fixed start-up cost (~0.3 s) does not hide the slope.
q=$((features / 2)); lb=$((perms / 4))
for point in "$q $lb" "$((2 * q)) $lb" "$((2 * q)) $((2 * lb))" "$((4 * q)) $((2 * lb))"; do
  read -r n b <<< "$point"
  scan "lin_${n}_$b" "$n" "$b" "$threads" --test student --maxt single
done

echo "== 5. B = 100 against cat (warm), $big features"
bigm=$(matrix "$big")
cat "$bigm" > /dev/null
started=$(date +%s.%N)
cat "$bigm" > /dev/null
cat_secs=$(python3 -c "print(f'{$(date +%s.%N) - $started:.3f}')")
note cat_seconds "$cat_secs $(stat -c %s "$bigm")"
echo "cat: $cat_secs s for $(stat -c %s "$bigm") bytes"
scan "b100" "$big" 100 "$threads" --test student --maxt single

note load_at_end "$(cut -d' ' -f1-3 /proc/loadavg)"
echo "machine: $(uptime)"
rm -f "$scratch"/m*.arrow

python3 - "$summary" <<'PY'
import sys
rows = {}
for line in open(sys.argv[1]):
    key, value = line.rstrip("\n").split("\t", 1)
    rows[key] = value
def scan(key):
    secs, mib, rate, read, n, b, pipe, final = rows[key].split()
    return dict(secs=float(secs), mib=int(mib), rate=float(rate), read=float(read), n=int(n), b=int(b),
                pipe=float(pipe), final=float(final))
gemm1, gemm2 = float(rows["gemm1"]), float(rows["gemm2"])
th = rows["threads"]
print(f"\nSUMMARY ({rows['machine'].strip()}; load {rows['load_at_start']} at start, {rows['load_at_end']} at end)")
print(f"best f32 GEMM: {gemm1:.3e} (1 thread), {gemm2:.3e} ({th} threads) feature-relabelings/s; "
      f"GEMM {th}/1 threads = {gemm2 / gemm1:.2f}x")
print("| figure | measured | target |")
print("| --- | --- | --- |")
for key in sorted(k for k in rows if k.startswith("tp_")):
    s = scan(key)
    # End to end: features x B over the whole command's wall time (start-up,
    # pipeline and final pass); the pipeline's own rate (run.json) beside it.
    wall = s['n'] * s['b'] / s['secs']
    # Welch's multiply has two rows per feature (z and z^2 against the same
    # relabelings): the GEMM on that multiply does half as many features per
    # second. Its share of the one-row GEMM is printed beside it.
    rows_per_feature = 2 if "welch" in key else 1
    ref = gemm2 / rows_per_feature
    same = f" (of the one-row GEMM: {100 * wall / gemm2:.0f}% / {100 * s['rate'] / gemm2:.0f}%)" if rows_per_feature > 1 else ""
    print(f"| 1. {key[3:]}: {s['n']:,} x B {s['b']:,} | end to end {wall:.3e}/s = {100 * wall / ref:.0f}% of GEMM "
          f"on the same multiply ({s['secs']:.2f} s wall, read {100 * s['read'] / s['secs']:.0f}%); pipeline "
          f"{s['rate']:.3e}/s = {100 * s['rate'] / ref:.0f}%{same} | >= 70% |")
t1, tn = scan("threads_1"), scan(f"threads_{th}")
print(f"| 2. scan {th} threads / 1 thread | {t1['secs'] / tn['secs']:.2f}x (GEMM itself {gemm2 / gemm1:.2f}x) | >= 1.8x |")
small, big = rows["mem_sizes"].split()
ms, mb = scan(f"mem_{small}"), scan(f"mem_{big}")
print(f"| 3. peak RSS {int(small):,} -> {int(big):,} features | {ms['mib']} -> {mb['mib']} MiB "
      f"({100 * (mb['mib'] / ms['mib'] - 1):+.0f}%) | <= 256 MiB, within 10% |")
lin = [scan(k) for k in rows if k.startswith("lin_")]
units = [s["n"] * s["b"] for s in lin]
per = [s["secs"] / u * 1e9 for s, u in zip(lin, units)]
# Least-squares line through the 4 points: slope, intercept, R^2.
mx, my = sum(units) / 4, sum(s["secs"] for s in lin) / 4
sxx = sum((u - mx) ** 2 for u in units)
slope = sum((u - mx) * (s["secs"] - my) for u, s in zip(units, lin)) / sxx
icpt = my - slope * mx
ss_res = sum((s["secs"] - icpt - slope * u) ** 2 for u, s in zip(units, lin))
ss_tot = sum((s["secs"] - my) ** 2 for s in lin)
points = ", ".join(f"{s['n']:,}x{s['b']:,}: {s['secs']:.2f} s" for s in lin)
print(f"| 4. wall time vs features x B ({points}) | {slope * 1e9:.2f} s per 1e9 + {icpt:.2f} s, R^2 = "
      f"{1 - ss_res / ss_tot:.4f}; s per 1e9 at each point {', '.join(f'{p:.2f}' for p in per)} | linear |")
reads = [s["read"] / s["secs"] for s in lin + [scan(k) for k in rows if k.startswith("tp_")] if s["b"] >= 1000]
print(f"| 4. reader's share of wall time at B >= 1,000 | {100 * min(reads):.1f}% to {100 * max(reads):.1f}% | not the bottleneck |")
cat_secs, size = rows["cat_seconds"].split()
b100 = scan("b100")
print(f"| 5. B = 100, {b100['n']:,} features ({int(size) / 2**20:.0f} MiB) | {b100['secs']:.2f} s vs cat {float(cat_secs):.2f} s "
      f"= {b100['secs'] / max(float(cat_secs), 1e-3):.1f}x (read {100 * b100['read'] / b100['secs']:.0f}%; pipeline "
      f"{b100['pipe']:.2f} s, final pass {b100['final']:.2f} s) | within 2x |")
PY
