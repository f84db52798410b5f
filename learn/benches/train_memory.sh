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
# Prints one row per run: peak resident memory, seconds per epoch, shards held in memory.
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
