#!/usr/bin/env bash
# Feature-relabelings per second of the study designs, each next to the
# two-group Student t on the same matrix, in one run: k = 4 groups (one-way
# F), 3 covariates (age, sex, site; Freedman–Lane), k = 4 groups with the
# same covariates, and 10% missing values (the same values with a tenth
# removed; Spearman with a trait and Student t + 3 covariates take the
# per-row f64 path there). Throughput is tested features x B / wall time of the scan.
# Usage: bash benches/designs.sh [SCRATCH_DIR]
# Environment: FEATURES (200000), SAMPLES (48), PERMS (10000), THREADS (2),
# RIFFLE (an already built binary).
set -euo pipefail
cd "$(dirname "$0")/.."
scratch=${1:-$(mktemp -d)}
mkdir -p "$scratch"
features=${FEATURES:-200000}
samples=${SAMPLES:-48}
perms=${PERMS:-10000}
threads=${THREADS:-2}
half=$((samples / 2))
if [ -z "${RIFFLE:-}" ]; then cargo build --release --quiet; fi
riffle=${RIFFLE:-${CARGO_TARGET_DIR:-target}/release/riffle}
echo "machine: $(nproc) cores,$(grep -m1 'model name' /proc/cpuinfo | cut -d: -f2), load $(cut -d' ' -f1-3 /proc/loadavg)"
matrix=$scratch/designs.arrow
gappy=$scratch/designs-missing.arrow
[ -f "$matrix" ] || $riffle simulate --out "$matrix" --sheet "$scratch/plain.tsv" \
  --features "$features" --group-sizes "$half,$half" --seed 1 >/dev/null
[ -f "$gappy" ] || $riffle simulate --out "$gappy" --sheet "$scratch/plain.tsv" \
  --features "$features" --group-sizes "$half,$half" --seed 1 --missing-fraction 0.1 >/dev/null
# Invented design columns: four arms in turn, an age, a sex, three sites
# and a score with ties (deterministic, so every run sees the same sheet).
awk -F'\t' 'BEGIN { OFS = "\t" }
  NR == 1 { print $0, "arm", "age", "sex", "site", "score"; next }
  { i = NR - 2; print $0, "arm" (i % 4), 30 + (i * 17) % 41, (i % 5 < 2 ? "f" : "m"), "site" (i % 3), (i * 29) % 23 }' \
  "$scratch/plain.tsv" >"$scratch/sheet.tsv"

run() { # label, matrix, then scan options
  local label=$1 input=$2; shift 2
  /usr/bin/time -f "%e" -o "$scratch/time" $riffle scan --matrix "$input" --samples "$scratch/sheet.tsv" \
    --perms "$perms" --threads "$threads" --maxt single --out "$scratch/out" --quiet --no-report "$@" \
    2>"$scratch/err" || { cat "$scratch/err"; exit 1; }
  local tested
  tested=$(python3 -c 'import json,sys; r=json.load(open(sys.argv[1])); print(r["features"]["tested"])' "$scratch/out/run.json")
  awk -v label="$label" -v s="$(cat "$scratch/time")" -v t="$tested" -v b="$perms" \
    'BEGIN { printf "| %s | %d | %.1f s | %.3g |\n", label, t, s, t * b / s }'
}

echo "== $features x $samples, B = $perms, $threads threads, --maxt single"
echo "| design | tested features | wall time | feature-relabelings/s |"
echo "| --- | --- | --- | --- |"
run "two groups, Student t" "$matrix" --group group --test student
run "k = 4 groups, one-way F" "$matrix" --group arm --test anova
run "two groups, Student t + 3 covariates (Freedman–Lane)" "$matrix" --group group --test student --covariates age,sex,site
run "k = 4 groups, F + 3 covariates (Freedman–Lane)" "$matrix" --group arm --test anova --covariates age,sex,site
run "two groups, Student t, 10% missing values" "$gappy" --group group --test student
run "two groups, Student t + 3 covariates, 10% missing values" "$gappy" --group group --test student --covariates age,sex,site
run "trait, Spearman" "$matrix" --trait score --test spearman
run "trait, Spearman, 10% missing values" "$gappy" --trait score --test spearman
run "two groups, Welch t" "$matrix" --group group --test welch
run "two groups, Welch t, 10% missing values" "$gappy" --group group --test welch
