"""The noise levers of a paired comparison: initialisation keyed by module path, and the weight average.

- ``model.init_draws: by_path``: two models that differ in one module, built at the same init seed,
  start identical in every module they share (the point: common random numbers, Law & Kelton,
  "Simulation Modeling and Analysis", ch. 11), MLPs of different widths share their common hidden
  units, and every weight is still N(0, std) (checked with scipy's Kolmogorov-Smirnov test).
- ``train.ema_half_life``: the average equals torch's own EMA of parameters
  (``torch.optim.swa_utils.AveragedModel`` with ``get_ema_multi_avg_fn``, a reference implementation
  in a general-purpose library), its half-life means what it says, the val lines measure it, and a
  run with it resumes exactly.
"""

from __future__ import annotations

import copy
import math

import pytest
import torch
from scipy import stats

from blockyard.config import config_from_dict, replace
from blockyard.model import MLP, build_model, keyed_rows
from blockyard.train.averaging import WeightAverage, ema_decay, half_life_steps

VOCAB = 61


def model_config(pattern: list[str], expansion: float = 2.0, draws: str = "by_path", width: int = 48):
    return config_from_dict({"model": {"width": width, "depth": 3, "pattern": pattern, "mlp_expansion": expansion,
                                       "init_draws": draws,
                                       "mixers": {"recurrence": {"kind": "recurrence"},
                                                  "local_attention": {"kind": "local_attention", "window": 8}}},
                             "data": {"corpus": "plays", "tokenizer": "bytes", "seq_len": 32}}).model


def built(cfg, seed: int):
    torch.manual_seed(seed)
    return build_model(cfg, VOCAB)


def test_by_path_shares_every_module_two_variants_have_in_common():
    attn = built(model_config(["global_attention"]), 3)
    hybrid = built(model_config(["recurrence", "recurrence", "local_attention"], expansion=2.5), 3)
    a, h = dict(attn.named_parameters()), dict(hybrid.named_parameters())
    assert torch.equal(a["embed.weight"], h["embed.weight"])
    for i in range(3):
        for part in ("mixer_norm", "mlp_norm"):
            assert torch.equal(a[f"blocks.{i}.{part}.weight"], h[f"blocks.{i}.{part}.weight"])
        # MLP hidden sizes 96 and 120: the first 96 units are the same numbers in both
        ha, hh = attn.blocks[i].mlp.hidden, hybrid.blocks[i].mlp.hidden
        assert (ha, hh) == (96, 120)
        ia, ih = attn.blocks[i].mlp.proj_in.weight, hybrid.blocks[i].mlp.proj_in.weight
        assert torch.equal(ia[:ha], ih[:ha]) and torch.equal(ia[ha:], ih[hh:hh + ha])  # gate and up halves
        oa, oh = attn.blocks[i].mlp.proj_out.weight, hybrid.blocks[i].mlp.proj_out.weight
        assert torch.equal(oa, oh[:, :ha])
    # the mixers differ, so they start differently; another seed changes everything
    other = built(model_config(["global_attention"]), 4)
    assert not torch.equal(other.embed.weight, attn.embed.weight)
    assert not torch.equal(other.blocks[0].mlp.proj_out.weight, attn.blocks[0].mlp.proj_out.weight)


def test_by_path_gives_the_same_recurrence_block_to_two_variants_that_both_start_with_it():
    """Same path, same kind: the mixer's own init (decay rates, conv) is keyed too."""
    rec = built(model_config(["recurrence"]), 7)
    hybrid = built(model_config(["recurrence", "recurrence", "local_attention"]), 7)
    for name, p in rec.blocks[0].mixer.named_parameters():
        assert torch.equal(p, dict(hybrid.blocks[0].mixer.named_parameters())[name]), name


