"""The config system (blockyard/config.py, blockyard/schema.py): defaults, inheritance, overrides, rejections."""

from __future__ import annotations

import dataclasses
import subprocess
import sys
from pathlib import Path

import pytest
import yaml

from blockyard.cli import main
from blockyard.config import config_from_dict, config_hash, dump_config, load_config, replace
from blockyard.errors import ConfigError, UserError
from blockyard.mixers.attention import GlobalAttentionOptions
from blockyard.schema import opt, parse

REPO = Path(__file__).resolve().parent.parent


def write(path: Path, data: dict | str) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(data if isinstance(data, str) else yaml.safe_dump(data))
    return path


# ----------------------------------------------------------------------------- defaults


def test_empty_config_takes_the_schema_defaults(tmp_path):
    cfg = load_config(write(tmp_path / "tiny.yaml", ""))
    assert cfg.name == "tiny"  # the file's stem
    assert cfg.model.width == 128 and cfg.model.depth == 4 and cfg.model.mlp == "gated"
    assert cfg.model.pattern == ("global_attention",)
    # A bare kind in the pattern is that kind with its option defaults.
    assert cfg.model.mixers["global_attention"].kind == "global_attention"
    assert cfg.model.mixers["global_attention"].options == GlobalAttentionOptions()
    opts = cfg.model.mixers["global_attention"].options
    assert (opts.heads, opts.kv_heads, opts.rope, opts.rope_base) == (4, 0, True, 10000.0)
    assert cfg.data.tokenizer == "bytes" and cfg.data.seq_len == 128
    assert cfg.train.effective_data_seed == cfg.train.seed == 0


def test_local_attention_defaults():
    cfg = config_from_dict({"model": {"pattern": ["local_attention"]}})
    assert cfg.model.mixers["local_attention"].options.window == 64


# ----------------------------------------------------------------------------- extends and --set


def test_extends_follows_a_relative_path_and_merges_nested_keys(tmp_path):
    write(
        tmp_path / "base" / "base.yaml",
        {
            "model": {
                "width": 64,
                "depth": 3,
                "mixers": {"loc": {"kind": "local_attention", "window": 8}},
                "pattern": ["loc"],
            },
            "train": {"lr": 0.01, "steps": 50},
        },
    )
    write(tmp_path / "base" / "middle.yaml", {"extends": "base.yaml", "train": {"steps": 70}})
    child = write(
        tmp_path / "exp" / "child.yaml",
        {
            "extends": "../base/middle.yaml",
            "model": {"mixers": {"loc": {"window": 16}}},
        },
    )
    cfg = load_config(child)
    assert cfg.name == "child"
    assert cfg.model.width == 64 and cfg.model.depth == 3  # inherited from the grandparent
    assert cfg.model.mixers["loc"].kind == "local_attention"  # nested mapping merged, not replaced
    assert cfg.model.mixers["loc"].options.window == 16  # the child wins
    assert cfg.train.steps == 70 and cfg.train.lr == 0.01  # the middle file wins over the base


def test_extends_cycle_is_a_config_error(tmp_path):
    write(tmp_path / "a.yaml", {"extends": "b.yaml"})
    write(tmp_path / "b.yaml", {"extends": "a.yaml"})
    with pytest.raises(ConfigError, match=r"^extends: .*cycle"):
        load_config(tmp_path / "a.yaml")


def test_set_overrides_are_parsed_as_yaml(tmp_path):
    path = write(tmp_path / "c.yaml", {"model": {"width": 128}})
    cfg = load_config(
        path,
        [
            "model.width=64",
            "model.pattern=[local_attention, global_attention]",
            "model.mixers.local_attention.kind=local_attention",
            "model.mixers.local_attention.window=32",
            "model.tie_embeddings=false",
            "train.lr=0.001",
            "name=renamed",
        ],
    )
    assert cfg.model.width == 64 and isinstance(cfg.model.width, int)
    assert cfg.model.pattern == ("local_attention", "global_attention")
    assert cfg.model.mixers["local_attention"].options.window == 32
    assert cfg.model.tie_embeddings is False
    assert cfg.train.lr == 0.001
    assert cfg.name == "renamed"


def test_malformed_override_is_a_user_error(tmp_path):
    path = write(tmp_path / "c.yaml", "")
    with pytest.raises(UserError, match="expected key.path=value"):
        load_config(path, ["model.width"])


# ----------------------------------------------------------------------------- round trip


def test_resolved_config_round_trips_with_the_same_hash(tmp_path):
    path = write(
        tmp_path / "r.yaml",
        {
            "model": {
                "width": 64,
                "pattern": ["g", "loc"],
                "mixers": {
                    "g": {"kind": "global_attention", "kv_heads": 2, "rope": False},
                    "loc": {"kind": "local_attention", "window": 16, "heads": 8, "kv_heads": 1},
                },
            },
            "train": {"lr": 0.002},
        },
    )
    cfg = load_config(path)
    again = config_from_dict(yaml.safe_load(dump_config(cfg)))
    assert again == cfg
    assert config_hash(again) == config_hash(cfg)
    # The hash does see changes (it would be useless otherwise), but not the name.
    assert config_hash(replace(cfg, {"model.mixers.loc.window": 17})) != config_hash(cfg)
    assert config_hash(replace(cfg, {"name": "other"})) == config_hash(cfg)


