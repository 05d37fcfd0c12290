"""User mixers from plugin files: loading, config keys and hashes, `check`, the training gate, run dirs, grids.

The example plugin (examples/plugins/linear_attention.py) is checked against the equations of
Katharopoulos et al. 2020 (arXiv:2006.16236): causal linear attention as a masked sum (their
eq. 9) and as a recurrence over S_i, z_i (their eqs. 10-12; equation numbers cited from memory).
"""

from __future__ import annotations

import json
import re
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest
import torch
import yaml
from conftest import LEAKY, LINEAR_ATTENTION

from blockyard.cli import main
from blockyard.config import config_from_dict, config_hash, dump_config, load_config
from blockyard.errors import UserError
from blockyard.mixers import MIXERS
from blockyard.mixers.plugins import load_plugin
from blockyard.train import run_training

TINY_TRAIN = {"steps": 2, "batch_size": 2, "eval_every": 2, "eval_windows": 1, "log_every": 1,
              "warmup_steps": 0, "checkpoint_every": 2}


def _cli(*args: str, cwd: Path | None = None) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "blockyard", *args], capture_output=True, text=True, timeout=600,
                          cwd=cwd)


def _config(tmp_path: Path, plugin: Path, kind: str, name: str = "cfg.yaml", **extra) -> Path:
    """A tiny trainable config using ``kind`` from ``plugin`` (the plugin path written relative to the config)."""
    data = {"plugins": [str(plugin.relative_to(tmp_path))],
            "model": {"width": 16, "depth": 1, "pattern": ["m"], "mixers": {"m": {"kind": kind}}, "mlp_expansion": 1.0},
            "data": {"corpus": "pydoc", "seq_len": 16}, "train": TINY_TRAIN, **extra}
    path = tmp_path / name
    path.write_text(yaml.safe_dump(data))
    return path


def _copy(src: Path, folder: Path) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    dest = folder / src.name
    dest.write_text(src.read_text())
    return dest


# ----------------------------------------------------------------------------- the example against its paper


def _plugin_module():
    (cls,) = load_plugin(LINEAR_ATTENTION)
    return sys.modules[cls.__module__], cls


def test_parallel_form_matches_the_masked_sum_and_the_recurrence():
    mod, _ = _plugin_module()
    g = torch.Generator().manual_seed(0)
    q, k, v = (torch.randn(2, 3, 9, 4, generator=g, dtype=torch.float64) for _ in range(3))
    phi = lambda x: torch.nn.functional.elu(x) + 1  # noqa: E731 - eq. 7's feature map
    # Eq. 9, written out: y_i = sum_{j<=i} phi(q_i).phi(k_j) v_j / sum_{j<=i} phi(q_i).phi(k_j)
    masked = torch.stack([
        sum((phi(q[:, :, i]) * phi(k[:, :, j])).sum(-1, keepdim=True) * v[:, :, j] for j in range(i + 1))
        / sum((phi(q[:, :, i]) * phi(k[:, :, j])).sum(-1, keepdim=True) for j in range(i + 1))
        for i in range(9)], dim=2)
    # Eqs. 10-12: S_i = S_{i-1} + phi(k_i) v_i^T, z_i = z_{i-1} + phi(k_i), y_i = phi(q_i)^T S_i / phi(q_i)^T z_i
    s, z, outs = torch.zeros(2, 3, 4, 4, dtype=torch.float64), torch.zeros(2, 3, 4, dtype=torch.float64), []
    for i in range(9):
        y, s, z = mod.linear_attention_step(q[:, :, i], k[:, :, i], v[:, :, i], s, z)
        outs.append(y)
    parallel = mod.causal_linear_attention(q, k, v)
    torch.testing.assert_close(parallel, masked, rtol=1e-5, atol=1e-9)  # EPS = 1e-6 in the denominator
    torch.testing.assert_close(torch.stack(outs, dim=2), masked, rtol=1e-5, atol=1e-9)


