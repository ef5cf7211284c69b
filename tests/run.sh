#!/usr/bin/env bash
# The project's test command: makes sure the Python reference libraries, the Debian
# tools some tests drive (chromium, systemd-analyze, shellcheck) and the build tools of
# the HiGHS solver (cmake, libclang-dev) are present, then runs every Rust test of the workspace (unit, integration, end-to-end) and prints the time
# of each stage.
set -euo pipefail
cd "$(dirname "$0")/.."
if ! python3 -c "import numpy, scipy, mpmath, onnx, onnxruntime, kubernetes" 2>/dev/null; then
  echo "installing the Python reference libraries (tests/requirements.txt)"
  python3 -m pip install --quiet --disable-pip-version-check -r tests/requirements.txt
fi
if ! command -v chromium >/dev/null || ! command -v systemd-analyze >/dev/null || ! command -v shellcheck >/dev/null \
  || ! command -v cmake >/dev/null || ! ls /usr/lib/llvm-*/lib/libclang*.so >/dev/null 2>&1; then
  if [ "$(id -u)" = 0 ] && command -v apt-get >/dev/null; then
    echo "installing Debian packages the tests drive (deploy/ci-packages.txt)"
    DEBIAN_FRONTEND=noninteractive apt-get update -qq
    # shellcheck disable=SC2046
    DEBIAN_FRONTEND=noninteractive apt-get install -y -qq $(cat deploy/ci-packages.txt) >/dev/null
  else
    echo "missing: install Debian's $(tr '\n' ' ' < deploy/ci-packages.txt)(the browser and deployment tests and the HiGHS build need them)" >&2
  fi
fi
# Build everything first (the end-to-end tests start the workspace's binaries), then run
# every test binary in one cargo invocation (one feature resolution, so nothing is built
# twice) and print the time of the build and of each package's tests.
map=$(mktemp)
trap 'rm -f "$map"' EXIT
t0=$SECONDS
# `cargo test` builds a package's binaries only for its own tests; the end-to-end tests
# start every binary (the `tessera` command of tessera-cli too).
cargo build --workspace --bins
cargo test --workspace --no-run --message-format=json-render-diagnostics | python3 tests/stage_times.py map "$map"
build_s=$((SECONDS - t0))
t0=$SECONDS
status=0
cargo test --workspace "$@" 2>&1 | python3 tests/stage_times.py sum "$map" || status=$?
echo "build $build_s s, tests $((SECONDS - t0)) s (wall clock)"
exit "$status"