def test_stream_draws_do_not_share():
    """The contrast: under ``stream`` the embedding is shared (drawn first) but the MLPs are not."""
    attn = built(model_config(["global_attention"], draws="stream"), 3)
    hybrid = built(model_config(["recurrence", "recurrence", "local_attention"], draws="stream"), 3)
    assert not torch.equal(attn.blocks[0].mlp.proj_out.weight, hybrid.blocks[0].mlp.proj_out.weight[:, :96])


def test_by_path_weights_are_normal_with_the_configured_stds():
    """KS test against N(0, std) (scipy.stats.kstest); residual outputs at std / sqrt(2 depth)
    (Radford et al. 2019, sec. 2.3), as under the stream init."""
    m = built(model_config(["global_attention"], width=96), 0)
    std = m.cfg.init_std
    for w, s in ((m.embed.weight, std), (m.blocks[1].mlp.proj_in.weight, std),
                 (m.blocks[2].mlp.proj_out.weight, std / math.sqrt(6))):
        p = stats.kstest(w.detach().flatten().numpy() / s, "norm").pvalue
        assert p > 1e-3, p
    # two blocks' MLPs are independent draws (different paths): correlation near 0
    a, b = (m.blocks[i].mlp.proj_in.weight.detach().flatten() for i in (0, 1))
    assert abs(float(torch.corrcoef(torch.stack([a, b]))[0, 1])) < 0.02


def test_keyed_rows_extend_each_other():
    assert torch.equal(keyed_rows(70, 5, 11, "k")[:33], keyed_rows(33, 5, 11, "k"))
    assert not torch.equal(keyed_rows(33, 5, 11, "k"), keyed_rows(33, 5, 11, "j"))
    assert keyed_rows(0, 5, 11, "k").shape == (0, 5)


def test_mlp_keyed_init_keeps_its_shapes():
    mlp = MLP(16, 40, "plain")
    mlp.keyed_init_(5, "x", 0.02, 0.01)
    assert mlp.proj_in.weight.shape == (40, 16) and mlp.proj_out.weight.shape == (16, 40)


# ----------------------------------------------------------------------------- the weight average


def test_weight_average_equals_torchs_ema_of_parameters():
    """Reference: torch.optim.swa_utils.AveragedModel(multi_avg_fn=get_ema_multi_avg_fn(decay))."""
    from torch.optim.swa_utils import AveragedModel, get_ema_multi_avg_fn

    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Linear(4, 8), torch.nn.Linear(8, 2))
    decay = ema_decay(3.0)
    ref = AveragedModel(copy.deepcopy(model), multi_avg_fn=get_ema_multi_avg_fn(decay))
    ours = WeightAverage(model, decay)
    opt = torch.optim.SGD(model.parameters(), lr=0.1)
    for _ in range(12):
        opt.zero_grad()
        model(torch.randn(5, 4)).square().mean().backward()
        opt.step()
        ref.update_parameters(model)
        ours.update()
    with ours.swapped_in():
        for (_, p), (_, q) in zip(model.named_parameters(), ref.module.named_parameters(), strict=True):
            torch.testing.assert_close(p, q, rtol=1e-6, atol=1e-7)
    trained = [p.clone() for p in model.parameters()]
    assert all(torch.equal(p, t) for p, t in zip(model.parameters(), trained, strict=True))  # swapped back


def test_half_life_means_half_the_weight():
    d = ema_decay(half_life_steps(0.1, 700))
    assert d ** 70 == pytest.approx(0.5)
    assert half_life_steps(0.001, 100) == 1.0
    with pytest.raises(ValueError):
        ema_decay(0)


def test_weight_average_state_round_trips_and_refuses_another_decay():
    model = torch.nn.Linear(3, 3)
    avg = WeightAverage(model, 0.9)
    avg.update()
    again = WeightAverage(model, 0.9)
    again.load_state_dict(avg.state_dict())
    assert all(torch.equal(a, b) for a, b in zip(avg.avg, again.avg, strict=True))
    with pytest.raises(ValueError):
        WeightAverage(model, 0.8).load_state_dict(avg.state_dict())


