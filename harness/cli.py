"""The ``harness`` command: argparse subcommands, each parsing, calling one function, printing.

User errors (``harness.errors.UserError``) are caught once here: one line ``error: ...`` on
stderr, exit code 2, no traceback. Each subcommand has an ``_add_<name>`` function that declares
its arguments and a ``_cmd_<name>`` function that runs it; heavy imports happen inside the
latter so that ``--help`` stays fast.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable

from harness.errors import UserError


class _Parser(argparse.ArgumentParser):
    """argparse, but bad arguments exit 2 with one line (argparse prints usage first otherwise)."""

    def error(self, message: str) -> None:  # type: ignore[override]
        self.exit(2, f"error: {self.prog}: {message}\n")


# ----------------------------------------------------------------------------- train


def _add_train(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("train", help="train one model from a config file", description=(
        "Train one model. Rerunning the same command on an interrupted run dir resumes it; "
        "a finished run dir is left alone unless --force."))
    p.add_argument("config", help="YAML config file")
    p.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
                   help="override a config key (dotted path, value parsed as YAML); repeatable")
    p.add_argument("--out", default=None, help="run dir (default: runs/<config name>/<config hash>)")
    p.add_argument("--force", action="store_true", help="retrain a finished dir or replace a dir of another config")
    p.set_defaults(func=_cmd_train)


def _cmd_train(args: argparse.Namespace) -> int:
    from harness.config import load_config
    from harness.train import train_from_cli

    cfg = load_config(args.config, args.overrides)
    return train_from_cli(cfg, out=args.out, force=args.force)


# ----------------------------------------------------------------------------- blocks


def _add_blocks(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("blocks", help="list the mixer zoo, or summarise the model a config builds")
    p.add_argument("configs", nargs="*", help="config files (none: list the registered mixer kinds)")
    p.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
                   help="override a config key; repeatable")
    p.add_argument("--plot", default=None, metavar="PNG", help="write state bytes vs context length for the configs")
    p.set_defaults(func=_cmd_blocks)


def _cmd_blocks(args: argparse.Namespace) -> int:
    from harness.cost import blocks_command

    print(blocks_command(args.configs, args.overrides, plot=args.plot))
    return 0


# ----------------------------------------------------------------------------- grid


def _add_grid(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("grid", help="run an ablation grid (variants x axes x seeds), resumable; then report",
                       description=(
        "Train every cell of a grid file as an ordinary run dir under GRID_DIR/cells/, recording them in "
        "GRID_DIR/index.sqlite, then write GRID_DIR/report.md. Rerunning resumes: finished cells are skipped, "
        "interrupted ones resume from their checkpoints."))
    p.add_argument("grid", nargs="?", help="grid YAML file")
    p.add_argument("--out", default=None, help="grid dir (default: runs/grids/<grid name>)")
    p.add_argument("--workers", type=int, default=None, help="cells trained at once (default: cores / threads)")
    p.add_argument("--threads", type=int, default=None,
                   help="torch threads per cell (default: cores / workers, at least 1; a grid keeps its first value)")
    p.add_argument("--executor", default="local", choices=("local", "ray"), help="local processes or Ray tasks")
    p.add_argument("--address", default=None, help="Ray cluster address HOST:PORT (default: a local Ray instance)")
    p.add_argument("--dry-run", action="store_true",
                   help="list the cells, params, FLOPs and estimated time; train nothing")
    p.add_argument("--force", action="store_true",
                   help="run a changed spec in an existing grid dir (changed cells are moved to superseded/)")
    p.add_argument("--status", metavar="GRID_DIR", default=None, help="print the progress of a grid and exit")
    p.set_defaults(func=_cmd_grid)


def _cmd_grid(args: argparse.Namespace) -> int:
    if args.status:
        if args.grid:
            raise UserError("--status GRID_DIR takes no grid file")
        from harness.grid.status import status_text

        print(status_text(args.status))
        return 0
    if not args.grid:
        raise UserError("grid: give a grid YAML file (or --status GRID_DIR)")
    from harness.grid.run import run_grid

    return run_grid(args.grid, out=args.out, workers=args.workers, threads=args.threads, executor=args.executor,
                    address=args.address, force=args.force, dry_run=args.dry_run,
                    echo=lambda line: print(line, flush=True))


# ----------------------------------------------------------------------------- report


def _add_report(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("report", help="(re)write a grid's report: report.md, report.html, results.csv, plots")
    p.add_argument("grid_dir", help="a grid dir (holds index.sqlite)")
    p.set_defaults(func=_cmd_report)


def _cmd_report(args: argparse.Namespace) -> int:
    from harness.grid.report import write_report

    print(f"wrote {write_report(args.grid_dir)}")
    return 0


# ----------------------------------------------------------------------------- registry

_SUBCOMMANDS: list[Callable[[argparse._SubParsersAction], None]] = [_add_train, _add_blocks]
_SUBCOMMANDS += [_add_grid, _add_report]


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="harness", description=(
        "Train tiny language models built from interchangeable temporal-mixing blocks on a CPU, "
        "and turn grids of runs into verdicts with error bars."))
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND", parser_class=_Parser)
    for add in _SUBCOMMANDS:
        add(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except UserError as e:
        print(f"error: {e}", file=sys.stderr)
        return e.exit_code
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    raise SystemExit(main())
