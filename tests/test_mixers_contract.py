"""The contract every registered mixer keeps (blockyard/mixers/base.py), checked over ``MIXERS``.

The checks themselves live in ``blockyard/mixers/contract.py`` (the same code ``blockyard check``
and the training gate run); here they run over every registered kind, with the option variants
that take other code paths, so a mixer added to the registry is tested without further work.
The definitions are those of an autoregressive model (output t is a function of inputs <= t;
generation token by token computes the same function): common practice, no source. The second
half checks the checks: each must fail on a mixer broken in its one way, at the right place.
"""

from __future__ import annotations

import dataclasses
import itertools
from typing import Any

import pytest
import torch
from conftest import EXAMPLE_PLUGINS, LEAKY, LINEAR_ATTENTION, mixer_options

from blockyard.config import config_from_dict
from blockyard.mixers import MIXERS
from blockyard.mixers.contract import (
    MIXER_CHECKS,
    build_mixer,
    check_causality,
    check_determinism,
    check_gradients,
    check_param_count,
    check_residual_out,
    check_state,
    check_step,
    mixer_contract,
    mixer_inputs,
    model_contract,
    perturb_features,
    perturbation_effects,
)
from blockyard.mixers.plugins import load_plugin
from blockyard.model import build_model

WIDTH = 32
SMALL_WINDOW = 16  # < SEQ_LEN (40), so local attention runs its blocked path (40 is not a multiple: padding)

# Option variants per kind that take other code paths (head layouts, windows, gates, state types).
_HEADS = [{"heads": 4, "kv_heads": 2}, {"heads": 4, "kv_heads": 1}]
VARIANTS: dict[str, list[dict[str, Any]]] = {
    "global_attention": [{}, *_HEADS],
    "local_attention": [{}, {"window": SMALL_WINDOW}, *({"window": 6, **h} for h in _HEADS)],
    "recurrence": [
        {"gate": gate, "complex": cplx, "conv_width": conv, "input_norm": norm}
        for gate, cplx, conv, norm in itertools.product((True, False), (False, True), (0, 1, 4), (True, False))
    ] + [{"width_mult": 1.5}, {"complex": True, "gate_blocks": 2}],
    "lstm": [{"hidden_mult": m} for m in (1.0, 0.5, 2.0)],
}


def _case_id(kind: str, options: dict[str, Any]) -> str:
    return kind + "".join(f"-{k}{v:.3g}" if isinstance(v, float) else f"-{k}{v}" for k, v in options.items())


CASES = [pytest.param(kind, opts, id=_case_id(kind, opts))
         for kind in sorted(MIXERS) for opts in VARIANTS.get(kind, [{}])]


def test_every_registered_kind_is_covered():
    """Every kind the package registers (plugins that other tests load register too, and are not ours)."""
    from blockyard.mixers import BUILTIN_KINDS

    assert set(VARIANTS) == set(BUILTIN_KINDS), "add the new kind's option variants to VARIANTS"


@pytest.mark.parametrize("check", MIXER_CHECKS)
@pytest.mark.parametrize("kind,options", CASES)
def test_contract(kind, options, check):
    (result,) = mixer_contract(MIXERS[kind], WIDTH, mixer_options(kind, WIDTH, **options), checks=[check])
    # no warning either: the mixers we ship keep their residual_out marks
    assert result.passed is True and not result.warning, f"{kind} {options}: {check}: {result.figure}"


@pytest.mark.parametrize("kind", sorted(MIXERS))
def test_param_count_exact_at_another_width(kind):
    (result,) = mixer_contract(MIXERS[kind], 64, mixer_options(kind, 64), checks=["params"])
    assert result.passed is True and result.value == 0, result.figure


# ----------------------------------------------------------------------------- a mixed model


def mixed_model():
    """Every registered kind in one model, plus local attention with a window below the sequence length."""
    pattern = [*sorted(MIXERS), "local_small"]
    model = {
        "width": WIDTH,
        "depth": len(pattern),
        "pattern": pattern,
        "mixers": {"local_small": {"kind": "local_attention", "window": 4}},
        "init_std": 0.2,  # larger than the default so that every block visibly moves the logits
    }
    cfg = config_from_dict({"model": model})
    torch.manual_seed(0)
    return build_model(cfg.model, vocab_size=61)


@pytest.mark.parametrize("check", ["causality", "step", "gradients", "determinism"])
def test_mixed_model(check):
    (result,) = model_contract(mixed_model(), 61, seq_len=30, checks=[check])
    assert result.passed is True, result.figure


# ----------------------------------------------------------------------------- the checks catch what they claim to


