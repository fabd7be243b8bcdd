#!/usr/bin/env bash
# A real Slurm test: installs Slurm and munge from Debian's packages, starts
# a single-node cluster on loopback by hand (munged, slurmctld, slurmd), runs
# the repository's example array script (4 shards) and the dependent merge
# job on a small simulated input, and compares the merged results with a
# single-process run byte for byte. Needs root.
#
#   tests/slurm/run_slurm_test.sh [path/to/riffle]
#
# Daemons are stopped by the PIDs recorded at start, also on failure.
set -euo pipefail
cd "$(dirname "$0")/../.."
repo=$(pwd)
riffle=$(realpath "${1:-target/release/riffle}")
[ -x "$riffle" ] || { echo "no riffle binary at $riffle (cargo build --release)" >&2; exit 1; }
[ "$(id -u)" = 0 ] || { echo "the Slurm test needs root" >&2; exit 1; }

if ! command -v slurmctld >/dev/null || ! command -v slurmd >/dev/null \
  || ! command -v sbatch >/dev/null || ! command -v munged >/dev/null; then
  apt-get update -qq
  DEBIAN_FRONTEND=noninteractive apt-get install -y -qq --no-install-recommends \
    slurmctld slurmd slurm-client munge >/dev/null
fi

scratch=$(mktemp -d /tmp/riffle-slurm.XXXXXX)
chmod 755 "$scratch"
pids=()
jobs_submitted=()
cleanup() {
  local status=$?
  set +e
  for j in "${jobs_submitted[@]}"; do scancel "$j" 2>/dev/null; done
  # Reverse start order: slurmd, slurmctld, munged.
  for ((i = ${#pids[@]} - 1; i >= 0; i--)); do
    kill -TERM "${pids[i]}" 2>/dev/null
    for _ in $(seq 50); do kill -0 "${pids[i]}" 2>/dev/null || break; sleep 0.1; done
    kill -KILL "${pids[i]}" 2>/dev/null
    wait "${pids[i]}" 2>/dev/null
  done
  if [ "$status" != 0 ]; then
    for log in "$scratch"/*.log "$scratch"/run/logs/*.log; do
      [ -f "$log" ] && { echo "--- $log"; tail -n 30 "$log"; }
    done
  fi
  rm -rf "$scratch"
  exit "$status"
}
trap cleanup EXIT

# munge: own socket, key, pid and log; socket folder 755, key 400.
mkdir -p "$scratch/munge/run" "$scratch/munge/etc" "$scratch/munge/lib"
chmod 755 "$scratch/munge" "$scratch/munge/run"
chmod 700 "$scratch/munge/etc" "$scratch/munge/lib"
dd if=/dev/urandom of="$scratch/munge/etc/munge.key" bs=1024 count=1 status=none
chmod 400 "$scratch/munge/etc/munge.key"
socket="$scratch/munge/run/munge.socket.2"
munged --foreground --socket="$socket" --key-file="$scratch/munge/etc/munge.key" \
  --pid-file="$scratch/munge/run/munged.pid" --log-file="$scratch/munged.log" \
  --seed-file="$scratch/munge/lib/munged.seed" >"$scratch/munged.out.log" 2>&1 &
pids+=($!)
for _ in $(seq 50); do [ -S "$socket" ] && break; sleep 0.1; done
[ -S "$socket" ] || { echo "munged did not start" >&2; exit 1; }

host=$(hostname -s)
node_line=$(slurmd -C | grep '^NodeName=' | head -n 1)
node_name=$(sed 's/^NodeName=\([^ ]*\).*/\1/' <<<"$node_line")
mkdir -p "$scratch/state" "$scratch/spool"
export SLURM_CONF="$scratch/slurm.conf"
cat >"$SLURM_CONF" <<CONF
ClusterName=riffleci
SlurmctldHost=$host(127.0.0.1)
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
CredType=cred/munge
AuthInfo=socket=$socket
StateSaveLocation=$scratch/state
SlurmdSpoolDir=$scratch/spool
SlurmctldPidFile=$scratch/slurmctld.pid
SlurmdPidFile=$scratch/slurmd.pid
SlurmctldLogFile=$scratch/slurmctld.log
SlurmdLogFile=$scratch/slurmd.log
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
SelectType=select/cons_tres
SelectTypeParameters=CR_Core
SchedulerParameters=batch_sched_delay=0
DependencyParameters=kill_invalid_depend
MpiDefault=none
MailProg=/bin/true
JobAcctGatherType=jobacct_gather/none
AccountingStorageType=accounting_storage/none
JobCompType=jobcomp/filetxt
JobCompLoc=$scratch/jobcomp.txt
ReturnToService=2
$node_line NodeAddr=127.0.0.1
PartitionName=ci Nodes=$node_name Default=YES MaxTime=INFINITE State=UP
CONF
slurmctld -D -f "$SLURM_CONF" >"$scratch/slurmctld.out.log" 2>&1 &
pids+=($!)
slurmd -D -f "$SLURM_CONF" >"$scratch/slurmd.out.log" 2>&1 &
pids+=($!)
for _ in $(seq 100); do
  state=$(sinfo -h -n "$node_name" -o '%t' 2>/dev/null || true)
  [ "$state" = idle ] && break
  sleep 0.2
done
[ "$state" = idle ] || { echo "node not idle (state '$state')" >&2; exit 1; }
echo "slurm: node $node_name idle"

# A small simulated study, the job file, and the single-process reference.
work="$scratch/work"
mkdir -p "$work"
"$riffle" simulate --out "$work/m.arrow" --sheet "$work/sheet.tsv" --features 5003 \
  --group-sizes 10,12 --effect-fraction 0.02 --effect-size 2 --seed 9
cat >"$work/job.toml" <<TOML
matrix = "$work/m.arrow"
samples = "$work/sheet.tsv"
group = "group"
perms = 400
seed = 5
format = "tsv"
pooled-null = true
quiet = true
TOML
"$riffle" scan --job "$work/job.toml" --out "$work/single" --threads 2

ids=$(RIFFLE="$riffle" "$repo/examples/slurm/submit.sh" "$work/job.toml" "$scratch/run" 4)
read -r array_id merge_id <<<"$ids"
jobs_submitted+=("$array_id" "$merge_id")
echo "slurm: array job $array_id, merge job $merge_id"
deadline=$((SECONDS + 300))
while squeue -h -j "$array_id,$merge_id" 2>/dev/null | grep -q .; do
  if ((SECONDS > deadline)); then
    echo "slurm: jobs still queued after 300 s" >&2
    squeue >&2
    exit 1
  fi
  sleep 1
done
completed=$(grep -c 'JobState=COMPLETED' "$scratch/jobcomp.txt" || true)
echo "slurm: $completed jobs completed (expected 5: 4 shards and the merge)"
[ "$completed" = 5 ] || { cat "$scratch/jobcomp.txt" >&2; exit 1; }
for k in 1 2 3 4; do
  [ -f "$scratch/run/shards/task-$k/shard.json" ] || { echo "shard task-$k missing" >&2; exit 1; }
done
cmp "$work/single/results.tsv" "$scratch/run/results/results.tsv"
echo "slurm: merged results are byte-identical to the single-process run"
