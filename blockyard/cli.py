"""The ``blockyard`` command: argparse subcommands, each parsing, calling one function, printing.

User errors (``blockyard.errors.UserError``) are caught once here: one line ``error: ...`` on
stderr, exit code 2 (4 for a file that cannot be written: ``WriteFailed``), no traceback. Each
subcommand has an ``_add_<name>`` function that declares its arguments and a ``_cmd_<name>``
function that runs it; heavy imports happen inside the latter so that ``--help`` stays fast.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable
from typing import Any

from blockyard.errors import UserError


class _Parser(argparse.ArgumentParser):
    """argparse, but bad arguments exit 2 with one line (argparse prints usage first otherwise)."""

    def error(self, message: str) -> None:  # type: ignore[override]
        self.exit(2, f"error: {self.prog}: {message}\n")


# ----------------------------------------------------------------------------- train


def _add_train(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("train", help="train one model from a config file", description=(
        "Train one model. Rerunning the same command on an interrupted run dir resumes it; "
        "a finished run dir is left alone unless --force. One process writes a run dir at a time. Ctrl-C or "
        "SIGTERM finishes the current step and writes a checkpoint. Exit codes: 0 done (or already done), "
        "2 bad config or input, or another process is writing the run dir, 3 diverged, 4 a file could not be "
        "written (disk full, quota, read-only, permission, I/O error; rerun to resume once fixed), "
        "130 / 143 stopped by SIGINT / SIGTERM."))
    p.add_argument("config", help="YAML config file")
    p.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
                   help="override a config key (dotted path, value parsed as YAML); repeatable")
    p.add_argument("--out", default=None, help="run dir (default: runs/<config name>/<config hash>)")
    p.add_argument("--force", action="store_true", help="retrain a finished dir or replace a dir of another config")
    p.add_argument("--no-check", dest="check", action="store_false",
                   help="skip the mixer contract gate on plugin mixers (env.json records that it was skipped)")
    p.add_argument("--wait", type=float, default=0.0, metavar="SECONDS",
                   help="if another process is writing the run dir, wait up to this long for it to end "
                        "(default 0: refuse at once, exit 2)")
    p.set_defaults(func=_cmd_train)


def _cmd_train(args: argparse.Namespace) -> int:
    from blockyard.config import load_config
    from blockyard.eval.probes import make_eval_hook
    from blockyard.train import train_from_cli

    if args.wait < 0:
        raise UserError(f"--wait {args.wait:g}: must be >= 0 seconds")
    cfg = load_config(args.config, args.overrides)
    return train_from_cli(cfg, out=args.out, force=args.force, check=args.check, wait_s=args.wait,
                          eval_hook_builders=[make_eval_hook])  # eval.probes plug into the trainer from above


# ----------------------------------------------------------------------------- blocks


def _add_blocks(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("blocks", help="list the block catalogue, or summarise the model a config builds")
    p.add_argument("configs", nargs="*", help="config files (none: list the registered mixer kinds)")
    p.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
                   help="override a config key; repeatable")
    p.add_argument("--plot", default=None, metavar="PNG", help="write state bytes vs context length for the configs")
    p.set_defaults(func=_cmd_blocks)


def _cmd_blocks(args: argparse.Namespace) -> int:
    from blockyard.cost.analytic import blocks_command

    print(blocks_command(args.configs, args.overrides, plot=args.plot))
    return 0


# ----------------------------------------------------------------------------- grid


def _add_grid(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("grid", help="run an ablation grid (variants x axes x seeds), resumable; then report",
                       description=(
        "Train every cell of a grid file as an ordinary run dir under GRID_DIR/cells/, recording them in "
        "GRID_DIR/index.sqlite, then write GRID_DIR/report.md. Rerunning resumes: finished cells are skipped, "
        "interrupted ones resume from their checkpoints. Exit code 0: every cell finished (done or diverged); "
        "1: some cells failed; 2: bad input, or another grid process runs this grid; 4: a grid file (index, "
        "config, report) could not be written; 130: stopped by a signal."))
    p.add_argument("grid", nargs="?", help="grid YAML file")
    p.add_argument("--out", default=None, help="grid dir (default: runs/grids/<grid name>)")
    p.add_argument("--workers", type=int, default=None, help="cells trained at once (default: cores / threads)")
    p.add_argument("--threads", type=int, default=None,
                   help="torch threads per cell (default: cores / workers, at least 1; a grid keeps its first value)")
    p.add_argument("--executor", default="local", choices=("local", "ray"), help="local processes or Ray tasks")
    p.add_argument("--address", default=None, help="Ray cluster address HOST:PORT (default: a local Ray instance)")
    p.add_argument("--dry-run", action="store_true",
                   help="list the cells, params, FLOPs and estimated time, and plan the budget: the smallest "
                        "effect the worst case decides, the seeds and time smallest_effect needs; train nothing")
    p.add_argument("--noise-from", metavar="GRID_DIR", default=None,
                   help="with --dry-run: plan with the paired sd measured in an earlier grid dir of similar models "
                        "(its comparisons' final evaluations, pooled); without it the plan assumes 0.030 nats/token, "
                        "the default grid's measured sd, and says so")
    p.add_argument("--force", action="store_true",
                   help="run a changed spec in an existing grid dir (changed cells are moved to superseded/)")
    p.add_argument("--status", metavar="GRID_DIR", default=None, help="print the progress of a grid and exit")
    p.add_argument("--keys", action="store_true",
                   help="list the keys a grid file may hold, with their defaults and meaning, and exit")
    p.add_argument("--no-check", dest="check", action="store_false",
                   help="skip the mixer contract gate on plugin mixers, here and in every cell")
    p.set_defaults(func=_cmd_grid)


def _cmd_grid(args: argparse.Namespace) -> int:
    if args.keys:
        from blockyard.grid.spec import grid_keys_text

        print(grid_keys_text())
        return 0
    if args.status:
        if args.grid:
            raise UserError("--status GRID_DIR takes no grid file")
        from blockyard.grid.status import status_text

        print(status_text(args.status))
        return 0
    if not args.grid:
        raise UserError("grid: give a grid YAML file (or --status GRID_DIR, or --keys)")
    from blockyard.grid.run import run_grid

    return run_grid(args.grid, out=args.out, workers=args.workers, threads=args.threads, executor=args.executor,
                    address=args.address, force=args.force, dry_run=args.dry_run, check=args.check,
                    echo=lambda line: print(line, flush=True), noise_from=args.noise_from)


# ----------------------------------------------------------------------------- report


def _add_report(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("report", help="(re)write a grid's report: report.md, report.html, results.csv, plots")
    p.add_argument("grid_dir", help="a grid dir (holds index.sqlite)")
    p.set_defaults(func=_cmd_report)


def _cmd_report(args: argparse.Namespace) -> int:
    from blockyard.grid.report import write_report

    print(f"wrote {write_report(args.grid_dir)}")
    return 0


# ----------------------------------------------------------------------------- corpus


def _add_corpus(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("corpus", help="list the corpus sources, or fetch one into the cache")
    p.add_argument("action", choices=("list", "fetch"), help="list: sources, licenses, sizes; fetch: cache NAME")
    p.add_argument("name", nargs="?", default=None, help="fetch: plays, pydoc or hub:NAME[:CONFIG]")
    p.add_argument("--cache-dir", default="", help="cache folder (default: $BLOCKYARD_CACHE or ~/.cache/blockyard)")
    p.set_defaults(func=_cmd_corpus)


def _cmd_corpus(args: argparse.Namespace) -> int:
    from blockyard.data.sources import cache_root, fetch_corpus, list_corpora

    root = cache_root(args.cache_dir)
    if args.action == "list":
        if args.name is not None:
            raise UserError("corpus list: takes no NAME")
        print(list_corpora(root))
        return 0
    if args.name is None:
        raise UserError("corpus fetch: give a NAME (plays, pydoc or hub:NAME[:CONFIG])")
    print(fetch_corpus(args.name, root))
    return 0


# ----------------------------------------------------------------------------- bench


def _add_bench(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("bench", help="time the trainer against a plain PyTorch loop and this machine's peaks",
                       description=("Speed benchmark: tokens/s of blockyard configs beside a hand-written PyTorch "
                                    "loop, GEMM and copy peaks, the scan, and a profile of one step; prints "
                                    "ratios. Memory: scripts/bench_memory.py."))
    p.add_argument("--steps", type=int, default=30, help="training steps per timed run (default 30)")
    p.add_argument("--warmup", type=int, default=10, help="untimed steps at the start of each run (default 10)")
    p.add_argument("--rounds", type=int, default=2, help="interleaved repetitions; ratios are their median")
    p.add_argument("--threads", type=int, default=0,
                   help="torch threads for every measurement, both loops alike (default 0 = every core)")
    p.add_argument("--no-profile", dest="profile", action="store_false", help="skip the torch.profiler step")
    p.add_argument("--cases", default=None, metavar="NAMES",
                   help="comma-separated configs to time (default: all; e.g. recurrence-fp32,attention-fp32 to "
                        "re-measure one ratio with more --rounds); their plain-loop twins come along")
    p.add_argument("--pairs", type=int, default=None,
                   help="alternated step pairs per ratio (recurrence/attention, bf16/fp32, compiled/eager, "
                        "trainer/plain), whose median and 95%% interval the targets read (default 16; 0 = skip)")
    p.add_argument("--quality", action="store_true",
                   help="also train fp32 and bf16 (bf16_emulated where the CPU has no bf16 units) for "
                        "--quality-steps and compare the val loss")
    p.add_argument("--quality-steps", type=int, default=300, help="steps of the --quality runs (default 300)")
    p.add_argument("--quality-seeds", type=int, default=None,
                   help="seeds of the --quality runs; the target is on the mean paired difference (default 6)")
    p.add_argument("--quality-lr", type=float, default=None, metavar="LR",
                   help="peak learning rate of the --quality runs (default 1e-3: at 3e-3 rounding alone moves "
                        "the 300-step loss by several %%, see blockyard/bench/quality.py)")
    p.add_argument("--json", default=None, metavar="PATH", help="also write every figure as JSON here")
    p.add_argument("--decode", action="store_true",
                   help="instead: decode tokens/s and state bytes of the step path vs context, batch 1 and 64 "
                        "(blockyard/bench/decode.py; with --json, also a PNG beside it)")
    p.set_defaults(func=_cmd_bench)


def _given(**options: Any) -> dict[str, Any]:
    """The options the user set (not None): the rest keep the defaults of the function they go to.
    (Values come from argparse, untyped: the function they go to states their types.)"""
    return {key: value for key, value in options.items() if value is not None}


def _cmd_bench(args: argparse.Namespace) -> int:
    if args.decode:
        from pathlib import Path

        from blockyard.bench.decode import bench_decode_command

        plot = None if args.json is None else str(Path(args.json).with_suffix(".png"))
        print(bench_decode_command(json_path=args.json, plot_path=plot))
        return 0
    from blockyard.bench.command import bench_command

    print(bench_command(steps=args.steps, warmup=args.warmup, rounds=args.rounds, profile=args.profile,
                        quality=args.quality, quality_steps=args.quality_steps,
                        json_path=args.json, **_given(quality_seeds=args.quality_seeds, quality_lr=args.quality_lr),
                        threads=args.threads, cases=args.cases, **_given(pairs=args.pairs)))
    return 0


# ----------------------------------------------------------------------------- sample


def _add_sample(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("sample", help="generate text from a trained run through the mixers' step path",
                       description=("Load RUN_DIR's config and newest checkpoint, step the prompt through the "
                                    "model token by token and sample a continuation; prints prompt + continuation."))
    p.add_argument("run_dir", help="a run dir written by `blockyard train`")
    p.add_argument("--prompt", required=True, help="text to continue (encoded by the run's tokenizer)")
    p.add_argument("--tokens", type=int, default=200, help="tokens to generate (default 200)")
    p.add_argument("--temperature", type=float, default=1.0, help="softmax temperature; 0 = argmax (default 1)")
    p.add_argument("--top-k", type=int, default=0, help="sample among the k most likely tokens (0 = all)")
    p.add_argument("--seed", type=int, default=0, help="sampling seed (default 0): same seed, same text")
    p.add_argument("--threads", type=int, default=1, help="torch threads (default 1; 0 = torch's default)")
    p.set_defaults(func=_cmd_sample)


def _cmd_sample(args: argparse.Namespace) -> int:
    from blockyard.eval.generate import sample_command

    print(sample_command(args.run_dir, args.prompt, args.tokens, temperature=args.temperature, top_k=args.top_k,
                         seed=args.seed, threads=args.threads))
    return 0


# ----------------------------------------------------------------------------- eval


def _add_eval(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("eval", help="length extrapolation and probes of a trained run (writes RUN_DIR/eval.json)",
                       description=("Validation loss at multiples of the training context, per position bucket, "
                                    "and/or the probe suite, for RUN_DIR's newest checkpoint."))
    p.add_argument("run_dir", help="a run dir written by `blockyard train`")
    p.add_argument("--lengths", default="1x,2x,4x,8x",
                   help="multiples of the training seq_len (2x) or token counts (512), comma separated; "
                        "'' = none (default 1x,2x,4x,8x)")
    p.add_argument("--buckets", type=int, default=8, help="position buckets per window (default 8)")
    p.add_argument("--probes", default="", help="probes to run, comma separated: mqar, passkey (default none)")
    p.set_defaults(func=_cmd_eval)


def _cmd_eval(args: argparse.Namespace) -> int:
    from blockyard.eval.extrapolation import eval_command

    print(eval_command(args.run_dir, args.lengths, buckets=args.buckets, probes=args.probes))
    return 0


# ----------------------------------------------------------------------------- check


def _add_check(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("check", help="run the mixer contract on a plugin file or a config's mixers and model",
                       description=(
        "Causality (first leaking position), step == forward (largest difference), finite gradients, "
        "determinism, batch-first states never changed in place, and the cost formulas against counted "
        "parameters and measured state. Exit code 0: every check passes; 1: a check fails; 2: bad input."))
    p.add_argument("target", help="a plugin .py file, or a config YAML file")
    p.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
                   help="override a config key; repeatable")
    p.set_defaults(func=_cmd_check)


def _cmd_check(args: argparse.Namespace) -> int:
    from blockyard.check import check_command

    text, code = check_command(args.target, args.overrides)
    print(text)
    return code


# ----------------------------------------------------------------------------- verify


def _add_verify(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("verify", help="check a run dir's or grid dir's checkpoints, plugin copies and token caches "
                       "against their recorded sha256", description=(
        "Read-only: each checkpoint, plugin copy and token-cache file under PATH against the sha256 its folder "
        "recorded when it was written (sha256.json). Each file is ok, DAMAGED or unverifiable (written before "
        "checksums). Exit code 0: nothing is damaged; 1: a file is damaged; 2: bad input."))
    p.add_argument("path", help="a run dir, a grid dir, a token cache, or a folder holding them")
    p.set_defaults(func=_cmd_verify)


def _cmd_verify(args: argparse.Namespace) -> int:
    from blockyard.verify import verify_command

    text, code = verify_command(args.path)
    print(text)
    return code


# ----------------------------------------------------------------------------- registry

_SUBCOMMANDS: list[Callable[[argparse._SubParsersAction], None]] = [_add_train, _add_blocks]
_SUBCOMMANDS += [_add_grid, _add_report]
_SUBCOMMANDS += [_add_corpus]
_SUBCOMMANDS += [_add_bench]
_SUBCOMMANDS += [_add_sample, _add_eval]
_SUBCOMMANDS += [_add_check]
_SUBCOMMANDS += [_add_verify]


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="blockyard", description=(
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
