#!/usr/bin/env bash
# Fixed B against sequential stopping (--stop-after H), side by side in one
# run, on a simulated study with 1% planted effects: wall time and the
# relabelings used (run.json). Resolving p down to 1e-8 needs B ~ 1e8, far
# beyond a fixed-B run (and beyond the n x B f32 weights in memory), so the
# fixed-B figure is measured at FIXED_B and extrapolated linearly in B; the
# sequential one is measured at each of SEQ_B and extrapolated to 1e8 from
# the features still open at the largest (each runs the remaining
# relabelings; the stopped ones cost nothing more).
# Usage: bash benches/sequential.sh [SCRATCH_DIR]
# Environment: FEATURES (1000000), SAMPLES (48), FIXED_B (20000), SEQ_B
# ("20000 1000000"), H (10), TAIL_B (10000: B of the sequential + tail
# run), TEST (student), THREADS (2), RIFFLE (binary).
set -euo pipefail
cd "$(dirname "$0")/.."
scratch=${1:-$(mktemp -d)}
features=${FEATURES:-1000000}
samples=${SAMPLES:-48}
fixed_b=${FIXED_B:-20000}
seq_b=${SEQ_B:-20000 1000000}
h=${H:-10}
tail_b=${TAIL_B:-10000}
test=${TEST:-student}
threads=${THREADS:-2}
half=$((samples / 2))
# RIFFLE: an already built binary to use instead of building one.
if [ -z "${RIFFLE:-}" ]; then cargo build --release --quiet; fi
riffle=${RIFFLE:-${CARGO_TARGET_DIR:-target}/release/riffle}
echo "machine: $(nproc) cores, $(grep -m1 'model name' /proc/cpuinfo | cut -d: -f2), load $(cut -d' ' -f1-3 /proc/loadavg)"
matrix=$scratch/m$features.arrow
[ -f "$matrix" ] || $riffle simulate --out "$matrix" --sheet "$scratch/s.tsv" \
  --features "$features" --group-sizes "$half,$half" --effect-fraction 0.01 --seed 1

run() { # label, perms, then extra options
  local label=$1 perms=$2; shift 2
  /usr/bin/time -f "%e" -o "$scratch/time" $riffle scan --matrix "$matrix" --samples "$scratch/s.tsv" \
    --group group --test "$test" --perms "$perms" --threads "$threads" --maxt single \
    --out "$scratch/out" --quiet --no-report "$@" 2>"$scratch/err" || { cat "$scratch/err"; exit 1; }
  python3 - "$label" "$perms" "$(cat "$scratch/time")" "$scratch/out/run.json" "$scratch/fixed_rate" <<'EOF'
import json, os, sys
label, perms, secs, path, rate_file = sys.argv[1], int(sys.argv[2]), float(sys.argv[3]), sys.argv[4], sys.argv[5]
record = json.load(open(path))
r = record["relabelings"]
sequential = record["options"].get("stop_after") is not None
used, fixed = r["used"], r["fixed_b_equivalent"]
target = 10**8
line = (f"{label}: B = {perms}, {secs:.1f} s, relabelings used {used:.4g} "
        f"({100 * used / fixed:.2f}% of B x features)")
if not sequential:
    open(rate_file, "w").write(str(secs / used))
    line += f"; EXTRAPOLATED to B = 1e8 (linear in B): {secs * target / perms:.3g} s"
else:
    tested = fixed // perms
    open_at_end = tested - r["stopped_early"]
    # A run to 1e8 adds the remaining relabelings of the features still open
    # (an upper bound: some of them would stop on the way).
    tail = record.get("tail_fit")
    if tail:
        counts = tail["counts"]
        # The features still open at B got a tail p instead: nothing left
        # to run, so this wall time is the whole cost.
        line += (f"; stopped early {r['stopped_early']}, open at B {open_at_end}, of which "
                 f"{counts['extrapolated']} got a tail p (measured, no extrapolation in B)")
    else:
        more = used + open_at_end * (target - perms)
        line += (f"; stopped early {r['stopped_early']}, open at B {open_at_end}; EXTRAPOLATED to "
                 f"B = 1e8: {more:.3g} relabelings, {secs * more / used:.3g} s at this run's own rate")
        if os.path.exists(rate_file):
            line += f", {more * float(open(rate_file).read()):.3g} s at the fixed run's rate"
print(line)
EOF
}

rm -f "$scratch/fixed_rate"
echo "== $features x $samples, 1% planted effects, --test $test, $threads threads"
run "fixed B" "$fixed_b"
for b in $seq_b; do
  run "sequential h = $h" "$b" --stop-after "$h"
done
# Features that never stop get the tail p (--tail-fit) instead of running
# on towards 1e8 relabelings.
run "sequential h = $h + tail" "$tail_b" --stop-after "$h" --tail-fit "$h"
