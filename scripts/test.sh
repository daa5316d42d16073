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
ctest --output-on-failure -j "${CREDENCE_TEST_JOBS:-2}" "$@"
