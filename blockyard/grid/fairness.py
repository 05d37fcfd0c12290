"""What a cell costs (parameters, FLOPs per token, token budget) and how variants are made comparable.

``match: params`` changes each non-reference variant's ``model.mlp_expansion`` (its MLP hidden
size, a whole number of units) so that its non-embedding parameter count lands within
``MATCH_TOLERANCE`` (2%) of the reference's at the same axis point. ``match: flops`` changes each
non-reference variant's token budget (``train.tokens``) so that flops_per_token x tokens equals
the reference's training FLOPs.
Either way the adjusted value and the resulting params / FLOPs are reported.

A ladder's ``tokens_per_param`` sets every cell's ``train.tokens`` at a rung from the reference's
non-embedding parameters there (``apply_budgets``), before any matching.

Parameters and FLOPs per token are the cost model's analytic counts (``blockyard.cost.analytic``,
checked against built models by ``tests/test_cost.py``): no model is built.
"""

from __future__ import annotations

import bisect
import dataclasses
import math
from typing import Any

from blockyard.config import Config
from blockyard.errors import UserError
from blockyard.grid import ladder as ladders
from blockyard.grid.spec import MATCHED_KEYS, Cell, GridSpec, config_with

# Non-embedding parameter counts of matched variants must be this close to the reference's (relative).
MATCH_TOLERANCE = 0.02


def vocab_size(cfg: Config) -> int:
    """The vocabulary the data layer derives from ``cfg.data``."""
    from blockyard.data import vocab_size_for  # here, not above: the data layer imports torch

    return int(vocab_size_for(cfg))


def count_params(cfg: Config) -> dict[str, int]:
    """``{total, non_embedding}`` from the cost model's analytic counts (``blockyard.cost``).

    No model is built: the grid's parent process stays small while its workers train (building
    one, even on the meta device, kept ~70-135 MB resident here). ``tests/test_cost.py`` checks
    the analytic counts against built models; a mixer without the ``param_count`` hook is built
    for real instead.
    """
    from blockyard.cost.analytic import param_breakdown

    vocab = vocab_size(cfg)
    try:
        groups = param_breakdown(cfg, vocab)
    except NotImplementedError:
        from blockyard.model import build_model

        groups = build_model(cfg.model, vocab).param_groups()
    return {"total": int(groups["total"]), "non_embedding": int(groups["non_embedding"])}


def tokens_per_step(cfg: Config) -> int:
    return cfg.train.batch_size * cfg.train.grad_accum * cfg.data.seq_len


def planned_steps(cfg: Config) -> int:
    """Optimizer steps the trainer will take: ceil(train.tokens / tokens per step), or train.steps."""
    if cfg.train.tokens > 0:
        return math.ceil(cfg.train.tokens / tokens_per_step(cfg))
    return cfg.train.steps


def planned_tokens(cfg: Config) -> int:
    """Training tokens the trainer will see (whole steps)."""
    return planned_steps(cfg) * tokens_per_step(cfg)


@dataclasses.dataclass(frozen=True)
class CellCost:
    """Static cost of one cell, as the report and the dry run show it."""

    params_total: int
    params_non_embedding: int
    flops_per_token: float
    tokens: int

    @property
    def train_flops(self) -> float:
        return self.flops_per_token * self.tokens


def cell_cost(cfg: Config) -> CellCost:
    from blockyard.cost.analytic import flops_per_token  # here, not above: the cost model imports torch

    params = count_params(cfg)
    return CellCost(params["total"], params["non_embedding"], flops_per_token(cfg), planned_tokens(cfg))


# ----------------------------------------------------------------------------- ladder budgets