@pytest.mark.slow
def test_example_passes_check_and_the_leaky_one_fails_at_position_0():
    """The subprocess smoke test of ``check``: the real command's exit codes 0 and 1."""
    good = _cli("check", str(LINEAR_ATTENTION))
    assert good.returncode == 0, good.stdout + good.stderr
    assert "all 10 checks pass" in good.stdout
    bad = _cli("check", str(LEAKY))
    assert bad.returncode == 1, bad.stdout + bad.stderr
    line = next(ln for ln in bad.stdout.splitlines() if "causality" in ln)
    assert "FAIL" in line and "output 0 changes when input 1 does" in line


@pytest.mark.slow
def test_check_a_config_runs_the_model_checks_too(tmp_path):
    plugin = _copy(LINEAR_ATTENTION, tmp_path / "p")
    cfg = _config(tmp_path, plugin, "linear_attention")
    out = _cli("check", str(cfg))
    assert out.returncode == 0, out.stdout + out.stderr
    # the model rows: causality, step, gradients, determinism
    assert sum(ln.startswith("model ") for ln in out.stdout.splitlines()) == 4


# ----------------------------------------------------------------------------- the gate in front of training


def test_train_refuses_a_leaking_plugin_and_writes_nothing(tmp_path, capsys):
    """In-process through the CLI's ``main()``: exit 2 and one line."""
    cfg = _config(tmp_path, _copy(LEAKY, tmp_path / "p"), "leaky_linear_attention")
    run_dir = tmp_path / "run"
    assert main(["train", str(cfg), "--out", str(run_dir)]) == 2
    lines = capsys.readouterr().err.strip().splitlines()
    assert len(lines) == 1
    assert "fails the mixer contract: causality: output 0 changes when input 1 does" in lines[0]
    assert not run_dir.exists()


@pytest.mark.slow
def test_no_check_trains_anyway_and_env_json_says_so(tmp_path):
    cfg = load_config(_config(tmp_path, _copy(LEAKY, tmp_path / "p"), "leaky_linear_attention"))
    summary = run_training(cfg, tmp_path / "run", progress="silent", check=False)
    assert summary["status"] == "done"
    assert json.loads((tmp_path / "run" / "env.json").read_text())["mixer_check"] == "skipped (--no-check)"


@pytest.mark.slow
def test_a_changed_plugin_is_a_changed_config(tmp_path):
    plugin = _copy(LINEAR_ATTENTION, tmp_path / "p")
    cfg_path = _config(tmp_path, plugin, "linear_attention")
    run_dir = tmp_path / "run"
    first = load_config(cfg_path)
    assert run_training(first, run_dir, progress="silent")["status"] == "done"
    env = json.loads((run_dir / "env.json").read_text())
    assert env["mixer_check"] == "passed (causality, mixes_in_time, step) for linear_attention"
    # The run dir keeps the plugin and its config.yaml names the copy.
    assert (run_dir / "plugins" / plugin.name).read_bytes() == plugin.read_bytes()
    assert yaml.safe_load((run_dir / "config.yaml").read_text())["plugins"] == [f"plugins/{plugin.name}"]
    assert config_hash(load_config(run_dir / "config.yaml")) == config_hash(first)
    # Rerun of the same config: already done. An edited plugin: another config, refused without --force.
    assert run_training(first, run_dir, progress="silent")["status"] == "done"
    first_hash = config_hash(first)
    plugin.write_text(plugin.read_text() + "\n# tuned\n")
    second = load_config(cfg_path)
    assert config_hash(second) != first_hash
    with pytest.raises(UserError, match="holds a run of config"):
        run_training(second, run_dir, progress="silent")
    assert run_training(second, run_dir, progress="silent", force=True)["status"] == "done"
    assert (run_dir / "plugins" / plugin.name).read_bytes() == plugin.read_bytes()


# ----------------------------------------------------------------------------- config keys


def test_plugin_paths_resolve_against_the_config_and_extends_merges_the_lists(tmp_path):
    _copy(LINEAR_ATTENTION, tmp_path / "a")
    _copy(LEAKY, tmp_path / "b" / "sub")
    (tmp_path / "a" / "base.yaml").write_text("plugins: [linear_attention.py]\n")
    (tmp_path / "b" / "child.yaml").write_text(
        "extends: ../a/base.yaml\nplugins: [sub/leaky_linear_attention.py]\nmodel: {pattern: [linear_attention]}\n")
    cfg = load_config(tmp_path / "b" / "child.yaml")
    assert [Path(p).name for p in cfg.plugins] == ["linear_attention.py", "leaky_linear_attention.py"]
    assert {"linear_attention", "leaky_linear_attention"} <= set(MIXERS)


