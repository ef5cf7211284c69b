#!/usr/bin/env bash
# The project's test command: makes sure the Python reference libraries, the Debian
# tools some tests drive (chromium, systemd-analyze, shellcheck) and the build tools of
# the HiGHS solver (cmake, libclang-dev) are present, then runs every Rust test of the
# workspace (unit, integration, end-to-end).
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
exec cargo test --workspace "$@"
