#!/usr/bin/env bash
# Create .venv (once) and install the project into it.
# torch==2.13.0 (the CPU build) goes in first, so that the project's torch range is already
# satisfied and pip never pulls a multi-GB CUDA build.
set -euo pipefail
cd "$(dirname "$0")/.."
PY=${PYTHON:-python3}
if [ ! -x .venv/bin/python ]; then
    echo "setup: creating .venv" >&2
    "$PY" -m venv .venv
fi
stamp=.venv/.blockyard-installed
log=.venv/setup.log
pip_install() {
    if ! .venv/bin/python -m pip install -q "$@" >>"$log" 2>&1; then
        grep -v "^WARNING: Location" "$log" | tail -n 20 >&2
        echo "setup: pip install $* failed (full log: $log)" >&2
        exit 1
    fi
}
if [ ! -f "$stamp" ] || [ pyproject.toml -nt "$stamp" ]; then
    echo "setup: installing torch==2.13.0 (CPU) and the project into .venv (a few minutes the first time)" >&2
    : >"$log"
    pip_install --upgrade pip
    pip_install "torch==2.13.0"
    pip_install -e ".[dev,ray]"
    .venv/bin/python -c "import torch, blockyard; assert torch.__version__.startswith('2.13.0'), torch.__version__"
    touch "$stamp"
fi
