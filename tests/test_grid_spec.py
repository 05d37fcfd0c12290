"""Grid specs: expansion into cells, one-line errors that name the key, fairness matching."""

from __future__ import annotations

import dataclasses
import subprocess
import sys
from pathlib import Path

import pytest
from _helpers import check_refused_at_parse, earlier_grid_dir, real_non_embedding, tree_snapshot, write_grid

from blockyard.cli import main
from blockyard.config import to_dict
from blockyard.cost.analytic import flops_per_token
from blockyard.errors import UserError
from blockyard.grid.fairness import MATCH_TOLERANCE, apply_matching, count_params, planned_tokens
from blockyard.grid.index import open_index
from blockyard.grid.plan import makespan, plan_cells, plan_rows
from blockyard.grid.run import run_grid
from blockyard.grid.spec import GridFile, expand_cells, load_grid

BASE = {
    "model": {"width": 32, "depth": 2, "pattern": ["global_attention"], "mlp_expansion": 2.0},
    "data": {"corpus": "pydoc", "seq_len": 32},
    "train": {"steps": 10, "batch_size": 4, "eval_every": 5, "eval_windows": 4},
}


def test_cells_cross_variants_axes_and_seeds(tmp_path):
    (tmp_path / "base.yaml").write_text(
        "model: {width: 32, depth: 2, pattern: [global_attention]}\ndata: {corpus: pydoc, seq_len: 32}\n")
    path = write_grid(tmp_path, """
        description: a team choosing the mixer of an on-device keyboard model
        base: base.yaml
        variants:
          attn: {}
          rec: {model.pattern: [recurrence], model.mixers.recurrence.gate: false}
        reference: attn
        axes:
          model.width: [32, 64]
          train.lr: [0.001, 0.003]
        seeds: [0, 5]
    """)
    spec = load_grid(path)
    assert spec.name == "grid" and spec.reference == "attn" and spec.match == "none"
    cells = expand_cells(spec)
    assert len(cells) == 2 * 2 * 2 * 2
    ids = [c.id for c in cells]
    assert len(set(ids)) == len(ids)
    assert ids[0] == "attn-width32-lr0.001-seed0"
    by_id = {c.id: c for c in cells}
    rec = by_id["rec-width64-lr0.003-seed5"]
    assert rec.cfg.model.width == 64 and rec.cfg.train.lr == 0.003
    assert rec.cfg.train.seed == 5 and rec.cfg.train.effective_data_seed == 5
    assert rec.cfg.model.pattern == ("recurrence",)
    # The variant set an option of a mixer the base never spelled out: the entry named after the kind.
    assert rec.cfg.model.mixers["recurrence"].kind == "recurrence"
    assert rec.cfg.model.mixers["recurrence"].options.gate is False
    assert rec.cfg.name == rec.id
    assert by_id["attn-width32-lr0.001-seed0"].cfg.model.pattern == ("global_attention",)


def test_grid_without_variants_has_one_base_variant(tmp_path):
    path = write_grid(tmp_path, """
        base: {model: {width: 32, depth: 1}}
        seeds: [0, 1, 2]
    """)
    cells = expand_cells(load_grid(path))
    assert [c.id for c in cells] == ["base-seed0", "base-seed1", "base-seed2"]


