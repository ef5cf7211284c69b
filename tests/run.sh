#!/usr/bin/env bash
# The project's test command: makes sure the Python reference libraries and the Debian
# tools some tests drive (chromium, systemd-analyze, shellcheck) are present, then runs
# every Rust test of the workspace (unit, integration, end-to-end), one package per
# stage, and prints each stage's time.
set -euo pipefail
cd "$(dirname "$0")/.."
if ! python3 -c "import numpy, scipy, mpmath, onnx, onnxruntime, kubernetes" 2>/dev/null; then
  echo "installing the Python reference libraries (tests/requirements.txt)"
  python3 -m pip install --quiet --disable-pip-version-check -r tests/requirements.txt
fi
if ! command -v chromium >/dev/null || ! command -v systemd-analyze >/dev/null || ! command -v shellcheck >/dev/null; then
  if [ "$(id -u)" = 0 ] && command -v apt-get >/dev/null; then
    echo "installing Debian packages the tests drive (deploy/ci-packages.txt)"
    DEBIAN_FRONTEND=noninteractive apt-get update -qq
    # shellcheck disable=SC2046
    DEBIAN_FRONTEND=noninteractive apt-get install -y -qq $(cat deploy/ci-packages.txt) >/dev/null
  else
    echo "missing: install Debian's $(tr '\n' ' ' < deploy/ci-packages.txt)(the browser and deployment tests need them)" >&2
  fi
fi
# Build everything first (the end-to-end tests start the workspace's binaries), then
# test one package at a time and print how long each stage took.
stage_times=()
failed=0
run_stage() {
  local name=$1; shift
  local t0=$SECONDS
  echo "== stage: $name"
  if "$@"; then status=ok; else status=FAILED; failed=1; fi
  stage_times+=("$(printf '%-24s %5d s  %s' "$name" $((SECONDS - t0)) "$status")")
}
run_stage build cargo test --workspace --no-run "$@"
if [ "$failed" = 0 ]; then
  for pkg in $(cargo metadata --no-deps --format-version 1 | python3 -c 'import json, sys; print(" ".join(p["name"] for p in json.load(sys.stdin)["packages"]))'); do
    run_stage "$pkg" cargo test -p "$pkg" "$@"
  done
fi
echo "== stage times"
printf '%s\n' "${stage_times[@]}"
exit "$failed"
