#!/usr/bin/env bash
# Set up .venv if needed, then run the embedded default ablation grid on the `plays` corpus
# (fetched on first use) and write its report under runs/grids/default/.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh
exec .venv/bin/blockyard grid configs/grids/default.yaml "$@"
