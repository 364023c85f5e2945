#!/usr/bin/env bash
# Backfill benchmark: simtide against numpy/scipy computing the same similarity matrix
# from the same file, on the MovieLens snapshot and on a generated 5-million-rating power-law set.
# Prints wall time, events/s, pair updates/s and peak RSS. Run through `make bench`.
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

run() { # name input config-toml
  local name=$1 input=$2
  printf '%s\n' "$3" > "$work/$name.toml"
  echo "== $name: simtide backfill ($(wc -l < "$input") lines, config: $(tr '\n' ' ' < "$work/$name.toml"))"
  /usr/bin/time -f 'peak RSS %M KiB, wall %e s' "$BIN" backfill --quiet --store "$work/$name" \
    --config "$work/$name.toml" --input "$input" 2>&1 | sed 's/^/  /'
  du -sh "$work/$name/db" | sed 's/^/  store size /'
  echo "== $name: numpy/scipy, same file"
  /usr/bin/time -f 'peak RSS %M KiB, wall %e s' "$PY" scripts/oracle_similarity.py time-ratings --events "$input" 2>&1 | sed 's/^/  /'
}

run movielens-exact "$CACHE/datasets/movielens.csv" $'[similarity]\nrecenter_tolerance = 0.0\nmax_items_per_user = 0\nmin_common_users = 1\nrating_min = 0.5\n[backfill]\nbatch_events = 100004'
run movielens-defaults "$CACHE/datasets/movielens.csv" $'[similarity]\nrating_min = 0.5\n[backfill]\nbatch_events = 100004'
run powerlaw-5m "$BIG" $'[backfill]\nbatch_events = 500000'
