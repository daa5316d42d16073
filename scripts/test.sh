#!/usr/bin/env bash
# Installs what is missing, builds, and runs every test (ctest).
# Tests that need the open ratings dataset in ../shared/datasets/ skip with a
# notice when it is absent.
set -euo pipefail
root="$(cd "$(dirname "$0")/.." && pwd)"
"$root/scripts/setup.sh"
"$root/scripts/build.sh"
build="${CREDENCE_BUILD_DIR:-$root/build}"
cd "$build"
dataset="$root/../shared/datasets/movielens-latest-small/ratings.csv"
if [[ ! -f "${CREDENCE_DATASET:-$dataset}" ]]; then
  echo "NOTICE: open dataset not found at $dataset: the real-data checks will be skipped (CI has it)"
fi
ctest --output-on-failure -j "${CREDENCE_TEST_JOBS:-2}" "$@"
