"""Decode benchmark: tokens/s and state bytes of the step path vs context length, batch 1 and 64.

Models: the presets' global attention, local attention (window 128), recurrence and 2:1 hybrid
(see ``blockyard/bench/decode.py``). Prints a table and issue 19's batch-1 ratios (models timed
round-robin); ``--json`` and ``--plot`` write the figures.

    .venv/bin/python scripts/bench_decode.py [--contexts 128,512,1024,2048,4096] [--batches 1,64]
        [--models global,local,recurrence,hybrid] [--reps 8] [--rounds 3] [--max-state-mib 512]
        [--json runs/bench/decode.json] [--plot runs/bench/decode.png] [--threads 1]
"""

from __future__ import annotations

import argparse
import sys

from blockyard.bench.decode import MODELS, bench_decode_command
from blockyard.errors import UserError


def int_list(text: str) -> list[int]:
    try:
        return [int(v) for v in text.split(",") if v.strip()]
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected comma-separated integers, got {text!r}") from None


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--models", default=",".join(MODELS), help=f"comma separated, of: {', '.join(MODELS)}")
    p.add_argument("--contexts", type=int_list, default=[128, 512, 1024, 2048, 4096], help="context lengths")
    p.add_argument("--batches", type=int_list, default=[1, 64], help="batch sizes")
    p.add_argument("--reps", type=int, default=8, help="timed steps per point and round (median)")
    p.add_argument("--rounds", type=int, default=3,
                   help="round-robin rounds over the models at each point (median of rounds)")
    p.add_argument("--max-state-mib", type=float, default=512.0, help="skip points whose state exceeds this")
    p.add_argument("--threads", type=int, default=1,
                   help="torch threads (default 1: one decode step is too small to share, and on a busy machine "
                        "more threads wait on each other; 0 = torch's default)")
    p.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
                   help="config override applied to every model (e.g. model.depth=2)")
    p.add_argument("--json", default=None, help="write the rows as JSON here")
    p.add_argument("--plot", default=None, help="write a PNG of tokens/s and state bytes vs context here")
    args = p.parse_args(argv)
    try:
        print(bench_decode_command(models=[m for m in args.models.split(",") if m], contexts=args.contexts,
                                   batches=args.batches, reps=args.reps, rounds=args.rounds,
                                   max_state_mib=args.max_state_mib,
                                   json_path=args.json, plot_path=args.plot, overrides=args.overrides,
                                   echo=lambda line: print(line, file=sys.stderr, flush=True), threads=args.threads))
    except UserError as e:
        print(f"error: {e}", file=sys.stderr)
        return e.exit_code
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
