#!/usr/bin/env bash
# The project's test command: makes sure the Python reference libraries are present,
# then runs every Rust test of the workspace (unit, integration, end-to-end).
set -euo pipefail
cd "$(dirname "$0")/.."
if ! python3 -c "import numpy, scipy, mpmath, onnx, onnxruntime, kubernetes" 2>/dev/null; then
  echo "installing the Python reference libraries (tests/requirements.txt)"
  python3 -m pip install --quiet -r tests/requirements.txt
fi
exec cargo test --workspace "$@"