BAD_SPECS = [
    ("axes: {model.width: 64}", "axes.model.width: expected a list of values"),
    ("axes: {model.widht: [32]}", "axes.model.widht: value 32: unknown key"),
    ("variants: {a: {}, b: {model.mlp: wide}}\nreference: a", "variants.b: model.mlp: 'wide' is not allowed"),
    ("variants: {a: {}, b: {}}\nreference: c", "reference: 'c' is not a variant"),
    ("variants: {a: {}, b: {}}", "reference: required with variants"),
    ("variants: {a: {train.seed: 3}}\nreference: a", "variants.a.train.seed: cannot be overridden"),
    # Pairing guard (issue 15, item 7): the data and init seeds are reserved like train.seed.
    ("variants: {a: {}, b: {train.data_seed: 3}}\nreference: a", "variants.b.train.data_seed: cannot be overridden"),
    ("variants: {a: {}}\nreference: a\naxes: {train.init_seed: [1, 2]}", "axes.train.init_seed: cannot be overridden"),
    ("smallest_effect: 0", "smallest_effect: 0: a number > 0"),
    ("smallest_effect: -0.01", "smallest_effect: -0.01: a number > 0"),
    ("smallest_effect: yes", "smallest_effect: True: a number > 0"),
    ("null_control: true", "null_control: needs variants and a reference"),
    ("null_control: 1\nvariants: {a: {}}\nreference: a", "null_control: 1: true or false"),
    ("null_control: true\nvariants: {a: {}, null-control: {}}\nreference: a", "null_control: the grid already has"),
    ("match: params", "match: match: params needs variants and a reference"),
    ("match: tokens\nvariants: {a: {}}\nreference: a", "match: 'tokens' is not allowed"),
    ("variants: {a: {model.width: 64}}\nreference: a\naxes: {model.width: [32]}", "axes.model.width: also set by"),
    ("colour: blue", "colour: unknown grid key"),
    ("variants: {a: {model.width.x: 1}}\nreference: a", "variants.a: model.width.x: model.width is a value, not"),
    ("variants: {a: {}, b: {model.mixers.global_attention.heads: 5}}\nreference: a",
     "variants.b: model.mixers.global_attention.heads: 5 does not divide"),
    # The grid file's schema (GridFile): types and bounds read like a run config's errors.
    ("smallest_effect: .inf", "smallest_effect: inf: a number > 0"),
    ("tune: 3", "tune: 3: a mapping: {key: train.lr"),
    ("variants: {a: {}}\nreference: 5", "reference: 5: the name of a variant"),
    ("description: [1]", "description: expected string or null, got [1]"),
    ("match: 3", "match: expected a string, got 3"),
    ("name: 'a b'", "name: 'a b': use letters, digits"),
]


@pytest.fixture
def existing_grid_dir(tmp_path) -> Path:
    """A grid dir holding an index of another grid's cells and a finished-looking cell dir."""
    return earlier_grid_dir(tmp_path, """
        name: earlier
        base: {model: {width: 32, depth: 1}, data: {seq_len: 32}}
        seeds: [0]
    """)


@pytest.mark.parametrize("body, message", BAD_SPECS)
def test_bad_specs_fail_with_one_line_naming_the_key(tmp_path, existing_grid_dir, capsys, body, message):
    path = tmp_path / "bad.yaml"
    path.write_text("base: {model: {width: 32, depth: 1}, data: {seq_len: 32}}\nseeds: [0]\n" + body + "\n")
    check_refused_at_parse(path, message, existing_grid_dir, capsys)


@pytest.mark.slow
def test_bad_spec_exit_code_of_the_real_command(tmp_path, existing_grid_dir):
    path = tmp_path / "bad.yaml"
    path.write_text("base: {model: {width: 32}}\nseeds: [0]\naxes: {model.width: 64}\n")
    before = tree_snapshot(existing_grid_dir)
    proc = subprocess.run([sys.executable, "-m", "blockyard", "grid", str(path), "--out", str(existing_grid_dir)],
                          capture_output=True, text=True, timeout=120)
    expected = "error: axes.model.width: expected a list of values\n"
    assert (proc.returncode, proc.stdout, proc.stderr) == (2, "", expected)
    assert tree_snapshot(existing_grid_dir) == before


@pytest.mark.parametrize("seeds, message", [
    ("{first: 1, most: 5}", "seeds.first: 1: an integer >= 2"),
    ("{first: 3, most: 2}", "seeds.most: 2: an integer >= seeds.first (3)"),
    ("{first: 3}", "seeds.most: None: an integer >= seeds.first"),
    ("{first: 3, most: 6, step: 0}", "seeds.step: 0: an integer >= 1"),
    ("{first: 3, most: 6, every: 2}", "seeds.every: unknown key (allowed: first, most, step, start)"),
    ("{first: 3, most: 6, start: -1}", "seeds.start: -1: an integer >= 0"),
])
def test_bad_seed_schedules_exit_2_and_leave_the_grid_dir(tmp_path, existing_grid_dir, capsys, seeds, message):
    path = tmp_path / "bad.yaml"
    path.write_text(f"base: {{model: {{width: 32, depth: 1}}, data: {{seq_len: 32}}}}\nseeds: {seeds}\n")
    before = tree_snapshot(existing_grid_dir)
    assert main(["grid", str(path), "--out", str(existing_grid_dir)]) == 2
    out, errors = capsys.readouterr()
    assert errors.startswith(f"error: {message}") and errors.count("\n") == 1 and out == ""
    assert tree_snapshot(existing_grid_dir) == before


