#!/usr/bin/env bash
# Submits a sharded riffle scan: an array of N shard jobs, then the merge,
# which starts only when every shard succeeded (afterok).
#
#   examples/slurm/submit.sh JOB.toml RUN_DIR N [extra sbatch options...]
#
# JOB.toml holds the scan's options (see README, "Job files"); RUN_DIR gets
# shards/task-K/ (one per array task), logs/ and results/ (the merged run:
# results table and run.json). Set RIFFLE to the riffle binary if it is not
# on the PATH of the compute nodes. Prints the array and merge job ids.
set -euo pipefail
if [ $# -lt 3 ]; then
  sed -n '2,11p' "$0" >&2
  exit 2
fi
job=$(realpath "$1")
run=$(realpath -m "$2")
shards=$3
shift 3
here=$(dirname "$(realpath "$0")")
riffle=${RIFFLE:-riffle}
if [[ "$riffle" == */* ]]; then riffle=$(realpath "$riffle"); fi
mkdir -p "$run/logs" "$run/shards"
export_vars="ALL,RIFFLE=$riffle,RIFFLE_JOB=$job,RIFFLE_OUT=$run"
array=$(sbatch --parsable --array="1-$shards" --export="$export_vars" \
  --output="$run/logs/shard-%A_%a.log" "$@" "$here/riffle-shards.sbatch")
array=${array%%;*}
merge=$(sbatch --parsable --dependency="afterok:$array" --export="$export_vars" \
  --output="$run/logs/merge-%j.log" "$@" "$here/riffle-merge.sbatch")
merge=${merge%%;*}
echo "$array $merge"
