"""``blockyard check`` and the gate in front of training: the mixer contract on a user's own blocks.

``check FILE.py`` runs every contract check (``blockyard/mixers/contract.py``) on each mixer the
plugin file registers, at width ``CHECK_WIDTH`` with its option defaults; ``check CONFIG.yaml``
runs them on every mixer the config's pattern uses, at the config's width and options, and the
causality / step / gradient / determinism checks on the whole assembled model. Exit code 0 when
every check passes, 1 when one fails, 2 for bad input.

The gate (:func:`gate`) is the fast part (causality and step == forward, at ``GATE_SEQ_LEN``
tokens) on the plugin mixers of a config; ``train`` and ``grid`` call it before the first step
and refuse a mixer that fails it, naming the check and its figure. A warning row (an unmarked
output projection) fails nothing: ``check`` shows it, ``train`` says in one line what the mark
would change.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

from blockyard.config import Config, MixerConfig, config_from_dict, load_config
from blockyard.errors import UserError
from blockyard.mixers import MIXERS
from blockyard.mixers.base import PLUGIN_MODULE_PREFIX
from blockyard.mixers.contract import FAST_CHECKS, CheckResult, is_token_local, mixer_contract, model_contract
from blockyard.mixers.plugins import load_plugin
from blockyard.text import aligned_table

# Width at which a bare plugin file's mixers are checked (the contract tests' width).
CHECK_WIDTH = 32
# Vocabulary of the model built to check a config (the contract does not depend on it; the
# config's own vocabulary may need a prepared corpus to know).
CHECK_VOCAB = 64
# Tokens per sequence in the gate: enough for every position to be tried, seconds at most.
GATE_SEQ_LEN = 16
# In env.json's mixer_check: the plugin kinds that declare themselves token-local (the report marks them).
TOKEN_LOCAL_MARK = "token-local on purpose"
# What env.json records when the gate was skipped.
SKIPPED = "skipped (--no-check)"

Row = tuple[str, CheckResult]


def is_plugin_kind(kind: str) -> bool:
    return MIXERS[kind].__module__.startswith(PLUGIN_MODULE_PREFIX)


def pattern_mixers(cfg: Config) -> dict[str, MixerConfig]:
    """The named mixers the model's pattern uses (each once), in pattern order."""
    return {name: mcfg for name, mcfg in cfg.model.layer_mixers()}


def plugin_file(kind: str) -> str:
    import sys

    return str(getattr(sys.modules.get(MIXERS[kind].__module__), "__file__", "?"))


# ----------------------------------------------------------------------------- the gate


def gate(cfg: Config, note: Callable[[str], None] | None = None) -> str:
    """Run the fast checks on ``cfg``'s plugin mixers; raise UserError on the first failure.

    ``note`` hears one line per warning (an unmarked output projection: what the mark would change).
    Returns what ``env.json`` records (``mixer_check``).
    """
    checked = []
    for name, mcfg in pattern_mixers(cfg).items():
        if not is_plugin_kind(mcfg.kind):
            continue
        results = mixer_contract(MIXERS[mcfg.kind], cfg.model.width, mcfg.options, seq_len=GATE_SEQ_LEN,
                                 checks=(*FAST_CHECKS, "residual_out"))
        who = f"model.mixers.{name} (kind {mcfg.kind} from {plugin_file(mcfg.kind)})"
        for r in results:
            if not r.passed:
                raise UserError(f"{who} fails the mixer contract: {r.check}: {r.figure}; `blockyard check` lists "
                                "every check, --no-check trains anyway")
            if r.warning and note is not None:
                note(f"{who}: {r.check}: {r.figure}")
        checked.append(mcfg.kind)
    if not checked:
        return "no plugin mixers"
    kinds = list(dict.fromkeys(checked))
    local = [k for k in kinds if is_token_local(MIXERS[k])]
    return (f"passed ({', '.join(FAST_CHECKS)}) for {', '.join(kinds)}"
            + (f"; {TOKEN_LOCAL_MARK}: {', '.join(local)}" if local else ""))


def gate_many(cfgs: list[Config]) -> None:
    """The gate over several configs (a grid's cells), each distinct plugin mixer config once."""
    seen: set[tuple] = set()
    for cfg in cfgs:
        key = (cfg.model.width, tuple((n, m.kind, repr(m.options)) for n, m in pattern_mixers(cfg).items()
                                      if is_plugin_kind(m.kind)))
        if key[1] and key not in seen:
            seen.add(key)
            gate(cfg)


# ----------------------------------------------------------------------------- the command


def plugin_rows(path: Path) -> list[Row]:
    """Every check on each mixer the plugin file registers, at ``CHECK_WIDTH`` with default options."""
    rows: list[Row] = []
    for cls in load_plugin(path):
        cfg = config_from_dict({"plugins": [str(path)],
                                "model": {"width": CHECK_WIDTH, "depth": 1, "pattern": [cls.kind]}})
        options = cfg.model.mixers[cls.kind].options
        rows += [(cls.kind, r) for r in mixer_contract(cls, CHECK_WIDTH, options)]
    return rows


def config_rows(cfg: Config) -> list[Row]:
    """Every check on each mixer of the pattern, then the model checks on the assembled model."""
    import torch

    from blockyard.model import build_model

    rows: list[Row] = []
    for name, mcfg in pattern_mixers(cfg).items():
        label = name if name == mcfg.kind else f"{name} ({mcfg.kind})"
        rows += [(label, r) for r in mixer_contract(MIXERS[mcfg.kind], cfg.model.width, mcfg.options)]
    torch.manual_seed(cfg.train.seed)
    model = build_model(cfg.model, CHECK_VOCAB)
    rows += [("model", r) for r in model_contract(model, CHECK_VOCAB, seq_len=min(cfg.data.seq_len, 32))]
    return rows


def format_rows(rows: list[Row]) -> str:
    header = ["mixer", "check", "result", "measured"]
    table = [[who, r.check, r.status, r.figure] for who, r in rows]
    lines = aligned_table(header, table).splitlines()
    failed = [f"{who} {r.check}" for who, r in rows if r.passed is False]
    warned = sum(r.warning for _, r in rows)
    lines.append("")
    lines.append(f"{len(failed)} of {len(rows)} checks FAIL: {', '.join(failed)}" if failed
                 else f"all {len(rows)} checks pass ({sum(r.passed is None for _, r in rows)} n/a, "
                 f"{warned} with a warning)")
    return "\n".join(lines)


def check_command(target: str, overrides: list[str]) -> tuple[str, int]:
    """``blockyard check FILE``: the table, and exit code 0 (all pass) or 1 (a check fails)."""
    path = Path(target)
    if not path.is_file():
        raise UserError(f"check: {target}: no such file (give a plugin .py file or a config .yaml)")
    if path.suffix == ".py":
        if overrides:
            raise UserError("check: --set applies to a config file, not to a plugin file")
        rows = plugin_rows(path.resolve())
        title = f"{path}: the mixer contract at width {CHECK_WIDTH}, default options"
    else:
        cfg = load_config(path, overrides)
        rows = config_rows(cfg)
        title = f"{path}: the mixer contract on each mixer at width {cfg.model.width}, and on the assembled model"
    failed = any(r.passed is False for _, r in rows)
    return f"{title}\n\n{format_rows(rows)}", 1 if failed else 0
