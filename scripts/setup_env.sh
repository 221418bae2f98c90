#!/usr/bin/env bash
# Create or reuse .venv in the repository root and install tightfit into it.
# Usage: scripts/setup_env.sh [test]   ("test" adds pytest, hypothesis, torchvision and the
# Fashion-MNIST files from Debian's dataset-fashion-mnist package).
set -euo pipefail
cd "$(dirname "$0")/.."
want_test="${1:-}"
PY="${PYTHON:-python3}"

if [ ! -x .venv/bin/python ]; then
    echo "[setup] creating .venv with $($PY --version)"
    "$PY" -m venv .venv
fi
stamp=".venv/.tightfit-installed-$(sha256sum pyproject.toml | cut -c1-12)${want_test:+-test}"
if [ ! -f "$stamp" ]; then
    echo "[setup] installing tightfit and its dependencies into .venv (first time: a few minutes)"
    .venv/bin/python -m pip install -q --upgrade pip
    # torch and torchvision pinned together: these wheels are known to work as a pair.
    .venv/bin/python -m pip install -q "torch==2.14.1" "torchvision==0.29.1"
    if [ -n "$want_test" ]; then
        .venv/bin/python -m pip install -q -e ".[test]"
    else
        .venv/bin/python -m pip install -q -e .
    fi
    touch "$stamp"
fi

if [ -n "$want_test" ] && [ ! -f /usr/share/datasets/fashion-mnist/train-images-idx3-ubyte.gz ]; then
    echo "[setup] installing Debian package dataset-fashion-mnist (for the Fashion-MNIST tests)"
    SUDO=""; [ "$(id -u)" -ne 0 ] && SUDO="sudo"
    $SUDO apt-get update -qq && $SUDO apt-get install -y -qq dataset-fashion-mnist >/dev/null \
        || echo "[setup] warning: could not install dataset-fashion-mnist; Fashion-MNIST tests will be skipped"
fi