def test_hash_follows_content_not_path(tmp_path):
    a, b = _copy(LINEAR_ATTENTION, tmp_path / "a"), _copy(LINEAR_ATTENTION, tmp_path / "b")
    model = {"width": 16, "pattern": ["linear_attention"]}
    ha = config_hash(config_from_dict({"plugins": [str(a)], "model": model}))
    assert config_hash(config_from_dict({"plugins": [str(b)], "model": model})) == ha
    no_plugin = config_from_dict({"model": {"width": 16}})
    assert "plugins" not in yaml.safe_load(dump_config(no_plugin))  # configs without plugins are written as before


def _bad_plugin(tmp_path: Path, body: str) -> Path:
    path = tmp_path / "bad.py"
    path.write_text(textwrap.dedent(body))
    return path


BAD_PLUGINS = {
    "raises": ("import math\nraise RuntimeError('no GPU here')\n", r"bad\.py, line 2: RuntimeError: no GPU here"),
    "no_kind": ("""
        import dataclasses
        from blockyard.mixers import Mixer, register_mixer

        @dataclasses.dataclass(frozen=True)
        class O:
            pass

        @register_mixer
        class NoKind(Mixer):
            Options = O
        """, r"bad\.py, line 9: TypeError: NoKind needs a class attribute 'kind'"),
    "builtin_clash": ("""
        import dataclasses
        from blockyard.mixers import Mixer, register_mixer

        @dataclasses.dataclass(frozen=True)
        class O:
            pass

        @register_mixer
        class Mine(Mixer):
            kind = "lstm"
            Options = O
        """, r"line 9: ValueError: mixer kind 'lstm' is a built-in mixer"),
    "old_kernel_flag": ("""
        import dataclasses
        from blockyard.mixers import Mixer, register_mixer

        @dataclasses.dataclass(frozen=True)
        class O:
            pass

        @register_mixer
        class Old(Mixer):
            kind = "old_flag"
            Options = O
            takes_scan_backend = True
        """, r"line 9: TypeError: Old\.takes_scan_backend was renamed: write takes_kernels = True"),
    "syntax": ("def broken(:\n", r"bad\.py, line 1: SyntaxError"),
    "nothing": ("x = 1\n", r"bad\.py: registers no mixer"),
}


@pytest.mark.parametrize("case", sorted(BAD_PLUGINS))
def test_bad_plugins_are_one_line_errors_naming_file_and_line(tmp_path, case):
    body, pattern = BAD_PLUGINS[case]
    path = _bad_plugin(tmp_path, body)
    before = dict(MIXERS)
    with pytest.raises(UserError, match=pattern):
        config_from_dict({"plugins": [str(path)]})
    assert MIXERS == before  # a failed plugin leaves the registry as it was


@pytest.mark.parametrize("value,key", [("x.py", "plugins"), ([1], "plugins"), (["missing.py"], "plugins[0]")])
def test_bad_plugins_values_name_the_key(tmp_path, value, key):
    with pytest.raises(UserError, match=rf"^{re.escape(key)}: "):
        config_from_dict({"plugins": value})


def test_bad_plugin_from_the_command_line_exits_2_with_one_line(tmp_path, capsys):
    """In-process through the CLI's ``main()``; the subprocess smoke test of ``check`` is the example's test."""
    path = _bad_plugin(tmp_path, BAD_PLUGINS["raises"][0])
    for args in (["check", str(path)], ["train", str(_write(tmp_path / "c.yaml", f"plugins: [{path.name}]\n"))]):
        assert main(args) == 2
        err = capsys.readouterr().err
        assert err.strip().count("\n") == 0 and "bad.py, line 2" in err, err
    assert main(["check", str(tmp_path / "nope.py")]) == 2
    assert "nope.py: no such file" in capsys.readouterr().err


def _write(path: Path, text: str) -> Path:
    path.write_text(text)
    return path
