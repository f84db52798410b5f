#!/usr/bin/env bash
# Peak memory of training, measured with /usr/bin/time -v: the 10,000-sample dataset of the
# README's comparison table and one ten times larger (100,000 samples), each trained with
# every shard read from disk on every pass (--memory-mb 0) and with the default budget
# (--memory-mb 1024), for a few epochs (memory reaches its peak in the first).
#
#   bash learn/benches/train_memory.sh [DATA_DIR]      (default: data/)
#
# Missing datasets are labelled first from the demo study (fictional demo grid) with
# `holdfast dataset build`, resuming an interrupted build: about 3 min per 10,000 samples on
# two cores. Settings: SMALL, LARGE (samples), EPOCHS, BUDGETS (MiB, space-separated).
# Prints one row per run: peak resident memory, seconds per epoch, shards held in memory; then,
# where a memory cgroup can be made (root), trains the large dataset within LIMIT_MIB.
set -euo pipefail
cd "$(dirname "$0")/../.."

data_dir=${1:-data}
small=${SMALL:-10000}
large=${LARGE:-100000}
epochs=${EPOCHS:-2}
budgets=${BUDGETS:-"0 1024"}
study=scenarios/quillmoor-study.toml

if [ ! -x /usr/bin/time ]; then
  echo "/usr/bin/time is missing (Debian: apt-get install time)" >&2
  exit 1
fi
cargo build --release --quiet
bin=target/release/holdfast
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT

dataset() { # samples -> folder, built or resumed
  local n=$1 dir="$data_dir/quillmoor-$(($1 / 1000))k"
  local resume=()
  [ -f "$dir/manifest.json" ] && resume=(--resume)
  echo "dataset $dir: $n samples (labelling what is missing) ..." >&2
  "$bin" dataset build "$study" -n "$n" -o "$dir" --quiet "${resume[@]}" >&2
  echo "$dir"
}

printf '%-24s %9s %10s %12s %12s %10s %14s\n' \
  dataset samples "budget MiB" "shards kept" "peak RSS MiB" "s/epoch" "wall s (all)"
for n in "$small" "$large"; do
  dir=$(dataset "$n")
  for budget in $budgets; do
    out="$work/run.txt"
    /usr/bin/time -v -o "$work/time.txt" "$bin" train "$dir" -o "$work/model.hfmodel" \
      --epochs "$epochs" --patience "$epochs" --memory-mb "$budget" --quiet >"$out"
    rss_kib=$(awk -F': ' '/Maximum resident set size/ {print $2}' "$work/time.txt")
    wall=$(awk -F': ' '/Elapsed \(wall clock\)/ {print $2}' "$work/time.txt" \
      | awk -F: '{ s = 0; for (i = 1; i <= NF; i++) s = s * 60 + $i; print s }')
    kept=$(sed -n 's/^\([0-9]* of [0-9]*\) shards held.*/\1/p' "$out")
    per_epoch=$(sed -n 's/.*s, \([0-9.]*\) s per epoch).*/\1/p' "$out")
    printf '%-24s %9s %10s %12s %12s %10s %14s\n' \
      "$dir" "$n" "$budget" "$kept" "$((rss_kib / 1024))" "$per_epoch" "$wall"
    rm -f "$work/model.hfmodel"
  done
done
echo "(peak RSS: Maximum resident set size of /usr/bin/time -v, the whole process: opening" \
  "the dataset, training, validation, calibration and the test-split evaluation)"

# Larger than memory: the large dataset trained in a memory cgroup of LIMIT_MIB (default 256),
# far below its featurised size, from disk and (for contrast) with the default budget.
limit_mib=${LIMIT_MIB:-256}
limited() { # runs "$@" in a fresh memory cgroup of limit_mib; exit 125 when none can be made
  local cg=""
  if [ -d /sys/fs/cgroup/memory ] && mkdir "/sys/fs/cgroup/memory/holdfast-bench-$$" 2>/dev/null; then
    cg=/sys/fs/cgroup/memory/holdfast-bench-$$
    echo $((limit_mib << 20)) >"$cg/memory.limit_in_bytes"
  elif mkdir "/sys/fs/cgroup/holdfast-bench-$$" 2>/dev/null; then
    cg=/sys/fs/cgroup/holdfast-bench-$$
    if ! echo $((limit_mib << 20)) >"$cg/memory.max" 2>/dev/null; then
      rmdir "$cg"
      return 125
    fi
  else
    return 125
  fi
  local rc=0
  (echo "$BASHPID" >"$cg/cgroup.procs" && exec "$@") >/dev/null 2>&1 || rc=$?
  rmdir "$cg" 2>/dev/null || true
  return "$rc"
}
dir="$data_dir/quillmoor-$((large / 1000))k"
for budget in 0 1024; do
  rc=0
  limited "$bin" train "$dir" -o "$work/model.hfmodel" --epochs 1 --memory-mb "$budget" --quiet || rc=$?
  case $rc in
    0) verdict="trained" ;;
    125) echo "(no memory cgroup could be made here, root needed: larger-than-memory run skipped)"; break ;;
    137) verdict="killed for lack of memory (exit 137)" ;;
    *) verdict="failed (exit $rc)" ;;
  esac
  echo "$dir under a $limit_mib MiB memory limit, --memory-mb $budget, 1 epoch: $verdict"
done
