#!/usr/bin/env bash
# CPU seconds (user + sys) and wall seconds of whole `riffle scan` runs,
# two or more binaries alternating, so that the ratios between them hold on
# a machine shared with other work (each binary sees the same load mix).
#
# Usage: bash benches/ab.sh REPS TEST MAXT THREADS BINARY...
#   e.g. bash benches/ab.sh 3 student single 1 /tmp/riffle-old target/release/riffle
# Environment: SCRATCH (default /tmp/riffle-ab), FEATURES (200000), PERMS
# (10000), GROUPS_ARG (the sheet column, default "group"; "arm" adds a
# four-level column to the sheet), EXTRA (more scan options).
set -euo pipefail
reps=$1 test=$2 maxt=$3 threads=$4
shift 4
scratch=${SCRATCH:-/tmp/riffle-ab}
features=${FEATURES:-200000}
mkdir -p "$scratch"
matrix=$scratch/m$features.arrow
[ -f "$matrix" ] || "$1" simulate --out "$matrix" --sheet "$scratch/s.tsv" --features "$features" \
  --group-sizes 24,24 --seed 1 >/dev/null
awk -F'\t' 'BEGIN { OFS = "\t" } NR == 1 { print $0, "arm"; next } { print $0, "arm" ((NR - 2) % 4) }' \
  "$scratch/s.tsv" >"$scratch/sheet.tsv"
times=$scratch/times.$$
: >"$times"
for _ in $(seq "$reps"); do
  for bin in "$@"; do
    # shellcheck disable=SC2086
    /usr/bin/time -f "$bin %U %S %e" -a -o "$times" "$bin" scan --test "$test" --matrix "$matrix" \
      --samples "$scratch/sheet.tsv" --group "${GROUPS_ARG:-group}" --perms "${PERMS:-10000}" \
      --threads "$threads" --maxt "$maxt" --out "$scratch/out" --quiet --no-report ${EXTRA:-}
    rm -rf "$scratch/out"
  done
done
echo "$(uptime)"
python3 - "$times" <<'PY'
import collections, statistics, sys
cpu, wall = collections.defaultdict(list), collections.defaultdict(list)
for line in open(sys.argv[1]):
    b, u, s, e = line.split()
    cpu[b].append(float(u) + float(s))
    wall[b].append(float(e))
for b in cpu:
    print(f"{b}: cpu min {min(cpu[b]):.2f} median {statistics.median(cpu[b]):.2f}; "
          f"wall min {min(wall[b]):.2f} median {statistics.median(wall[b]):.2f} ({len(cpu[b])} runs)")
PY
rm -f "$times"