def test_causality_reports_the_first_leaking_position_of_the_leaky_example():
    (cls,) = load_plugin(LEAKY)  # keys and values at t come from token t + 1
    (result,) = mixer_contract(cls, WIDTH, cls.Options(), checks=["causality"])
    assert result.passed is False
    assert (result.position, result.source) == (0, 1), result.figure
    assert result.figure.startswith("output 0 changes when input 1 does")


def test_causality_finds_a_leak_late_in_the_sequence():
    # Output s sees input s + 1 only from s = 25 on: the first leaking output is 25, not 0.
    mixer = build_mixer(MIXERS["lstm"], WIDTH, mixer_options("lstm", WIDTH))
    x = mixer_inputs(WIDTH)

    def leaky(inp: torch.Tensor) -> torch.Tensor:
        y = mixer(inp)
        return torch.cat([y[:, :25], y[:, 25:] + _shifted(inp)[:, 25:]], dim=1)

    result = check_causality(leaky, x, perturb_features())
    assert (result.passed, result.position, result.source) == (False, 25, 26), result.figure


def _shifted(x: torch.Tensor) -> torch.Tensor:
    """x_{t+1} at position t (zeros at the end)."""
    return torch.cat([x[:, 1:], torch.zeros_like(x[:, :1])], dim=1)


def test_causality_rejects_a_mixer_that_ignores_its_input():
    x = mixer_inputs(WIDTH)
    result = check_causality(lambda inp: torch.ones_like(inp) + 0 * inp[:, :1], x, perturb_features())
    assert result.passed is False and "depend on no input" in result.figure


class _Drift(torch.nn.Module):
    """An LSTM mixer whose step path adds 1e-3 from token 7 on: a step/forward mismatch at t=7."""

    def __init__(self) -> None:
        super().__init__()
        self.inner = build_mixer(MIXERS["lstm"], WIDTH, mixer_options("lstm", WIDTH))
        self.t = 0

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.inner(x)

    def step(self, x_t: torch.Tensor, state: Any) -> tuple[torch.Tensor, Any]:
        y, state = self.inner.step(x_t, state)
        self.t += 1
        return (y + 1e-3 if self.t > 7 else y), state


def test_step_check_reports_the_largest_difference_and_where():
    m, x = _Drift(), mixer_inputs(WIDTH)
    result = check_step(m, m.inner.init_state(2), m.step, x)
    assert result.passed is False
    assert result.position >= 7 and result.value == pytest.approx(1e-3, rel=1e-2), result.figure


def test_gradient_check_names_an_unused_parameter():
    mixer = build_mixer(MIXERS["lstm"], WIDTH, mixer_options("lstm", WIDTH))
    mixer.unused = torch.nn.Parameter(torch.zeros(3))
    result = check_gradients(mixer, mixer, mixer_inputs(WIDTH))
    assert result.passed is False and result.figure.startswith("unused: no gradient"), result.figure


def test_determinism_check_catches_noise():
    mixer = build_mixer(MIXERS["lstm"], WIDTH, mixer_options("lstm", WIDTH))
    result = check_determinism(lambda x: mixer(x) + 1e-6 * torch.rand(()), mixer_inputs(WIDTH))
    assert result.passed is False and result.value > 0


def _la_class():
    (cls,) = load_plugin(LINEAR_ATTENTION)
    return cls


def test_state_check_catches_an_in_place_update():
    cls = _la_class()

    class InPlace(cls):
        def step(self, x_t, state):
            y, new = super().step(x_t, state)
            state.s.copy_(new.s)  # "saves memory": the caller's state is now wrong
            return y, new

    result = check_state(build_mixer(InPlace, WIDTH, cls.Options()), mixer_inputs(WIDTH))
    assert result.passed is False and "state.s" in result.figure and result.position == 0, result.figure


def test_state_check_catches_a_state_that_is_not_batch_first():
    cls = _la_class()

    class HeadsFirst(cls):
        def init_state(self, batch, *, device=None):
            state = super().init_state(batch, device=device)
            return dataclasses.replace(state, z=state.z.transpose(0, 1))

    result = check_state(build_mixer(HeadsFirst, WIDTH, cls.Options()), mixer_inputs(WIDTH))
    assert result.passed is False and "state.z" in result.figure and "batch-first" in result.figure


def test_cost_and_init_checks_catch_a_wrong_formula_and_a_missing_mark():
    cls = _la_class()

    class OffByOne(cls):
        @classmethod
        def param_count(cls, width, options):
            return 4 * width * width + 1

    mixer = build_mixer(OffByOne, WIDTH, cls.Options())
    result = check_param_count(mixer)
    assert result.passed is False and result.value == 1
    mixer.out.residual_out = False
    unmarked = check_residual_out(mixer)  # a warning, not a failure: the mark only scales the init
    assert (unmarked.passed, unmarked.warning, unmarked.status) == (True, True, "warn")