def apply_budgets(spec: GridSpec, cells: list[Cell]) -> list[Cell]:
    """Cells with each rung's token budget set (``tokens_per_param``); checks that the rungs grow and the target.

    The budget of a rung is the reference's (the only group's, without variants) non-embedding
    parameters there x ``tokens_per_param``, the same for every variant at that rung.
    """
    if spec.ladder is None:
        return cells
    reference = spec.reference or spec.groups[0]
    ref_n = {c.point: count_params(c.cfg)["non_embedding"] for c in cells if c.variant == reference and
             c.seed == spec.seeds[0]}
    ladders.check_sizes(spec.ladder, ref_n)
    if spec.ladder.tokens_per_param is None:
        return cells
    out = []
    for cell in cells:
        overrides = {**cell.overrides, ladders.BUDGET_KEY: ladders.budget(spec.ladder, ref_n[cell.point])}
        out.append(dataclasses.replace(cell, overrides=overrides, cfg=config_with(spec.base, overrides)))
    return out


# ----------------------------------------------------------------------------- matching


def _non_embedding_at_hidden(base: dict[str, Any], overrides: dict[str, Any], width: int, hidden: int) -> int:
    cfg = config_with(base, {**overrides, "model.mlp_expansion": hidden / width})
    return count_params(cfg)["non_embedding"]


def match_params_hidden(base: dict[str, Any], overrides: dict[str, Any], width: int, target: int, who: str) -> int:
    """The MLP hidden size whose non-embedding count is closest to ``target`` (bisection; monotone in it).

    Raises a UserError when even the closest is off by more than MATCH_TOLERANCE (e.g. the variant
    without any MLP already has more parameters than the reference).
    """
    def count(hidden: int) -> int:
        return _non_embedding_at_hidden(base, overrides, width, hidden)

    hi = max(2, width)
    while count(hi) < target:
        hi *= 2
        if hi > 1_000_000 * width:
            raise UserError(f"match: params: {who} cannot reach {target:,d} non-embedding parameters")
    # Smallest hidden in [1, hi] with count >= target, then pick the closer of it and its predecessor.
    lo = bisect.bisect_left(range(hi + 1), target, lo=1, key=count)
    best = min((h for h in (lo - 1, lo) if h >= 1), key=lambda h: abs(count(h) - target))
    got = count(best)
    if abs(got - target) > MATCH_TOLERANCE * target:
        raise UserError(
            f"match: params: {who} has {got:,d} non-embedding parameters at the smallest workable MLP "
            f"(model.mlp_expansion = {best / width:g}), more than {MATCH_TOLERANCE:.0%} from the reference's "
            f"{target:,d}; "
            "it cannot be matched by the MLP width (the expansion would have to go to zero or below)"
        )
    return best


def apply_matching(spec: GridSpec, cells: list[Cell]) -> list[Cell]:
    """Cells with the fairness adjustments of ``spec.match`` applied (the reference is untouched)."""
    if spec.match == "none":
        return cells
    refs = {(c.point, c.seed): c for c in cells if c.variant == spec.reference}
    ref_cost: dict[tuple, CellCost] = {}
    solved: dict[tuple[str, tuple], dict[str, Any]] = {}
    out = []
    for cell in cells:
        if cell.variant == spec.reference:
            out.append(cell)
            continue
        ref = refs[(cell.point, cell.seed)]
        key = (cell.variant, cell.point)
        if key not in solved:
            if ref.point not in ref_cost:
                ref_cost[ref.point] = cell_cost(ref.cfg)
            solved[key] = _solve(spec, cell, ref_cost[ref.point])
        adjustments = solved[key]
        cfg = config_with(spec.base, {**cell.overrides, **adjustments})
        out.append(dataclasses.replace(cell, cfg=cfg, adjustments=adjustments))
    return out


def _solve(spec: GridSpec, cell: Cell, ref: CellCost) -> dict[str, Any]:
    who = f"variant {cell.variant}" + (f" at {cell.point_label}" if cell.point else "")
    if spec.match == "params":
        width = cell.cfg.model.width
        hidden = match_params_hidden(spec.base, cell.overrides, width, ref.params_non_embedding, who)
        return {MATCHED_KEYS["params"]: hidden / width}
    from blockyard.cost.analytic import flops_per_token

    return {MATCHED_KEYS["flops"]: max(1, round(ref.train_flops / flops_per_token(cell.cfg)))}
