"""Speed benchmark: blockyard configs beside a hand-written PyTorch loop and this machine's peaks.

The same as ``blockyard bench`` (see ``blockyard/bench/speed.py``); prints ratios measured side by side.

    .venv/bin/python scripts/bench.py [--steps 30] [--rounds 2] [--quality] [--json out.json]
"""

from __future__ import annotations

import sys

from blockyard.cli import main

if __name__ == "__main__":
    raise SystemExit(main(["bench", *sys.argv[1:]]))