@pytest.mark.parametrize("preset", sorted((REPO / "configs").glob("*.yaml")), ids=lambda p: p.stem)
def test_presets_round_trip(preset):
    cfg = load_config(preset)
    again = config_from_dict(yaml.safe_load(dump_config(cfg)))
    assert again == cfg and config_hash(again) == config_hash(cfg)


# ----------------------------------------------------------------------------- rejections


def attn(**options):
    return {"model": {"width": 128, "pattern": ["attn"], "mixers": {"attn": {"kind": "global_attention", **options}}}}


REJECTIONS = [
    pytest.param({"model": {"widht": 64}}, "model.widht", "unknown key", id="unknown-key"),
    pytest.param({"trian": {}}, "trian", "unknown key", id="unknown-section"),
    pytest.param({"model": {"width": "big"}}, "model.width", "expected an integer", id="wrong-type"),
    pytest.param({"train": {"lr": [1]}}, "train.lr", "expected a number", id="wrong-type-list"),
    pytest.param({"model": {"depth": 0}}, "model.depth", "must be >= 1", id="depth-below-1"),
    pytest.param(
        {"model": {"pattern": ["l"], "mixers": {"l": {"kind": "local_attention", "window": 0}}}},
        "model.mixers.l.window",
        "must be >= 1",
        id="window-below-1",
    ),
    pytest.param(attn(heads=6), "model.mixers.attn.heads", "6 does not divide model.width 128", id="heads"),
    pytest.param(attn(kv_heads=3), "model.mixers.attn.kv_heads", "3 does not divide heads 4", id="kv-heads"),
    pytest.param(attn(kv_heads=8), "model.mixers.attn.kv_heads", "8 does not divide heads 4", id="kv-above-heads"),
    pytest.param(attn(heads=128), "model.mixers.attn.rope", "even head dim", id="odd-head-dim-with-rope"),
    pytest.param(attn(rope="yes"), "model.mixers.attn.rope", "expected true or false", id="rope-not-bool"),
    pytest.param(
        {"model": {"pattern": ["global_attention", "fancy"]}},
        "model.pattern[1]",
        "'fancy' names no entry",
        id="pattern-without-mixer",
    ),
    pytest.param(
        {"model": {"mixers": {"x": {"kind": "transformerish"}}}},
        "model.mixers.x.kind",
        "is not a mixer kind",
        id="unknown-kind",
    ),
    pytest.param(
        {"model": {"mixers": {"x": {"window": 3}}}}, "model.mixers.x.kind", "is not a mixer kind", id="missing-kind"
    ),
    pytest.param({"model": {"mlp": "wide"}}, "model.mlp", "allowed: gated, plain", id="bad-choice"),
]


@pytest.mark.parametrize("data,key,what", REJECTIONS)
def test_bad_values_raise_config_error_naming_the_key(data, key, what):
    with pytest.raises(ConfigError) as info:
        config_from_dict(data)
    message = str(info.value)
    assert message.startswith(f"{key}: "), message
    assert what in message
    assert "\n" not in message


def test_odd_head_dim_is_fine_without_rope():
    cfg = config_from_dict(attn(heads=128, rope=False))
    assert cfg.model.mixers["attn"].options.heads == 128


# ----------------------------------------------------------------------------- CLI


def run_cli(*args: str, cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "blockyard", *args], cwd=cwd, capture_output=True, text=True, timeout=120
    )


@pytest.mark.parametrize(
    "content,overrides,key",
    [
        ("model:\n  depth: 0\n", [], "model.depth"),
        (
            "model:\n  width: 64\n  mixers:\n    a: {kind: global_attention, heads: 6}\n  pattern: [a]\n",
            [],
            "model.mixers.a.heads",
        ),
        ("model:\n  width: 64\n", ["--set", "model.pattern=[nosuch]"], "model.pattern[0]"),
    ],
    ids=["depth", "heads", "set-override"],
)
def test_train_with_a_bad_config_exits_2_with_one_error_line(tmp_path, capsys, content, overrides, key):
    """In-process through the CLI's ``main()``; the subprocess smoke test for ``train`` is the next one."""
    bad = write(tmp_path / "bad.yaml", content)
    assert main(["train", str(bad), "--out", str(tmp_path / "run"), *overrides]) == 2
    err = capsys.readouterr().err
    lines = err.strip("\n").split("\n")
    assert len(lines) == 1 and lines[0].startswith(f"error: {key}: "), err
    assert not (tmp_path / "run").exists()  # nothing was written for a config that never loaded


@pytest.mark.slow
def test_train_with_a_missing_config_file_exits_2(tmp_path):
    """The real command in a child process: exit 2, one line, no traceback."""
    proc = run_cli("train", str(tmp_path / "nope.yaml"), cwd=tmp_path)
    assert proc.returncode == 2
    assert proc.stderr.startswith("error: ") and "nope.yaml" in proc.stderr and proc.stderr.count("\n") == 1


