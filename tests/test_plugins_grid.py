"""A grid whose base config carries a plugin: the gate, the copies every cell loads, parameter matching.

The Ray half (the same grid on the loopback Ray cluster) is in tests/test_grid_ray.py.
"""

from __future__ import annotations

import json
import textwrap
from pathlib import Path

import pytest
import yaml
from conftest import LEAKY, LINEAR_ATTENTION

from blockyard.errors import UserError
from blockyard.grid.fairness import MATCH_TOLERANCE
from blockyard.grid.index import open_index
from blockyard.grid.plan import plan_cells
from blockyard.grid.run import run_grid
from blockyard.grid.spec import load_grid
from blockyard.model import build_model

PLUGIN_GRID = """
name: plugin-pair
base:
  plugins: [{plugin}]
  model: {{width: 32, depth: 1, pattern: [global_attention], mlp_expansion: 2.0,
           mixers: {{mine: {{kind: {kind}}}}}}}
  data: {{corpus: pydoc, seq_len: 32}}
  train: {{steps: 6, batch_size: 4, eval_every: 6, eval_windows: 2, log_every: 3, warmup_steps: 1,
           checkpoint_every: 6}}
variants:
  softmax: {{{softmax}}}
  mine: {{model.pattern: [mine]}}
reference: softmax
seeds: [0]
{extra}
"""


def plugin_grid(folder: Path, plugin: Path, kind: str, extra: str = "", softmax: str = "") -> Path:
    """A two-cell grid file in ``folder`` with a copy of ``plugin`` beside it (named relative to the grid)."""
    folder.mkdir(parents=True, exist_ok=True)
    (folder / plugin.name).write_text(plugin.read_text())
    spec = folder / "grid.yaml"
    spec.write_text(textwrap.dedent(PLUGIN_GRID.format(plugin=plugin.name, kind=kind, extra=extra, softmax=softmax)))
    return spec


@pytest.mark.slow
def test_grid_with_a_plugin_runs_every_cell_from_the_grid_copy(tmp_path):
    spec = plugin_grid(tmp_path / "spec", LINEAR_ATTENTION, "linear_attention")
    lines: list[str] = []
    assert run_grid(spec, out=tmp_path / "out", workers=2, threads=1, echo=lines.append) == 0, lines
    grid = tmp_path / "out"
    assert (grid / "plugins" / LINEAR_ATTENTION.name).read_bytes() == LINEAR_ATTENTION.read_bytes()
    cell_cfg = yaml.safe_load((grid / "configs" / "mine-seed0.yaml").read_text())
    assert cell_cfg["plugins"] == [f"../plugins/{LINEAR_ATTENTION.name}"]
    run = grid / "cells" / "mine-seed0"
    assert (run / "plugins" / LINEAR_ATTENTION.name).exists()
    env = json.loads((run / "env.json").read_text())
    assert env["mixer_check"] == "passed (causality, mixes_in_time, step) for linear_attention"
    with open_index(grid, readonly=True) as index:
        assert {c["id"]: c["status"] for c in index.cells()} == {"softmax-seed0": "done", "mine-seed0": "done"}
    assert "linear_attention: extra_flops_per_token" in (grid / "report.md").read_text()  # measured, and said so


def test_grid_refuses_a_leaking_plugin_before_writing_anything(tmp_path):
    spec = plugin_grid(tmp_path / "spec", LEAKY, "leaky_linear_attention")
    with pytest.raises(UserError, match="model.mixers.mine .* fails the mixer contract: causality: output 0"):
        run_grid(spec, out=tmp_path / "out", workers=1, threads=1, echo=lambda _: None)
    assert not (tmp_path / "out").exists()


def test_parameter_matching_counts_a_plugin_without_formulas(tmp_path):
    # The leaky example gives no param_count: the cost model counts a built module, so matching works.
    spec = plugin_grid(tmp_path / "spec", LEAKY, "leaky_linear_attention", extra="match: params",
                       softmax="model.mlp_expansion: 3.0")
    plan = {p.id: p for p in plan_cells(load_grid(spec), threads=1)}
    ref, mine = plan["softmax-seed0"], plan["mine-seed0"]
    assert mine.cell.adjustments  # the MLP width was changed to match
    built = build_model(mine.cell.cfg.model, 256).param_groups()["non_embedding"]
    assert built == mine.cost.params_non_embedding
    assert abs(built - ref.cost.params_non_embedding) <= MATCH_TOLERANCE * ref.cost.params_non_embedding