def test_seed_schedule_and_null_control_expand_into_cells(tmp_path):
    path = write_grid(tmp_path, """
        base: {model: {width: 32, depth: 1, pattern: [global_attention]}, data: {corpus: pydoc, seq_len: 32}}
        variants: {ref: {}, wide: {model.mlp_expansion: 3.0}}
        reference: ref
        seeds: {first: 2, most: 4}
        smallest_effect: 0.02
        null_control: true
        match: params
    """)
    spec = load_grid(path)
    assert spec.seeds == (0, 1, 2, 3)  # every seed a round may add
    assert spec.design.schedule.looks() == (2, 3, 4)
    assert (spec.design.smallest_effect, spec.design.null_control) == (0.02, True)
    assert spec.groups == ["ref", "null-control", "wide"]
    plan = {p.id: p.cell for p in plan_cells(spec, threads=1)}
    assert len(plan) == 3 * 4
    ref, null = plan["ref-seed2"].cfg, plan["null-control-seed2"].cfg
    # The null control is the reference under another init seed, the same data seed, and no matching.
    assert null.train.effective_init_seed == 1_000_002 != ref.train.effective_init_seed == 2
    assert null.train.effective_data_seed == ref.train.effective_data_seed == 2
    assert to_dict(null) | {"name": "", "train": {}} == to_dict(ref) | {"name": "", "train": {}}
    assert plan["null-control-seed2"].adjustments == {} and plan["wide-seed2"].adjustments
    assert spec.design == type(spec.design).from_json(spec.design.to_json())


def test_seed_schedule_start_runs_the_same_design_on_other_seeds(tmp_path):
    """``start: 100`` numbers the seeds 100.. in the order rounds add them; looks and design are unchanged."""
    path = write_grid(tmp_path, """
        base: {model: {width: 32, depth: 1, pattern: [global_attention]}, data: {corpus: pydoc, seq_len: 32}}
        variants: {ref: {}, wide: {model.mlp_expansion: 3.0}}
        reference: ref
        seeds: {first: 3, most: 5, step: 2, start: 100}
    """)
    spec = load_grid(path)
    assert spec.seeds == (100, 101, 102, 103, 104)
    assert spec.design.schedule.looks() == (3, 5)
    assert spec.design == type(spec.design).from_json(spec.design.to_json())
    plan = {p.id: p.cell for p in plan_cells(spec, threads=1)}
    assert plan["wide-seed103"].cfg.train.seed == 103 and "ref-seed0" not in plan


