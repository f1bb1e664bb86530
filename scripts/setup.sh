#!/usr/bin/env bash
# Create (or reuse) .venv and install explore with its test, cluster (Ray) and fast (ONNX Runtime) extras.
set -euo pipefail
cd "$(dirname "$0")/.."
PYTHON="${PYTHON:-python3}"
if [ ! -x .venv/bin/python ]; then
    "$PYTHON" -m venv .venv
    .venv/bin/python -m pip install --quiet --upgrade pip
fi
.venv/bin/python -m pip install --quiet -e ".[test,cluster,fast]"
