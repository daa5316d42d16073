#!/usr/bin/env bash
# Installs what Credence needs to build, test and demo, from Debian 12
# packages. Idempotent: installs only what is missing. Needs root or sudo.
set -euo pipefail

packages=(
  build-essential cmake pkg-config git ca-certificates curl
  libeigen3-dev          # dense linear algebra for the sampler
  libcpp-httplib-dev     # HTTP server
  nlohmann-json3-dev     # JSON in and out
  libspdlog-dev libfmt-dev  # logging and formatting
  catch2                 # tests (v2)
  libcli11-dev           # command-line parsing
  libtomlplusplus-dev    # config file
  libxxhash-dev          # checksums and data fingerprints
  libomp-dev             # OpenMP (GCC's libgomp comes with g++)
  help2man               # man pages, written from --help at build time
  file                   # cpack -G DEB: finds the programs whose libraries become Depends
  libssl-dev             # OpenSSL: cpp-httplib's TLS client in the exposed-deployment test
  libsqlite3-dev         # --ratings sqlite:PATH
  libpq-dev              # --ratings postgresql://... (libpq)
)
# Only the tests and benchmarks need these (scipy is the outside reference for
# distribution checks; chromium renders the report, and with chromium-driver
# and python3-selenium drives the console test; wrk drives the serve bench;
# nginx and openssl run the exposed deployment with a certificate made in the
# test; clang builds the libFuzzer targets of scripts/fuzz; lintian checks
# the Debian package; prometheus brings promtool, which checks the example
# alert rules; sqlite3 and postgresql (initdb, pg_ctl) give the
# database-source tests a real SQLite file and a PostgreSQL server of their
# own).
if [[ "${CREDENCE_SETUP_EXTRAS:-1}" == 1 ]]; then
  packages+=(wrk chromium chromium-driver python3 python3-selenium python3-scipy python3-numpy nginx openssl clang libclang-rt-dev lintian prometheus sqlite3 postgresql)
fi

missing=()
for p in "${packages[@]}"; do
  dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q "install ok installed" || missing+=("$p")
done
if ((${#missing[@]} == 0)); then
  echo "setup: all ${#packages[@]} packages present"
  exit 0
fi
# apt's and dpkg's own output goes to a log (hundreds of lines on a fresh
# machine); the terminal gets one line, and the log's end when it fails.
root="$(cd "$(dirname "$0")/.." && pwd)"
log_dir="${CREDENCE_BUILD_DIR:-$root/build}"
mkdir -p "$log_dir"
log="$log_dir/setup.log"
echo "setup: installing ${#missing[@]} Debian packages (${missing[*]}); log: $log"
sudo_cmd=()
if [[ $(id -u) != 0 ]]; then sudo_cmd=(sudo); fi
export DEBIAN_FRONTEND=noninteractive
started_s=$SECONDS
if ! { "${sudo_cmd[@]}" apt-get update -qq && \
       "${sudo_cmd[@]}" apt-get install -y -qq --no-install-recommends "${missing[@]}"; } >"$log" 2>&1; then
  echo "setup: apt-get failed; the end of $log:" >&2
  tail -n 20 "$log" >&2
  exit 1
fi
echo "setup: installed in $((SECONDS - started_s)) s"
