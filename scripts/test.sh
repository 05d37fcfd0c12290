#!/usr/bin/env bash
# Set up .venv if needed, then run the tests.
#   bash scripts/test.sh          the fast tier: every module, no end-to-end runs, child processes,
#                                 kills, grids or lessons (tests marked `slow`); a few minutes on 2 cores
#   bash scripts/test.sh --full   everything (what CI runs), with the 25 slowest tests listed
# Extra arguments go to pytest, e.g. `bash scripts/test.sh tests/test_config.py -x`.
set -euo pipefail
cd "$(dirname "$0")/.."
tier=(-m "not slow")
if [[ "${1:-}" == "--full" ]]; then
    tier=(--durations=25)
    shift
fi
bash scripts/setup.sh
exec .venv/bin/python -m pytest -q "${tier[@]}" "$@"
