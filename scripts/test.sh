#!/usr/bin/env bash
# Set up .venv if needed, then run the whole test suite (slow training checks included).
# Extra arguments go to pytest, e.g. `bash scripts/test.sh -m "not slow"`.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh
exec .venv/bin/python -m pytest -q "$@"