def test_a_run_with_the_average_measures_it_and_resumes_exactly(tmp_path):
    """val lines: loss = the averaged weights', raw_loss = the trained weights'; an interrupted run
    resumed from its checkpoint writes the same records as an uninterrupted one (exact resume)."""
    from _helpers import comparable, tiny_run_config, write_word_corpus

    from blockyard.train import run_training
    from blockyard.train.progress import Progress

    words = "alpha beta gamma delta eps zeta eta theta iota kappa".split()
    write_word_corpus(tmp_path / "corpus.txt", words, seed=0, lines=400)
    raw = tiny_run_config(tmp_path, {"steps": 24, "batch_size": 4, "warmup_steps": 2, "eval_every": 6,
                                     "checkpoint_every": 6, "eval_windows": 4, "log_every": 6,
                                     "ema_half_life": 0.25})
    cfg = config_from_dict(raw, tmp_path)

    class StopAt(Progress):
        def __init__(self, step: int) -> None:
            self.at = step

        def advance(self, step: int) -> None:
            if step == self.at:
                import os
                import signal
                os.kill(os.getpid(), signal.SIGTERM)

    whole, parts = tmp_path / "whole", tmp_path / "parts"
    assert run_training(cfg, whole, progress="silent")["status"] == "done"
    assert run_training(cfg, parts, progress=StopAt(9))["status"] == "interrupted"
    assert run_training(cfg, parts, progress="silent")["status"] == "done"
    assert comparable(parts) == comparable(whole)
    val = [x for x in comparable(whole) if x["split"] == "val"]
    assert all("raw_loss" in x for x in val)
    assert any(x["raw_loss"] != x["loss"] for x in val)
    off = run_training(replace(cfg, {"train.ema_half_life": 0.0}), tmp_path / "off", progress="silent")
    # the average changes no training: the trained weights' loss is the run without it
    off_val = [x for x in comparable(tmp_path / "off") if x["split"] == "val"]
    assert [x["loss"] for x in off_val] == pytest.approx([x["raw_loss"] for x in val], abs=1e-6)
    assert off["status"] == "done"


def test_the_method_says_what_the_levers_change_about_what_is_measured(tmp_path):
    """read_levers reads the cells' configs (a config from before the keys counts as their defaults)."""
    import yaml

    from blockyard.grid.report.results import read_levers
    from blockyard.grid.report.sections import lever_items

    (tmp_path / "configs").mkdir()
    (tmp_path / "configs" / "a-seed0.yaml").write_text(yaml.safe_dump({"model": {"width": 8}}))
    (tmp_path / "configs" / "b-seed0.yaml").write_text(
        yaml.safe_dump({"model": {"init_draws": "by_path"}, "train": {"ema_half_life": 0.1}}))
    rows = [{"id": "a-seed0", "variant": "a", "point": []}, {"id": "b-seed0", "variant": "b", "point": []}]
    levers = read_levers(tmp_path, rows)
    assert levers == {"model.init_draws": {"by_path"}, "train.ema_half_life": {0.0, 0.1}, "train.lr": {3e-3}}
    text = " ".join(lever_items(levers))
    assert "keyed by the init seed and its path" in text and "upper bound" in text
    assert "exponential moving average" in text and "`raw_loss`" in text
    assert lever_items({"model.init_draws": frozenset({"by_path"}), "train.ema_half_life": frozenset({0.0})}) == \
        lever_items({"model.init_draws": frozenset({"by_path"})})
    assert "one random stream" in lever_items({"model.init_draws": frozenset({"stream"})})[0]
    # One untuned rate: the verdict holds for it only; a rate below the default says what it trades.
    (rate,) = lever_items({"train.lr": frozenset({1.5e-3})})
    assert "`train.lr: 0.0015`" in rate and "below the trainer's default 0.003" in rate and "this rate only" in rate
    assert "below" not in lever_items({"train.lr": frozenset({3e-3})})[0]
    assert lever_items({"train.lr": frozenset({1e-3, 3e-3})}) == []  # tuned per variant: no single rate to name
