#!/usr/bin/env bash
# End-to-end test on a real single-node Slurm: `holdfast dataset plan` writes a 4-task job array
# and its dependent merge for a small study, they are submitted with the plan's submit.sh, and
# the merged dataset must be byte-identical to a single-process build with the same seed.
#
# Usage: bash tests/slurm.sh [path/to/holdfast]   (default target/release/holdfast)
#
# Installs Debian's slurm-wlm and munge if missing, writes a one-node configuration under a
# temporary folder, starts munged, slurmctld and slurmd, and stops exactly the daemons it
# started (by their process ids) on exit. Skips, saying so, only where the packages cannot be
# installed or it is not run as root (the daemons need it).
set -euo pipefail
cd "$(dirname "$0")/.."
HOLDFAST=$(realpath "${1:-target/release/holdfast}")
WAIT_S=600

say() { printf 'slurm test: %s\n' "$*"; }
skip() { say "SKIPPED: $*"; exit 0; }

[ -x "$HOLDFAST" ] || { say "no holdfast executable at $HOLDFAST"; exit 1; }
[ "$(id -u)" = 0 ] || skip "not run as root (slurmctld, slurmd and munged need it)"
if ! command -v sbatch >/dev/null || ! command -v slurmctld >/dev/null || ! command -v munged >/dev/null; then
  command -v apt-get >/dev/null || skip "slurm-wlm and munge are not installed and there is no apt-get"
  say "installing slurm-wlm and munge"
  { apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq slurm-wlm munge; } \
    >/dev/null 2>&1 || skip "slurm-wlm and munge could not be installed"
fi

work=$(mktemp -d /tmp/holdfast-slurm.XXXXXX)
chmod 755 "$work"
cleanup() {
  for f in "$work/slurmctld.pid" "$work/slurmd.pid" "$work/munged.pid"; do
    [ -f "$f" ] && kill "$(cat "$f")" 2>/dev/null || true
  done
  sleep 1
  rm -rf "$work"
}
trap cleanup EXIT

# munge: a key of our own for this run, its socket and pid file under $work.
install -d -o munge -g munge -m 711 "$work/munge"   # munged needs its socket folder searchable by all
dd if=/dev/urandom of="$work/munge/munge.key" bs=1024 count=1 status=none
chown munge:munge "$work/munge/munge.key"
chmod 400 "$work/munge/munge.key"
socket="$work/munge/munge.socket"
runuser -u munge -- munged --key-file="$work/munge/munge.key" --socket="$socket" \
  --pid-file="$work/munge/munged.pid" --log-file="$work/munge/munged.log" \
  --seed-file="$work/munge/munged.seed" 2>/dev/null
for _ in $(seq 50); do [ -s "$work/munge/munged.pid" ] && break; sleep 0.1; done
cp "$work/munge/munged.pid" "$work/munged.pid"
munge --socket="$socket" -n | unmunge --socket="$socket" | grep -q "STATUS: *Success" \
  || { say "munge does not work"; exit 1; }

# Slurm: one node, this machine, all its cores; state and logs under $work.
host=$(hostname)
cpus=$(nproc)
memory_mb=$(( $(awk '/^MemTotal:/ {print $2}' /proc/meminfo) / 1024 - 512 ))
conf="$work/slurm.conf"
cat > "$conf" <<EOF
ClusterName=holdfast-test
SlurmctldHost=$host
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
AuthInfo=socket=$socket
StateSaveLocation=$work/state
SlurmdSpoolDir=$work/spool
SlurmctldPidFile=$work/slurmctld.pid
SlurmdPidFile=$work/slurmd.pid
SlurmctldLogFile=$work/slurmctld.log
SlurmdLogFile=$work/slurmd.log
SlurmctldPort=$((6817 + RANDOM % 500))
SlurmdPort=$((7400 + RANDOM % 500))
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
JobAcctGatherType=jobacct_gather/none
SelectType=select/cons_tres
SelectTypeParameters=CR_CPU
ReturnToService=2
MpiDefault=none
NodeName=$host CPUs=$cpus RealMemory=$memory_mb State=UNKNOWN
PartitionName=main Nodes=$host Default=YES MaxTime=INFINITE State=UP
EOF
mkdir -p "$work/state" "$work/spool"
export SLURM_CONF="$conf"
slurmctld -f "$conf"
slurmd -f "$conf"
for _ in $(seq 60); do
  sinfo -h -o '%t' 2>/dev/null | grep -qx idle && break
  sleep 1
done
sinfo -h -o '%t' | grep -qx idle || { say "the node did not come up"; tail -20 "$work/slurmctld.log" "$work/slurmd.log" || true; exit 1; }
say "one-node Slurm up on $host with $cpus CPUs"

# The demo study with shards of 10 samples, 80 samples: 8 shards over 4 tasks.
data="$work/data"
mkdir -p "$data"
sed -e "s|^grid = \"quillmoor.toml\"|grid = \"$PWD/scenarios/quillmoor.toml\"|" \
    -e "s|^shard_size = 250|shard_size = 10|" scenarios/quillmoor-study.toml > "$data/study.toml"
"$HOLDFAST" dataset plan "$data/study.toml" -n 80 --tasks 4 --cpus-per-task 1 --calibrate 2 \
  -o "$data/planned"
# Submits the plan and waits for its merge job to leave the queue.
submit_and_wait() {
  local ids merge_id start
  ids=$(bash "$data/planned.slurm/submit.sh")
  say "submitted: $ids"
  merge_id=$(sed -n 's/.*merge job \([0-9]*\).*/\1/p' <<<"$ids")
  start=$(date +%s)
  while squeue -h -j "$merge_id" 2>/dev/null | grep -q .; do
    if [ $(( $(date +%s) - start )) -gt $WAIT_S ]; then
      say "jobs still queued after $WAIT_S s"; squeue; exit 1
    fi
    sleep 2
  done
  say "jobs done after $(( $(date +%s) - start )) s"
  [ -f "$data/planned/manifest.json" ] || {
    say "no merged dataset"; cat "$data/planned.slurm/logs/"*.log || true; exit 1; }
}
submit_and_wait

# A lost shard (as after a pre-empted task): re-submitting labels only that shard again.
parts="$data/planned.slurm/parts"
lost=$(ls "$parts/part-3" | grep '^shard-' | head -1)
kept=$(ls "$parts/part-1" | grep '^shard-' | head -1)
kept_before=$(stat -c %y "$parts/part-1/$kept")
rm "$parts/part-3/$lost" "$data/planned/$lost"
sleep 1
submit_and_wait
[ -f "$parts/part-3/$lost" ] || { say "$lost was not labelled again"; exit 1; }
[ "$(stat -c %y "$parts/part-1/$kept")" = "$kept_before" ] \
  || { say "part 1 was rewritten although complete"; exit 1; }
say "re-submission labelled only the lost shard"

# The same dataset from one process.
"$HOLDFAST" dataset build "$data/study.toml" -n 80 -o "$data/one" --quiet >/dev/null
for f in "$data/one"/*; do
  name=$(basename "$f")
  cmp -s "$f" "$data/planned/$name" || { say "$name differs from the single-process build"; exit 1; }
done
n=$(ls "$data/planned" | grep -c '^shard-')
[ "$n" = 8 ] || { say "expected 8 shards, found $n"; exit 1; }
say "PASSED: the merged job-array dataset equals the single-process build (8 shards, byte for byte)"
