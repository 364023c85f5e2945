#!/usr/bin/env bash
# Backfill benchmark: simtide against numpy/scipy computing the same similarity matrices
# from the same file, in the same run, on three data shapes: the MovieLens snapshot
# (narrow: 9,066 items, heavy users), a generated wide catalogue (30,000 items, 1 million
# ratings, light users) and a generated 5-million-rating narrow set (3,000 items). For
# every figure it prints ours, the reference and the ratio (machines here are noisy:
# ratios, not absolute times, are the figures), with the pairs stored and the bytes the
# run wrote; then peak RSS at two memory budgets against the budget plus a stated
# constant, with the same lists at both. Every setting not named is the default. Run via
# `make bench`.
set -euo pipefail
cd "$(dirname "$0")/.."
CACHE=${SIMTIDE_CACHE:-/var/cache/simtide}
PY="$CACHE/venv/bin/python"
BIN="${CARGO_TARGET_DIR:-$CACHE/target}/release/simtide"
command -v /usr/bin/time >/dev/null 2>&1 || { apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq time >/dev/null; }
BIG="$CACHE/datasets/powerlaw-5m.csv"
[ -s "$BIG" ] || "$PY" scripts/gen_powerlaw.py "$BIG"
WIDE="$CACHE/datasets/wide-1m.csv"
[ -s "$WIDE" ] || "$PY" scripts/gen_powerlaw.py "$WIDE" 1000000 20000 30000
# Peak RSS above backfill.memory_budget that a run may take: the process, RocksDB's
# buffers and caches, the item directory and the lists of the last pass (docs/design.md,
# "Bulk backfill").
RSS_ABOVE_BUDGET_MIB=400
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT

# backfill NAME INPUT CONFIG: runs simtide, leaves its summary in $work/NAME.out and sets
# WALL (s), RSS (KiB), PAIRS (rating pairs stored), UPDATES (pair updates/s while applying),
# WRITTEN (bytes the process wrote to its filesystem).
backfill() {
  local name=$1 input=$2 outputs
  printf '%s\n' "$3" > "$work/$name.toml"
  /usr/bin/time -o "$work/$name.time" -f '%e %M %O' "$BIN" backfill --quiet --store "$work/$name" \
    --config "$work/$name.toml" --input "$input" > "$work/$name.out" 2> "$work/$name.log"
  read -r WALL RSS outputs < "$work/$name.time"
  WRITTEN=$((outputs * 512))
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
  echo "  disk: $(awk -v b="$bytes" -v p="$PAIRS" 'BEGIN { printf "%.1f", b / p }') bytes of store per rating pair (pairs, histories and logs; 42.8 on MovieLens exact before row blocks) ($bytes bytes, $PAIRS pairs stored); $WRITTEN bytes written by the run; largest write-ahead log ${wal:-0} bytes"
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
for setting in defaults exact; do
  if [ "$setting" = exact ]; then
    conf=$'[similarity]\nrecenter_tolerance = 0.0\nmax_items_per_user = 0\nmin_common_users = 1\nrating_min = 0.5'
    named="recenter_tolerance 0, max_items_per_user 0, min_common_users 1, rating_min 0.5"
  else
    conf=$'[similarity]\nrating_min = 0.5'
    named="rating_min 0.5 (half stars)"
  fi
  backfill "ml-$setting" "$ML" "$conf"
  ref=$(scipy "$ML")
  echo "movielens $setting ($named): seconds ours $WALL (parse, aggregate, persist, every top-50), reference $ref (scipy matrices, load excluded), ratio $(ratio "$WALL" "$ref"), target 1.0; peak RSS ${RSS} KiB"
  disk "ml-$setting"
done

echo
echo "== wide catalogue: 1 million ratings, 30,000 items, 20,000 users, defaults"
backfill wide "$WIDE" ''
ref=$(scipy "$WIDE")
echo "wide: seconds ours $WALL, reference $ref (scipy matrices), ratio $(ratio "$WALL" "$ref"), target 1.0; pair updates/s ours $UPDATES, target 10000000, ratio $(ratio "$UPDATES" 10000000); peak RSS ${RSS} KiB"
disk wide

echo
echo "== narrow power-law set, 5 million ratings, 3,000 items, defaults, at two memory budgets"
ref=$(scipy "$BIG")
for budget in 256MiB 4GiB; do
  backfill "pl-$budget" "$BIG" $'[backfill]\nmemory_budget = "'"$budget"'"'
  segments=$(awk '/batches/ {print $4; exit}' "$work/pl-$budget.out")
  case $budget in
    *MiB) budget_kib=$(( ${budget%MiB} * 1024 )) ;;
    *GiB) budget_kib=$(( ${budget%GiB} * 1024 * 1024 )) ;;
  esac
  bound_kib=$((budget_kib + RSS_ABOVE_BUDGET_MIB * 1024))
  echo "powerlaw budget $budget: seconds ours $WALL, reference $ref (scipy matrices), ratio $(ratio "$WALL" "$ref"); pair updates/s ours $UPDATES, target 10000000, ratio $(ratio "$UPDATES" 10000000); $segments segment(s); peak RSS ${RSS} KiB, bound ${bound_kib} KiB (budget + ${RSS_ABOVE_BUDGET_MIB} MiB), ratio $(ratio "$RSS" "$bound_kib")"
  disk "pl-$budget"
  lists "pl-$budget"
  if [ "$RSS" -gt "$bound_kib" ]; then
    echo "  peak RSS above the budget plus ${RSS_ABOVE_BUDGET_MIB} MiB" && exit 1
  fi
done
if cmp -s "$work/pl-256MiB.lists" "$work/pl-4GiB.lists"; then
  echo "  the two budgets published identical lists ($(wc -l < "$work/pl-4GiB.lists") lists)"
else
  echo "  the two budgets published DIFFERENT lists" && exit 1
fi