def test_exponent_floats_without_a_dot_parse_as_numbers(tmp_path):
    # YAML 1.2 core schema reads 1e-3 as a float; PyYAML's YAML 1.1 rules would make it a string.
    from blockyard.config import load_config

    path = tmp_path / "c.yaml"
    path.write_text("train:\n  lr: 3e-4\n")
    cfg = load_config(path, ["train.weight_decay=1e-2"])
    assert cfg.train.lr == 3e-4
    assert cfg.train.weight_decay == 1e-2


# ----------------------------------------------------------------------------- runtime.kernels (was runtime.scan)


@pytest.mark.parametrize("old,new", [("chunked", "torch"), ("compiled", "compiled"), ("reference", "reference")])
def test_the_former_runtime_scan_key_says_what_to_write_instead(tmp_path, capsys, old, new):
    path = write(tmp_path / "old.yaml", f"runtime:\n  scan: {old}\n")
    assert main(["train", str(path), "--out", str(tmp_path / "run")]) == 2
    err = capsys.readouterr().err
    assert err == f"error: runtime.scan: was renamed: write runtime.kernels: {new} instead\n"
    assert not (tmp_path / "run").exists()
    with pytest.raises(ConfigError, match="runtime.scan"):
        load_config(write(tmp_path / "c.yaml", "model: {width: 64}\n"), [f"runtime.scan={old}"])


def test_a_run_dirs_saved_config_from_before_the_rename_is_read_with_the_same_hash(tmp_path):
    """Old run dirs resume: their saved ``runtime.scan: chunked`` reads as ``runtime.kernels: torch``.

    The hash an old version gave that config is recomputed here as its ``dict_hash`` did (sha256 of
    the sorted-key JSON without the name), so a run dir or grid cell keeps its id across the rename.
    """
    import hashlib
    import json

    from blockyard.eval.generate import read_run_config
    from blockyard.train.dirstate import stored_config_hash

    cfg = config_from_dict({"runtime": {"kernels": "torch", "threads": 1}})
    old = yaml.safe_load(dump_config(cfg))
    old["runtime"] = {("scan" if k == "kernels" else k): ("chunked" if k == "kernels" else v)
                      for k, v in old["runtime"].items()}
    (tmp_path / "config.yaml").write_text(yaml.safe_dump(old, sort_keys=False))
    old_hash = hashlib.sha256(json.dumps({k: v for k, v in old.items() if k != "name"}, sort_keys=True,
                                         separators=(",", ":")).encode()).hexdigest()[:8]
    assert stored_config_hash(tmp_path / "config.yaml") == config_hash(cfg) == old_hash
    assert read_run_config(tmp_path).runtime.kernels == "torch"
    other = config_from_dict({"runtime": {"kernels": "compiled", "threads": 1}})
    assert config_hash(other) != config_hash(cfg)  # the choice still enters the hash


def test_compiled_kernels_without_a_working_build_exit_2_at_start_up(tmp_path, capsys, monkeypatch):
    from blockyard.kernels import build

    monkeypatch.setattr(build, "load_kernels", lambda: None)
    monkeypatch.setattr(build, "build_status", lambda: {"error": "no C++ compiler found (tried c++, g++)\nmore"})
    path = write(tmp_path / "c.yaml", "runtime:\n  kernels: compiled\n")
    assert main(["train", str(path), "--out", str(tmp_path / "run")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("error: runtime.kernels: compiled: the C++ kernels do not build")
    assert "no C++ compiler found" in err and "write auto" in err
    assert not (tmp_path / "run").exists()


@dataclasses.dataclass(frozen=True)
class _Rates:
    """A section declared with the schema's exclusive bound (``above``) and its words for what is allowed."""

    rate: float = opt(1.0, "a rate", above=0.0, allowed="a number > 0 (per token)")
    scale: float = opt(1.0, "a scale", above=0.0)


@pytest.mark.parametrize("data, message", [
    ({"rate": 0}, "rate: 0: a number > 0 (per token)"),  # the bound itself is out: "above" is exclusive
    ({"rate": True}, "rate: True: a number > 0 (per token)"),  # a wrong type reads the same words
    ({"rate": "fast"}, "rate: 'fast': a number > 0 (per token)"),
    ({"scale": float("inf")}, "scale: inf is not allowed (must be a finite number > 0.0)"),
    ({"scale": float("nan")}, "scale: nan is not allowed (must be a finite number > 0.0)"),
    ({"scale": -1}, "scale: -1.0 is not allowed (must be a finite number > 0.0)"),
])
def test_exclusive_bounds_and_allowed_words_give_one_line_errors(data, message):
    with pytest.raises(ConfigError) as err:
        parse(_Rates, data)
    assert str(err.value) == message


def test_values_just_above_an_exclusive_bound_are_kept():
    assert parse(_Rates, {"rate": 1e-12, "scale": 3}) == _Rates(rate=1e-12, scale=3.0)
