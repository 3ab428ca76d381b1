#!/usr/bin/env bash
# slopecast quick start: installs the Debian 12 packages that are missing,
# configures and builds (Release), then either runs the demo or the tests.
#
#   bash .ci/quickstart.sh demo [BENCH]  # daemon + simulated camera + 10 s live view
#                                        # BENCH: a folder of fixtures/ (harrow_vale)
#   bash .ci/quickstart.sh test          # the whole test suite through ctest
#
# Run as root, or as a user with sudo (only apt-get is run through sudo).
set -euo pipefail
cd "$(dirname "$0")/.."

mode="${1:-}"
bench="${2:-harrow_vale}"
if [[ "$mode" != demo && "$mode" != test ]]; then
  echo "usage: bash .ci/quickstart.sh demo [BENCH] | test" >&2
  exit 2
fi
if [[ "$mode" == demo && ! -f "fixtures/$bench/slopecastd.toml" ]]; then
  echo "no bench '$bench': expected fixtures/$bench/slopecastd.toml" >&2
  exit 2
fi

# Everything comes from Debian 12; nothing is downloaded at build time.
packages=(
  g++ make cmake pkg-config
  libzmq3-dev cppzmq-dev libprotobuf-dev protobuf-compiler
  libeigen3-dev catch2 libbenchmark-dev
  libopencv-core-dev libopencv-imgproc-dev libopencv-imgcodecs-dev
  libcfitsio-dev libspdlog-dev libfmt-dev libcli11-dev libtoml11-dev zlib1g-dev
  nlohmann-json3-dev libssl-dev gnuplot-nox
)
# Test mode only: the tests read our FITS files with an independent
# implementation (astropy), run the Python client (client/python: zmq,
# protobuf, numpy, which its users install too), and the fuzzers
# (.ci/fuzz.sh) need clang and its libFuzzer runtime.
if [[ "$mode" == test ]]; then packages+=(python3-astropy python3-zmq python3-protobuf python3-numpy clang libclang-rt-14-dev); fi
missing=()
for p in "${packages[@]}"; do
  dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q "install ok installed" || missing+=("$p")
done
if ((${#missing[@]})); then
  sudo=()
  if [[ "$(id -u)" -ne 0 ]]; then sudo=(sudo); fi
  echo "== installing ${#missing[@]} Debian package(s): ${missing[*]}"
  "${sudo[@]}" apt-get update
  "${sudo[@]}" env DEBIAN_FRONTEND=noninteractive apt-get install -y --no-install-recommends "${missing[@]}"
fi

jobs="$(nproc)"
echo "== configuring and building (build/)"
cmake -S . -B build -DCMAKE_BUILD_TYPE=Release
cmake --build build -j"$jobs"

if [[ "$mode" == test ]]; then
  echo "== running the tests"
  exec ctest --test-dir build --output-on-failure -j"$jobs"
fi

# ---- demo: an invented bench, its camera simulated -------------------------
bin=build
demo=build/demo/$bench
mkdir -p "$demo"
cp "fixtures/$bench/slopecastd.toml" "$demo/"
config="$demo/slopecastd.toml"
read -r -a sim_args <"fixtures/$bench/sim.args"
pids=()
cleanup() { for p in "${pids[@]}"; do kill "$p" 2>/dev/null || true; done; wait 2>/dev/null || true; }
trap cleanup EXIT

dark=$(sed -n 's/^dark_frame *= *"\(.*\)".*/\1/p' "$config")
if [[ -n "$dark" ]]; then
  echo "== acquiring a simulated dark (mean of 100 frames)"
  "$bin/client/cli/slopecast" sim --config "$config" --write-dark "$demo/$dark" --dark-frames 100
fi
"$bin/daemon/app/slopecastd" --check-config "$config"

echo "== starting slopecastd (log: $demo/slopecastd.log)"
"$bin/daemon/app/slopecastd" --config "$config" >"$demo/slopecastd.log" 2>&1 &
daemon_pid=$!
pids+=("$daemon_pid")
if ! "$bin/client/cli/slopecast" status --config "$config" --wait-s 10 >/dev/null; then
  echo "slopecastd did not come up; its log says:" >&2
  cat "$demo/slopecastd.log" >&2
  exit 1
fi

if [[ -f "fixtures/$bench/calibrate.sh" ]]; then
  # The bench calibrates the running daemon first (its own script says how).
  # shellcheck source=/dev/null
  source "fixtures/$bench/calibrate.sh"
fi

echo "== starting the simulated camera, geometry from $config (log: $demo/sim.log)"
"$bin/client/cli/slopecast" sim --config "$config" "${sim_args[@]}" >"$demo/sim.log" 2>&1 &
pids+=("$!")

echo "== live view for 10 s"
"$bin/client/cli/slopecast" watch --config "$config" --duration-s 10 --idle-timeout-s 8
echo "== the daemon's own view"
"$bin/client/cli/slopecast" status --config "$config"
kill -TERM "$daemon_pid"
wait "$daemon_pid" && echo "== slopecastd stopped cleanly"

if [[ -f "fixtures/$bench/evaluate.sh" ]]; then
  # The bench's own evaluation (its script says what it scores).
  # shellcheck source=/dev/null
  source "fixtures/$bench/evaluate.sh"
fi
