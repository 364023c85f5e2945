#!/usr/bin/env bash
# Backfill benchmark: simtide against numpy/scipy computing the same similarity matrices
# from the same file, in the same run, on the MovieLens snapshot and on a generated
# 5-million-rating power-law set. For every figure it prints ours, the reference and the
# ratio (machines here are noisy: ratios, not absolute times, are the figures); then peak
# RSS at two memory budgets with the same result, and bytes on disk. Run via `make bench`.
set -euo pipefail
cd "$(dirname "$0")/.."
CACHE=${SIMTIDE_CACHE:-/var/cache/simtide}
PY="$CACHE/venv/bin/python"
BIN="${CARGO_TARGET_DIR:-$CACHE/target}/release/simtide"
command -v /usr/bin/time >/dev/null 2>&1 || { apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq time >/dev/null; }
BIG="$CACHE/datasets/powerlaw-5m.csv"
[ -s "$BIG" ] || "$PY" scripts/gen_powerlaw.py "$BIG"
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT

# backfill NAME INPUT CONFIG: runs simtide, leaves its summary in $work/NAME.out and sets
# WALL (s), RSS (KiB), PAIRS (rating pairs stored), UPDATES (pair updates/s while applying).
backfill() {
  local name=$1 input=$2
  printf '%s\n' "$3" > "$work/$name.toml"
  /usr/bin/time -o "$work/$name.time" -f '%e %M' "$BIN" backfill --quiet --store "$work/$name" \
    --config "$work/$name.toml" --input "$input" > "$work/$name.out"
  read -r WALL RSS < "$work/$name.time"
  PAIRS=$(awk '/rating pairs/ {print $3; exit}' "$work/$name.out")
  UPDATES=$(awk '/pair updates/ {sub("/s", "", $4); print $4; exit}' "$work/$name.out")
}

# scipy INPUT: seconds numpy/scipy take to compute the three sparse products and the
# score matrix from the file (loading excluded).
scipy() {
  "$PY" scripts/oracle_similarity.py time-ratings --events "$1" | sed -n 's/.*matrix \([0-9.]*\)s.*/\1/p'
}

ratio() { awk -v a="$1" -v b="$2" 'BEGIN { printf "%.2f", a / b }'; }

# disk NAME: bytes on disk per stored rating pair and the largest write-ahead log left.
disk() {
  local db="$work/$1/db" bytes wal
  bytes=$(du -sb "$db" | cut -f1)
  wal=$(find "$db" -name '*.log' -printf '%s\n' | sort -n | tail -1)
  echo "  disk: $(awk -v b="$bytes" -v p="$PAIRS" 'BEGIN { printf "%.1f", b / p }') bytes per rating pair ($bytes bytes, $PAIRS pairs); largest write-ahead log ${wal:-0} bytes"
}

# export NAME: the store's lists without publication times, sorted, for comparing runs.
lists() {
  "$BIN" export --store "$work/$1" | "$PY" -c '
import json, sys
rows = []
for line in sys.stdin:
    r = json.loads(line); r.pop("computed_at", None); rows.append(json.dumps(r, sort_keys=True))
print("\n".join(sorted(rows)))' > "$work/$1.lists"
}

echo "== backfill of a fresh store against numpy/scipy (same file, same run)"
ML="$CACHE/datasets/movielens.csv"
for setting in exact defaults; do
  if [ "$setting" = exact ]; then
    conf=$'[similarity]\nrecenter_tolerance = 0.0\nmax_items_per_user = 0\nmin_common_users = 1\nrating_min = 0.5\n[backfill]\nbatch_events = 100004'
  else
    conf=$'[similarity]\nrating_min = 0.5'
  fi
  backfill "ml-$setting" "$ML" "$conf"
  ref=$(scipy "$ML")
  echo "movielens $setting: seconds ours $WALL (parse, aggregate, persist, every top-50), reference $ref (scipy matrices, load excluded), ratio $(ratio "$WALL" "$ref"); peak RSS ${RSS} KiB"
  disk "ml-$setting"
done

echo
echo "== power-law set, 5 million ratings, defaults, at two memory budgets"
ref=$(scipy "$BIG")
for budget in 256MiB 4GiB; do
  backfill "pl-$budget" "$BIG" $'[backfill]\nbatch_events = 500000\nmemory_budget = "'"$budget"'"'
  segments=$(awk '/batches/ {print $4; exit}' "$work/pl-$budget.out")
  echo "powerlaw budget $budget: seconds ours $WALL, reference $ref (scipy matrices), ratio $(ratio "$WALL" "$ref"); pair updates/s ours $UPDATES, target 10000000, ratio $(ratio "$UPDATES" 10000000); $segments segment(s); peak RSS ${RSS} KiB"
  disk "pl-$budget"
  lists "pl-$budget"
done
if cmp -s "$work/pl-256MiB.lists" "$work/pl-4GiB.lists"; then
  echo "  the two budgets published identical lists ($(wc -l < "$work/pl-4GiB.lists") lists)"
else
  echo "  the two budgets published DIFFERENT lists" && exit 1
fi
