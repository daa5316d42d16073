#!/usr/bin/env bash
# Configures and builds Credence (Release) into build/ (or $CREDENCE_BUILD_DIR).
#   scripts/build.sh                              everything: the program, tests, benchmarks
#   scripts/build.sh --target credence --quiet    only the program and its man pages, with one
#                                                 progress line instead of the build log
# --target may be given more than once; other arguments go to the cmake configure step
# (e.g. -DCREDENCE_NATIVE=ON). With --quiet the log is kept in BUILD/build.log and its
# last lines are shown if the build fails.
set -euo pipefail
root="$(cd "$(dirname "$0")/.." && pwd)"
build="${CREDENCE_BUILD_DIR:-$root/build}"
targets=()
quiet=0
configure_args=()
while (($# > 0)); do
  case "$1" in
    --target) targets+=(--target "$2"); shift 2 ;;
    --quiet) quiet=1; shift ;;
    *) configure_args+=("$1"); shift ;;
  esac
done

cmake -S "$root" -B "$build" -DCMAKE_BUILD_TYPE="${CMAKE_BUILD_TYPE:-Release}" "${configure_args[@]}" >/dev/null
if ((quiet == 0)); then
  exec cmake --build "$build" -j "$(nproc)" "${targets[@]}"
fi

# Quiet: the build runs in the background into build.log; the make progress
# ("[ 42%]") is redrawn on one line when stdout is a terminal.
what="${targets[*]:-everything}"
what="${what//--target /}"
log="$build/build.log"
start=$SECONDS
cmake --build "$build" -j "$(nproc)" "${targets[@]}" >"$log" 2>&1 &
pid=$!
trap 'kill "$pid" 2>/dev/null || true' INT TERM
if [[ -t 1 ]]; then
  while kill -0 "$pid" 2>/dev/null; do
    percent="$(grep -o '^\[ *[0-9]*%\]' "$log" 2>/dev/null | tail -1 | tr -dc '0-9' || true)"
    printf '\rbuilding %s: %3s%%  %3d s ' "$what" "${percent:-0}" $((SECONDS - start))
    sleep 1
  done
  printf '\r%*s\r' 60 ''
else
  echo "building $what (log: $log)"
fi
if ! wait "$pid"; then
  echo "build of $what failed after $((SECONDS - start)) s; the end of $log:"
  tail -n 40 "$log"
  exit 1
fi
echo "built $what in $((SECONDS - start)) s ($(nproc) cores)"