# ----------------------------------------------------------------------------- what the contract accepts and catches
# The definitions are those of an autoregressive block (common practice, no source): output t depends on
# inputs <= t (causality), and a block that mixes in time lets some later output see input t.

DELAY = EXAMPLE_PLUGINS / "delay.py"
TOKEN_LOCAL = EXAMPLE_PLUGINS / "token_local.py"


def test_a_one_step_delay_passes_although_its_last_input_moves_nothing_in_the_window():
    (cls,) = load_plugin(DELAY)  # y_t = W x_(t-1), no package helpers: the last input moves no output
    results = {r.check: r for r in mixer_contract(cls, WIDTH, cls.Options())}
    assert all(r.passed is not False for r in results.values()), [r.figure for r in results.values()]
    assert results["causality"].passed and results["mixes_in_time"].passed
    mixer = build_mixer(cls, WIDTH, cls.Options())
    moved, scale = perturbation_effects(mixer, mixer_inputs(WIDTH), perturb_features())
    assert float(moved[-1].max()) == 0.0  # the case the old rule refused ("input 39 changes no output")
    assert (results["residual_out"].status, results["residual_out"].warning) == ("warn", True)


def test_a_token_local_block_fails_mixes_in_time_unless_declared():
    (declared,) = load_plugin(TOKEN_LOCAL)

    class Undeclared(declared):
        token_local = False

    (fail,) = mixer_contract(Undeclared, WIDTH, declared.Options(), checks=["mixes_in_time"])
    assert fail.passed is False and "token_local = True" in fail.figure and fail.value == 0.0, fail.figure
    (ok,) = mixer_contract(declared, WIDTH, declared.Options(), checks=["mixes_in_time"])
    assert ok.passed is True and not ok.warning and "declared token_local" in ok.figure
    # a declaration on a block that does mix passes with a warning: it would mislabel the block in reports
    (cls,) = load_plugin(DELAY)
    mislabelled = type("Mislabelled", (cls,), {"token_local": True})
    (warned,) = mixer_contract(mislabelled, WIDTH, cls.Options(), checks=["mixes_in_time"])
    assert (warned.passed, warned.warning) == (True, True), warned.figure


def _gate_config(plugin, kind):
    return config_from_dict({"plugins": [str(plugin)], "model": {"width": WIDTH, "depth": 1, "pattern": [kind]}})


def test_the_gate_refuses_an_undeclared_token_local_block_and_a_leaking_one(tmp_path):
    from blockyard.check import TOKEN_LOCAL_MARK, gate
    from blockyard.errors import UserError

    undeclared = tmp_path / "undeclared.py"
    undeclared.write_text(TOKEN_LOCAL.read_text().replace("token_local = True", "token_local = False"))
    with pytest.raises(UserError, match="fails the mixer contract: mixes_in_time: no output after t moves"):
        gate(_gate_config(undeclared, "token_local_linear"))
    with pytest.raises(UserError, match="fails the mixer contract: causality: output 0 changes when input 1"):
        gate(_gate_config(LEAKY, "leaky_linear_attention"))
    notes: list[str] = []
    assert gate(_gate_config(TOKEN_LOCAL, "token_local_linear"), note=notes.append).endswith(
        f"; {TOKEN_LOCAL_MARK}: token_local_linear")
    assert notes == []  # its projection is marked: nothing to say
    gate(_gate_config(DELAY, "delay"), note=notes.append)
    assert len(notes) == 1 and "residual_out" in notes[0] and "sqrt(2 x depth)" in notes[0]


def test_the_variants_table_marks_a_declared_token_local_variant(tmp_path):
    from blockyard.check import TOKEN_LOCAL_MARK
    from blockyard.grid.report.results import read_token_local

    rows = []
    for variant, check in (("local", f"passed (causality) for x; {TOKEN_LOCAL_MARK}: x"), ("mixing", "passed")):
        cell = tmp_path / "cells" / f"{variant}-seed0"
        cell.mkdir(parents=True)
        (cell / "env.json").write_text(f'{{"mixer_check": "{check}"}}')
        rows.append({"id": f"{variant}-seed0", "variant": variant, "point": [], "seed": 0})
    assert read_token_local(tmp_path, rows) == {"local"}


def test_flops_check_names_the_context_by_our_key():
    from blockyard.mixers.contract import check_flops

    result = check_flops(MIXERS["global_attention"], WIDTH, mixer_options("global_attention", WIDTH))
    assert result.passed is True and result.figure.startswith("extra FLOPs/token at seq_len 1: ")