def test_grid_keys_lists_every_key_of_the_grid_file_schema(capsys):
    assert main(["grid", "--keys"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0].split() == ["key", "default", "meaning"]
    assert [ln.split()[0] for ln in lines[1:]] == [f.name for f in dataclasses.fields(GridFile)]
    assert any(ln.split()[:2] == ["smallest_effect", "0.01"] for ln in lines)


def test_bad_seeds_and_base(tmp_path):
    for text, message in (
        ("base: {model: {width: 32}}\nseeds: [0, 0]", "seeds: lists a seed twice"),
        ("base: {model: {width: 32}}\nseeds: 3", "seeds: expected a list"),
        ("base: {model: {width: 32}}\nseeds: [-1]", "seeds: -1:"),
        ("seeds: [0]", "base: required"),
        ("base: missing.yaml\nseeds: [0]", "base: "),
        ("base: {model: {width: 0}}\nseeds: [0]", "base: model.width: 0 is too small"),
    ):
        (tmp_path / "g.yaml").write_text(text)
        with pytest.raises(UserError, match="^" + message.replace("[", r"\[")):
            load_grid(tmp_path / "g.yaml")


def test_changed_spec_in_existing_dir_is_refused_and_dir_untouched(tmp_path, existing_grid_dir, capsys):
    path = write_grid(tmp_path, """
        name: earlier
        base: {model: {width: 48, depth: 1}, data: {seq_len: 32}}
        seeds: [0]
    """, "changed.yaml")
    before = tree_snapshot(existing_grid_dir)
    assert main(["grid", str(path), "--out", str(existing_grid_dir)]) == 2
    errors = capsys.readouterr().err
    assert errors.startswith(f"error: {existing_grid_dir}: holds a grid whose cells differ")
    assert "--force" in errors and errors.count("\n") == 1
    assert tree_snapshot(existing_grid_dir) == before


def test_non_grid_dir_is_refused(tmp_path):
    path = write_grid(tmp_path, "base: {model: {width: 32, depth: 1}}\nseeds: [0]\n")
    other = tmp_path / "other"
    other.mkdir()
    (other / "notes.txt").write_text("mine")
    from blockyard.grid.run import run_grid

    with pytest.raises(UserError, match="is not empty and holds no grid"):
        run_grid(path, out=other, echo=lambda _: None)
    assert [p.name for p in other.iterdir()] == ["notes.txt"]


# ----------------------------------------------------------------------------- fairness


def test_match_params_lands_within_two_percent_for_recurrence_vs_attention(tmp_path):
    path = write_grid(tmp_path, """
        base:
          model: {width: 64, depth: 3, pattern: [global_attention], mlp_expansion: 2.0}
          data: {corpus: pydoc, seq_len: 32}
        variants:
          attention: {}
          recurrence: {model.pattern: [recurrence], model.mixers.recurrence.width_mult: 2.0}
          hybrid: {model.pattern: [recurrence, recurrence, local_attention]}
          lstm: {model.pattern: [lstm]}
        reference: attention
        seeds: [0, 1]
        match: params
    """)
    spec = load_grid(path)
    raw = expand_cells(spec)
    cells = apply_matching(spec, raw)
    ref = real_non_embedding(cells[0].cfg)
    for before, after in zip(raw, cells, strict=True):
        if after.variant == "attention":
            assert after.adjustments == {} and after.cfg == before.cfg
            continue
        got = real_non_embedding(after.cfg)
        assert abs(got - ref) <= MATCH_TOLERANCE * ref, (after.id, got, ref)
        # Only the MLP expansion moved.
        assert set(after.adjustments) == {"model.mlp_expansion"}
        a, b = to_dict(before.cfg), to_dict(after.cfg)
        a["model"].pop("mlp_expansion")
        b["model"].pop("mlp_expansion")
        assert a == b
        # Unmatched, these variants are more than 2% off (else the test would prove nothing).
        assert abs(real_non_embedding(before.cfg) - ref) > MATCH_TOLERANCE * ref, after.id
    assert count_params(cells[0].cfg)["non_embedding"] == ref


def test_match_params_reports_impossible_matches(tmp_path):
    path = write_grid(tmp_path, """
        base: {model: {width: 32, depth: 2, pattern: [recurrence], mlp_expansion: 0.25}, data: {seq_len: 32}}
        variants:
          small: {}
          lstm: {model.pattern: [lstm]}
        reference: small
        seeds: [0]
        match: params
    """)
    spec = load_grid(path)
    with pytest.raises(UserError, match="^match: params: variant lstm has .* cannot be matched"):
        apply_matching(spec, expand_cells(spec))


def test_match_flops_equalises_training_flops(tmp_path):
    path = write_grid(tmp_path, """
        base:
          model: {width: 32, depth: 2, pattern: [global_attention], mlp_expansion: 2.0}
          data: {corpus: pydoc, seq_len: 64}
          train: {steps: 40, batch_size: 4}
        variants:
          attention: {}
          wide_recurrence: {model.pattern: [recurrence], model.mixers.recurrence.width_mult: 3.0}
        reference: attention
        seeds: [0]
        match: flops
    """)
    spec = load_grid(path)
    ref, var = apply_matching(spec, expand_cells(spec))
    ref_flops = flops_per_token(ref.cfg) * planned_tokens(ref.cfg)
    assert set(var.adjustments) == {"train.tokens"}
    assert var.cfg.train.tokens == var.adjustments["train.tokens"]
    assert var.cfg.train.tokens * flops_per_token(var.cfg) == pytest.approx(ref_flops, rel=1e-4)
    # What the trainer runs is whole steps: within one step of the matched budget.
    step_tokens = 4 * 64
    assert abs(planned_tokens(var.cfg) * flops_per_token(var.cfg) - ref_flops) <= step_tokens * flops_per_token(
        var.cfg)
    assert flops_per_token(var.cfg) != flops_per_token(ref.cfg)


def test_dry_run_times_the_trainers_step_with_each_cells_runtime(tmp_path, monkeypatch):
    # A cell's precision, activation checkpointing and accumulation change its speed: the estimate
    # must time the trainer's own step under the cell's runtime, not a bare forward/backward.
    from blockyard.config import config_from_dict
    from blockyard.grid.estimate import measure_tokens_per_s
    from blockyard.train import loop

    seen = []
    real_step = loop.train_step

    def spy(model, optimizer, scheduler, micro_batches, runtime, grad_clip):
        seen.append((runtime.precision, model.activation_checkpointing, len(micro_batches), grad_clip))
        return real_step(model, optimizer, scheduler, micro_batches, runtime, grad_clip)

    monkeypatch.setattr(loop, "train_step", spy)
    cfg = config_from_dict({"model": {"width": 16, "depth": 1, "pattern": ["global_attention"]},
                            "data": {"corpus": "pydoc", "seq_len": 16},
                            "train": {"batch_size": 2, "grad_accum": 2, "grad_clip": 0.5},
                            "runtime": {"precision": "bf16_emulated", "activation_checkpointing": True}})
    assert measure_tokens_per_s(cfg, threads=1, steps=2) > 0
    assert seen == [("bf16_emulated", True, 2, 0.5)] * 3  # one warm-up step, two timed


def test_dry_run_lists_costs_and_trains_nothing(tmp_path, capsys):
    path = write_grid(tmp_path, """
        name: tiny
        base:
          model: {width: 32, depth: 2, pattern: [global_attention], mlp_expansion: 2.0}
          data: {corpus: pydoc, seq_len: 32}
          train: {steps: 10, batch_size: 4}
        variants:
          attention: {}
          recurrence: {model.pattern: [recurrence]}
        reference: attention
        seeds: [0, 1]
        match: params
    """)
    out_dir = tmp_path / "never"
    assert main(["grid", str(path), "--dry-run", "--out", str(out_dir), "--workers", "1"]) == 0
    out = capsys.readouterr().out
    assert not out_dir.exists()
    spec = load_grid(path)
    cells = apply_matching(spec, expand_cells(spec))
    for cell in cells:
        line = next(ln for ln in out.splitlines() if ln.startswith(cell.id + " "))
        assert f" {real_non_embedding(cell.cfg):,d} " in line
        assert f" {flops_per_token(cell.cfg):,.0f} " in line
        assert " 10 " in line and " 1,280 " in line  # steps, tokens = 10 x 4 x 32
    assert "model.mlp_expansion=" in out
    assert "from a measured micro-benchmark" in out and "Estimated time:" in out


def test_dry_run_of_seed_rounds_shows_best_and_worst_case(tmp_path, monkeypatch):
    # Every cell at 1000 tokens/s: a cell of 10 steps x 4 x 32 = 1280 tokens takes 1.28 s. Round 1:
    # 3 groups x 2 seeds on 2 workers = 3 cells each = 3.84 s; rounds 2 and 3 add 3 cells each
    # (2 slots of 1.28 s): worst case 3.84 + 2 x 2.56 = 8.96 s, i.e. "9s".
    import blockyard.grid.estimate as estimate

    monkeypatch.setattr(estimate, "measure_tokens_per_s", lambda cfg, threads: 1000.0)
    path = write_grid(tmp_path, """
        base: {model: {width: 32, depth: 1, pattern: [global_attention]}, data: {corpus: pydoc, seq_len: 32},
               train: {steps: 10, batch_size: 4}}
        variants: {a: {}, b: {train.lr: 0.001}}
        reference: a
        seeds: {first: 2, most: 4}
        null_control: true
    """)
    lines: list[str] = []
    assert run_grid(path, out=tmp_path / "never", workers=2, threads=1, dry_run=True, echo=lines.append) == 0
    text = "\n".join(lines)
    assert "best case, every comparison decided after round 1: 6 cells, 4s for the grid (8s of cell time)" in text
    assert "worst case, 3 rounds, every group to 4 seeds: 12 cells, 9s for the grid (15s of cell time)" in text
    assert not (tmp_path / "never").exists()
    assert makespan([3.0, 1.0, 1.0, 1.0], 2) == 3.0 and makespan([1.0] * 3, 2) == 2.0


def test_changed_verdict_rules_are_refused_without_force(tmp_path, capsys):
    text = """
        base: {model: {width: 32, depth: 1}, data: {seq_len: 32}}
        variants: {a: {}, b: {train.lr: 0.001}}
        reference: a
        seeds: [0]
        smallest_effect: %s
    """
    grid_dir = tmp_path / "grid_dir"
    grid_dir.mkdir()
    spec = load_grid(write_grid(tmp_path, text % "0.01", "first.yaml"))
    with open_index(grid_dir) as index:
        index.plan(plan_rows(plan_cells(spec, threads=1)))
        index.set_meta({"design": spec.design.to_json(), "threads": "1"})
    before = tree_snapshot(grid_dir)
    changed = write_grid(tmp_path, text % "0.05", "changed.yaml")
    assert main(["grid", str(changed), "--out", str(grid_dir)]) == 2
    errors = capsys.readouterr().err
    assert "its verdict rules (smallest_effect, seeds schedule, null_control) differ" in errors
    assert errors.count("\n") == 1 and tree_snapshot(grid_dir) == before


CONFIGS = Path(__file__).resolve().parent.parent / "configs" / "grids"


@pytest.mark.parametrize("name, variants, seeds, groups", [
    ("default", ["global-attention", "recurrence-only", "hybrid-2r1l"], 7, 3),
    ("gate-ablation", ["gated", "no-gate"], 3, 3),
])
def test_demo_grids_expand_and_match_parameters(name, variants, seeds, groups):
    spec = load_grid(CONFIGS / f"{name}.yaml")
    assert spec.name == name and list(spec.variants) == variants and len(spec.seeds) == seeds
    assert spec.match == "params" and spec.reference == variants[0]
    first = spec.design.schedule.first if spec.design.schedule else seeds
    assert first >= 3  # issue 15: at least 3 seeds
    plan = plan_cells(spec, threads=1)
    assert len(plan) == groups * seeds
    ref = plan[0].cost.params_non_embedding
    for p in plan:
        assert abs(p.cost.params_non_embedding - ref) <= MATCH_TOLERANCE * ref
        assert p.cell.cfg.data.corpus == "plays" and p.cell.cfg.runtime.threads == 1
    patterns = {p.cell.variant: p.cell.cfg.model.pattern for p in plan}
    if name == "default":
        assert patterns == {"global-attention": ("global_attention",), "recurrence-only": ("recurrence",),
                            "hybrid-2r1l": ("recurrence", "recurrence", "local_attention")}
    else:
        gates = {p.cell.variant: p.cell.cfg.model.mixers["recurrence"].options.gate for p in plan}
        assert gates == {"gated": True, "no-gate": False, "null-control": True}


@pytest.mark.slow
def test_planning_a_grid_builds_no_model_and_loads_no_report_libraries():
    # The grid parent stays resident while its workers train; issue #8 bounds a grid at N x one
    # cell + 300 MB. Planning counts parameters analytically (blockyard.cost) and the report's scipy
    # loads only when the report is written. A fresh interpreter, so earlier imports do not count.
    import subprocess
    import sys

    code = (
        "import sys, torch.nn as nn\n"
        "built = []\n"
        "orig = nn.Module.__init__\n"
        "def spy(self, *a, **k):\n"
        "    built.append(type(self).__name__); orig(self, *a, **k)\n"
        "nn.Module.__init__ = spy\n"
        "from blockyard.grid.plan import plan_cells\n"
        "from blockyard.grid.spec import load_grid\n"
        f"plan = plan_cells(load_grid({str(CONFIGS / 'default.yaml')!r}), 1)\n"
        "assert len(plan) == 21 and plan[0].cost.params_total > 0, plan\n"
        "assert not built, built[:5]\n"
        "assert 'scipy' not in sys.modules and 'matplotlib' not in sys.modules\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert out.returncode == 0, out.stderr[-2000:]
