#!/usr/bin/env bash
# Installing slopecast, two ways, into temporary places (nothing touches the
# machine's own /usr):
#   1. `cmake --install` into a prefix, then a small project of someone
#      else's (tests/consumer) configures with find_package(slopecast),
#      builds and runs against it;
#   2. the Debian package: cpack -G DEB, the .deb unpacked with dpkg-deb -x
#      into a root, and slopecastd --help, slopecast --help and the Python
#      package run from there.
#
#   package_test.sh SOURCE_DIR BUILD_DIR
set -euo pipefail
src="$1"
build="$2"
work="$(mktemp -d)"
trap 'rm -rf "$work"' EXIT

echo "== cmake --install into $work/prefix"
cmake --install "$build" --prefix "$work/prefix" >"$work/install.log"
echo "== a consumer project with find_package(slopecast)"
cmake -S "$src/tests/consumer" -B "$work/consumer" -DCMAKE_PREFIX_PATH="$work/prefix" -DCMAKE_BUILD_TYPE=Release \
  >"$work/consumer-configure.log" || { cat "$work/consumer-configure.log"; exit 1; }
cmake --build "$work/consumer" -j2 >"$work/consumer-build.log" || { cat "$work/consumer-build.log"; exit 1; }
"$work/consumer/consumer" "ipc://$work/frames" "ipc://$work/control"

echo "== the Debian package"
(cd "$work" && cpack -G DEB --config "$build/CPackConfig.cmake" -B "$work/deb" >"$work/cpack.log") ||
  { cat "$work/cpack.log"; exit 1; }
deb="$(ls "$work"/deb/slopecast_*.deb)"
# (grep -q on a here-string: in a pipe it may close early and, with
# pipefail, fail the writer with SIGPIPE.)
grep -q "Depends: libzmq5" <<<"$(dpkg-deb --info "$deb")"
dpkg-deb -x "$deb" "$work/root"
for f in usr/bin/slopecastd usr/bin/slopecast usr/lib/systemd/system/slopecastd@.service \
         usr/share/slopecast/examples/harrow_vale.toml usr/lib/python3/dist-packages/slopecast/__init__.py \
         usr/lib/python3/dist-packages/slopecast/v1/measurement_pb2.py usr/lib/cmake/slopecast/slopecastConfig.cmake \
         usr/share/doc/slopecast/wire_reference.md; do
  [[ -e "$work/root/$f" ]] || { echo "missing from the .deb: $f"; exit 1; }
done
grep -q "Config file (TOML)" <<<"$("$work/root/usr/bin/slopecastd" --help)"
grep -q "record" <<<"$("$work/root/usr/bin/slopecast" --help)"
# The wire reference, generated from the .proto comments, with them in it.
grep -q "Spot displacement from the subaperture" "$work/root/usr/share/doc/slopecast/wire_reference.md"
grep -q "^### message FrameHeader" "$work/root/usr/share/doc/slopecast/wire_reference.md"
"$work/root/usr/bin/slopecastd" --check-config "$work/root/usr/share/slopecast/examples/service.toml" >/dev/null
PYTHONPATH="$work/root/usr/lib/python3/dist-packages" /usr/bin/python3 -c \
  "import slopecast; from slopecast.v1 import measurement_pb2; print('python package from the .deb:', slopecast.__name__)"
echo "package test passed: $(basename "$deb")"
