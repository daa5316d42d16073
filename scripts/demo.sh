#!/usr/bin/env bash
# The Credence demo: installs what is missing, builds, writes the invented
# Thimbleford Goods export, fits it, shows offline answers, then serves the
# model on http://127.0.0.1:${CREDENCE_PORT:-8080} until Ctrl-C.
# Set CREDENCE_DEMO_NO_SERVE=1 to stop after the offline part.
set -euo pipefail
root="$(cd "$(dirname "$0")/.." && pwd)"
"$root/scripts/setup.sh"
"$root/scripts/build.sh"
bin="${CREDENCE_BUILD_DIR:-$root/build}/credence"
work="$root/demo-data"
port="${CREDENCE_PORT:-8080}"

echo; echo "== 1. The shop's ratings export"
"$bin" demo-data --out-dir "$work"
head -4 "$work/ratings.csv"

echo; echo "== 2. Fit (Gibbs sampling; rejected rows go to a rejects file, nothing is dropped silently)"
"$bin" fit --ratings "$work/ratings.csv" --catalogue "$work/catalogue.csv" --scale 1:5 --out "$work/shop.posterior" --rank 8 --holdout 0.1 --seed 7

echo; echo "== 3. What the file holds"
"$bin" inspect "$work/shop.posterior"

echo; echo "== 4. One prediction with its uncertainty"
"$bin" predict --model "$work/shop.posterior" --user c-00042 --item tea-0001

echo; echo "== 5. Top 5 for customer c-00042: by mean, and cautiously by the lower bound"
"$bin" recommend --model "$work/shop.posterior" --user c-00042 -n 5
"$bin" recommend --model "$work/shop.posterior" --user c-00042 -n 5 --rank-by lower

if [[ "${CREDENCE_DEMO_NO_SERVE:-0}" == 1 ]]; then exit 0; fi
if "$bin" serve --help >/dev/null 2>&1; then
  echo; echo "== 6. Serving on http://127.0.0.1:$port  (try: curl 'http://127.0.0.1:$port/v1/users/c-00042/recommendations?n=5&rank_by=lower')"
  exec "$bin" serve --model "$work/shop.posterior" --port "$port"
fi
