#!/usr/bin/env bash
# The Credence demo: installs what the program needs (Debian 12; not the test
# tools), builds only the program, writes the invented Thimbleford Goods
# export, fits it, shows offline answers, prints the commands to go on with,
# then serves the model on http://127.0.0.1:${CREDENCE_PORT:-8080} until Ctrl-C.
# Set CREDENCE_DEMO_NO_SERVE=1 to stop after the offline part.
set -euo pipefail
root="$(cd "$(dirname "$0")/.." && pwd)"
build="${CREDENCE_BUILD_DIR:-$root/build}"
export CREDENCE_BUILD_DIR="$build"
started=$SECONDS

CREDENCE_SETUP_EXTRAS=0 "$root/scripts/setup.sh"
"$root/scripts/build.sh" --target credence --quiet
bin="$build/credence"
work="$root/demo-data"
port="${CREDENCE_PORT:-8080}"

# How to name a path in the commands printed below: relative to the folder
# the demo was started from when it lies inside it.
here="$PWD"
shown() { if [[ "$1" == "$here"/* ]]; then echo "${1#"$here"/}"; else echo "$1"; fi; }
b="$(shown "$bin")"
m="$(shown "$work/shop.posterior")"

# From here on the commands are the ones README.md shows (and its test runs):
# `credence` is the program just built, paths are relative to the source tree.
cd "$root"
credence() { "$bin" "$@"; }

echo; echo "== 1. The shop's ratings export"
credence demo-data --out-dir demo-data
head -4 demo-data/ratings.csv

echo; echo "== 2. Fit: choose the rank from the ratings, then sample until converged (Gibbs sampling; rejected rows go to a rejects file, nothing is dropped silently)"
credence fit --ratings demo-data/ratings.csv --catalogue demo-data/catalogue.csv --scale 1:5 --out demo-data/shop.posterior --holdout 0.1 --seed 7

echo; echo "== 3. What the file holds"
credence inspect demo-data/shop.posterior

echo; echo "== 4. One prediction with its uncertainty"
credence predict --model demo-data/shop.posterior --user c-00042 --item tea-0001

echo; echo "== 5. Top 5 for customer c-00042: by mean, and cautiously by the lower bound"
credence recommend --model demo-data/shop.posterior --user c-00042 -n 5
credence recommend --model demo-data/shop.posterior --user c-00042 -n 5 --rank-by lower

version="$("$bin" --version | head -1 | cut -d' ' -f2)"
deb="credence_${version}_$(dpkg --print-architecture).deb"
next() { printf '  %-70s # %s\n' "$1" "$2"; }
echo
echo "== Demo done in $((SECONDS - started)) s. The program is $b (not on your PATH yet). Next:"
next "$b report $m -o $(shown "$work/report.html")" "the model report, one HTML file"
next "$b --help" "every subcommand; then $b fit --help, ..."
next "$b serve --model $m --port $port" "the HTTP service (the demo starts it next)"
next "curl -s 'http://127.0.0.1:$port/v1/users/c-00042/recommendations?n=5'" "ask it, from another terminal"
echo "  Install it for everyone (program, man pages, example config, systemd unit):"
next "sudo cmake --install $(shown "$build")" "into /usr/local; then: man credence-fit"
next "(cd $(shown "$build") && cpack -G DEB) && sudo apt-get install ./$(shown "$build")/$deb" "or as a Debian package"
next "scripts/test.sh" "the test suite (installs the test tools, builds the tests)"

if [[ "${CREDENCE_DEMO_NO_SERVE:-0}" == 1 ]]; then exit 0; fi
echo; echo "== 6. Serving on http://127.0.0.1:$port (Ctrl-C stops it; open that address in a browser for the console, or use the curl line above)"
exec "$bin" serve --model demo-data/shop.posterior --port "$port"
