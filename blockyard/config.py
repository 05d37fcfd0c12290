"""The config schema: every key, its default, its type and its allowed values, in one place.

A config is a tree of frozen dataclasses (``Config`` at the root). YAML is only its
serialisation: ``load_config`` reads a file, follows ``extends:`` (a path relative to the
file), applies ``--set key.path=value`` overrides (values parsed as YAML) and validates the
result. Mixer options are the one exception to "one file": each mixer kind declares its own
``Options`` dataclass next to its code (``blockyard/mixers/``), and ``model.mixers.<name>``
entries are validated against the options of their ``kind``. ``plugins`` (Python files of the
user's own mixers, paths relative to the config file) are loaded before the mixers are read, so
their kinds may be named; ``extends`` chains concatenate the lists, and each file's content hash
is part of ``config_hash``.
"""

from __future__ import annotations

import copy
import dataclasses
import hashlib
import json
import re
from pathlib import Path
from typing import Any

import yaml

from blockyard.data.task_options import PROBE_TASKS, TaskOptions
from blockyard.errors import ConfigError, UserError
from blockyard.schema import opt, opt_factory, parse, to_dict


@dataclasses.dataclass(frozen=True)
class MixerConfig:
    """One named mixer of ``model.mixers``: its kind and that kind's options."""

    kind: str
    options: Any

    def to_dict(self) -> dict[str, Any]:
        return {"kind": self.kind, **to_dict(self.options)}


def _parse_mixer(data: Any, path: str) -> MixerConfig:
    from blockyard.mixers import MIXERS

    if not isinstance(data, dict):
        raise ConfigError(path, f"expected a mapping with a 'kind', got {data!r}")
    data = dict(data)
    kind = data.pop("kind", None)
    if kind not in MIXERS:
        raise ConfigError(f"{path}.kind", f"{kind!r} is not a mixer kind (known: {', '.join(sorted(MIXERS))})")
    return MixerConfig(kind=kind, options=parse(MIXERS[kind].Options, data, path))


@dataclasses.dataclass(frozen=True)
class ModelConfig:
    width: int = opt(128, "model width d (residual stream size)", min=1)
    depth: int = opt(4, "number of residual blocks", min=1)
    pattern: tuple[str, ...] = opt(
        ("global_attention",),
        "mixer names cycled over depth; each is a key of model.mixers or a registered kind",
    )
    mixers: dict = opt_factory(dict, "named mixer configs: name -> {kind: ..., options}")
    mlp: str = opt("gated", "MLP kind: gated = GeGLU (Shazeer 2020), plain = GeLU", choices=("gated", "plain"))
    mlp_expansion: float = opt(3.0, "MLP hidden size as a multiple of width", min=0.0)
    tie_embeddings: bool = opt(True, "output head shares the token embedding matrix")
    norm_eps: float = opt(1e-6, "RMSNorm epsilon", min=0.0)
    init_std: float = opt(0.02, "std of the normal init of embeddings and linear weights", min=0.0)
    parametrization: str = opt(
        "standard", "standard, or mup: init, per-layer Adam lr and output multiplier scaled with width relative "
        "to model.base_width (Yang et al. 2022, arXiv:2203.03466), so an lr tuned at one width transfers",
        choices=("standard", "mup"))
    base_width: int = opt(128, "mup: the width at which mup equals standard (where the lr was tuned)", min=1)
    init_draws: str = opt(
        "by_path", "by_path: each weight (each MLP hidden unit) is drawn from a generator keyed by the init seed and "
        "its path in the model, so the modules two variants share start identical at the same seed and a paired "
        "comparison measures the change, not two initialisations; stream: one random stream in module order "
        "(before this key existed)", choices=("by_path", "stream"))

    def validate(self, path: str) -> None:
        p = f"{path}." if path else ""
        if not self.pattern:
            raise ConfigError(f"{p}pattern", "must name at least one mixer")
        for i, name in enumerate(self.pattern):
            if name not in self.mixers:
                from blockyard.mixers import MIXERS

                known = sorted(set(self.mixers) | set(MIXERS))
                raise ConfigError(
                    f"{p}pattern[{i}]",
                    f"{name!r} names no entry of model.mixers and no mixer kind (known: {', '.join(known)})",
                )
        for name, mixer in self.mixers.items():
            check = getattr(mixer.options, "check_width", None)
            if callable(check):
                check(f"{p}mixers.{name}", self.width)
        hidden = round(self.mlp_expansion * self.width)
        if self.mlp_expansion > 0 and hidden < 1:
            raise ConfigError(f"{p}mlp_expansion", "gives an MLP hidden size of 0")
        if self.parametrization == "mup":
            self._check_base_width(p)

    def _check_base_width(self, p: str) -> None:
        """mup compares each parameter's shape with the model built at ``base_width``, so that model must exist."""
        for name, mixer in self.mixers.items():
            check = getattr(mixer.options, "check_width", None)
            if not callable(check):
                continue
            try:
                check(f"{p}mixers.{name}", self.base_width)
            except ConfigError as e:
                raise ConfigError(f"{p}base_width", f"{self.base_width} is not a valid width for mup ({e})") from None
        if self.mlp_expansion > 0 and round(self.mlp_expansion * self.base_width) < 1:
            raise ConfigError(f"{p}base_width", f"{self.base_width} gives an MLP hidden size of 0")

    def layer_mixers(self) -> list[tuple[str, MixerConfig]]:
        """(name, mixer config) for each of the ``depth`` blocks, the pattern cycled."""
        return [(n, self.mixers[n]) for n in (self.pattern[i % len(self.pattern)] for i in range(self.depth))]

    @property
    def mlp_hidden(self) -> int:
        return round(self.mlp_expansion * self.width)


@dataclasses.dataclass(frozen=True)
class DataConfig:
    corpus: str = opt("pydoc", "a path/glob, hub:NAME[:CONFIG], plays, pydoc or task:NAME")
    text_field: str = opt("text", "field holding the text in .jsonl/.parquet/hub corpora")
    tokenizer: str = opt("bytes", "bytes (UTF-8, vocab 256), chars, or bpe", choices=("bytes", "chars", "bpe"))
    bpe_vocab: int = opt(1024, "BPE vocabulary size (includes the 256 byte symbols)", min=257)
    seq_len: int = opt(128, "training context length in tokens", min=1)
    val_fraction: float = opt(0.05, "share of documents (or of the text) held out for validation", min=0.0, max=0.5)
    test_fraction: float = opt(0.05, "share held out for test", min=0.0, max=0.5)
    errors: str = opt("strict", "undecodable text: strict = error, replace = U+FFFD with a warning",
                      choices=("strict", "replace"))
    cache_dir: str = opt("", "token cache folder (empty: $BLOCKYARD_CACHE or ~/.cache/blockyard)")
    task: TaskOptions = opt_factory(TaskOptions, "synthetic task parameters (blockyard/data/task_options.py)")


@dataclasses.dataclass(frozen=True)
class TrainConfig:
    steps: int = opt(200, "optimizer steps (ignored when train.tokens > 0)", min=1)
    tokens: int = opt(0, "token budget; > 0 sets steps = ceil(tokens / tokens per step)", min=0)
    batch_size: int = opt(16, "sequences per micro-batch", min=1)
    grad_accum: int = opt(1, "micro-batches per optimizer step", min=1)
    lr: float = opt(3e-3, "peak learning rate", min=0.0)
    lr_floor: float = opt(0.1, "final learning rate as a fraction of the peak (cosine floor)", min=0.0, max=1.0)
    warmup_steps: int = opt(20, "linear warmup steps", min=0)
    weight_decay: float = opt(0.1, "AdamW decoupled weight decay", min=0.0)
    ema_half_life: float = opt(
        0.0, "evaluate an exponential moving average of the weights whose half-life is this fraction of the run's "
        "steps (0 = off, the trained weights); val loss is then the averaged model's, raw_loss the trained one's "
        "(blockyard/train/averaging.py)", min=0.0, max=1.0)
    decay_all: bool = opt(False, "also decay norms, biases and embeddings (default: matrices only)")
    beta1: float = opt(0.9, "AdamW beta1", min=0.0, max=1.0)
    beta2: float = opt(0.95, "AdamW beta2", min=0.0, max=1.0)
    grad_clip: float = opt(1.0, "clip the global gradient norm to this (0 = off)", min=0.0)
    seed: int = opt(0, "seed of the parameter init and of the data (unless init_seed / data_seed >= 0)", min=0)
    data_seed: int = opt(-1, "seed of the batch stream and validation windows (-1 = train.seed)", min=-1)
    init_seed: int = opt(-1, "seed of the parameter init only (-1 = train.seed)", min=-1)
    eval_every: int = opt(50, "evaluate on the validation windows every N steps (and at the end)", min=1)
    eval_windows: int = opt(32, "number of fixed validation windows", min=1)
    log_every: int = opt(10, "write a train line every N steps (and at step 1 and the last step)", min=1)
    checkpoint_every: int = opt(100, "checkpoint every N steps (and at the end)", min=1)
    keep_checkpoints: int = opt(2, "keep the last K checkpoints", min=1)
    diverge_factor: float = opt(2.0, "stop as diverged when the loss exceeds this multiple of the first loss", min=1.0)

    @property
    def effective_data_seed(self) -> int:
        return self.seed if self.data_seed < 0 else self.data_seed

    @property
    def effective_init_seed(self) -> int:
        return self.seed if self.init_seed < 0 else self.init_seed


@dataclasses.dataclass(frozen=True)
class EvalConfig:
    probes: tuple[str, ...] = opt((), "probe tasks run at each evaluation: mqar, passkey (blockyard/eval/probes.py)")
    probe_pairs: tuple[int, ...] = opt((4, 8, 16, 32), "mqar probe: numbers of key-value pairs", min=1)
    probe_distances: tuple[int, ...] = opt(
        (16, 64, 256), "passkey probe: filler characters between the key and the question", min=0)
    probe_sequences: int = opt(16, "sequences per probe size", min=1)

    def validate(self, path: str) -> None:
        p = f"{path}." if path else ""
        for i, name in enumerate(self.probes):
            if name not in PROBE_TASKS:
                raise ConfigError(f"{p}probes[{i}]", f"{name!r} is not a probe (known: {', '.join(PROBE_TASKS)})")


@dataclasses.dataclass(frozen=True)
class RuntimeConfig:
    device: str = opt("cpu", "torch device: cpu, or cuda where present")
    threads: int = opt(0, "torch intra-op threads (0 = all cores)", min=0)
    precision: str = opt("fp32", "fp32; bf16 autocast (CPU: where supported); bf16_emulated: bf16 numerics on any "
                         "CPU at about 0.6x fp32 speed, to check what bf16 does to a result",
                         choices=("fp32", "bf16", "bf16_emulated"))
    activation_checkpointing: bool = opt(False, "recompute each residual block in backward to save memory")
    kernels: str = opt("auto", "C++ kernels: compiled = the fused RG-LRU op, the C++ scan and conv, the MLP's fused "
                       "GeGLU and the RMSNorm (exit 2 where they do not build); torch = torch's ops (the chunked "
                       "scan); reference = torch's ops with the sequential scan (the ground truth, slow); "
                       "auto = compiled where it builds, else torch",
                       choices=("auto", "compiled", "torch", "reference"))
    compile: bool = opt(False, "torch.compile the model for training after a 15-40 s warm-up; its gain depends on "
                        "the CPU (blockyard bench prints compiled/eager); eager with a warning where it fails")


@dataclasses.dataclass(frozen=True)
class Config:
    name: str = opt("", "run name (default: the config file's stem)")
    plugins: tuple[str, ...] = opt((), "Python files whose @register_mixer classes join the mixer registry "
                                   "(paths relative to the config file; blockyard/mixers/plugins.py)")
    model: ModelConfig = opt_factory(ModelConfig, "model architecture")
    data: DataConfig = opt_factory(DataConfig, "corpus, tokenizer and windows")
    train: TrainConfig = opt_factory(TrainConfig, "optimisation")
    eval: EvalConfig = opt_factory(EvalConfig, "evaluation extras")
    runtime: RuntimeConfig = opt_factory(RuntimeConfig, "where and how to compute")


# ----------------------------------------------------------------------------- loading


class _Loader(yaml.SafeLoader):
    """SafeLoader that also reads ``1e-3`` as a float (YAML 1.2); PyYAML's 1.1 rules need ``1.0e-3``."""


_Loader.add_implicit_resolver(
    "tag:yaml.org,2002:float",
    re.compile(r"^[-+]?(?:[0-9][0-9_]*)(?:\.[0-9_]*)?[eE][-+]?[0-9]+$"),
    list("-+0123456789"),
)


def yaml_load(text: str) -> Any:
    """Parse YAML text the way every config, grid spec and ``--set`` value is parsed."""
    return yaml.load(text, Loader=_Loader)  # noqa: S506 - a SafeLoader subclass


def deep_merge(base: dict[str, Any], over: dict[str, Any]) -> dict[str, Any]:
    """``over`` on top of ``base``: nested mappings merge, everything else replaces."""
    out = copy.deepcopy(base)
    for key, value in over.items():
        if isinstance(value, dict) and isinstance(out.get(key), dict):
            out[key] = deep_merge(out[key], value)
        else:
            out[key] = copy.deepcopy(value)
    return out


def read_yaml(path: Path) -> dict[str, Any]:
    """A YAML mapping from ``path``; a missing file or bad YAML is a one-line UserError."""
    try:
        text = path.read_text()
    except FileNotFoundError:
        raise UserError(f"{path}: no such config file") from None
    except (IsADirectoryError, PermissionError, UnicodeDecodeError) as e:
        raise UserError(f"{path}: cannot read config ({e.__class__.__name__})") from None
    try:
        data = yaml_load(text)
    except yaml.YAMLError as e:
        mark = getattr(e, "problem_mark", None)
        where = f" line {mark.line + 1}" if mark else ""
        raise UserError(f"{path}:{where} invalid YAML ({getattr(e, 'problem', e)})") from None
    if data is None:
        return {}
    if not isinstance(data, dict):
        raise UserError(f"{path}: a config must be a mapping of keys, got {type(data).__name__}")
    return data


def resolve_extends(data: dict[str, Any], base_dir: Path, seen: tuple[Path, ...] = ()) -> dict[str, Any]:
    """Follow ``extends:`` chains (paths relative to the including file's folder).

    ``plugins`` paths are made absolute against the folder of the file that lists them, and the
    lists of a chain are concatenated (the parent's first) rather than replaced.
    """
    from blockyard.mixers.plugins import resolve_plugin_paths

    parent = data.pop("extends", None)
    if "plugins" in data:
        data["plugins"] = [str(p) for p in resolve_plugin_paths(data["plugins"], base_dir)]
    if parent is None:
        return data
    if not isinstance(parent, str):
        raise ConfigError("extends", f"expected a path string, got {parent!r}")
    ppath = (base_dir / parent).resolve()
    if ppath in seen:
        raise ConfigError("extends", f"{ppath} extends itself (cycle)")
    pdata = resolve_extends(read_yaml(ppath), ppath.parent, (*seen, ppath))
    merged = deep_merge(pdata, data)
    if "plugins" in pdata and "plugins" in data:
        merged["plugins"] = list(dict.fromkeys([*pdata["plugins"], *data["plugins"]]))
    return merged


def parse_override(item: str) -> tuple[list[str], Any]:
    """``a.b.c=value`` -> (['a', 'b', 'c'], YAML-parsed value)."""
    key, sep, raw = item.partition("=")
    if not sep or not key or any(not part for part in key.split(".")):
        raise UserError(f"--set {item!r}: expected key.path=value")
    try:
        value = yaml_load(raw) if raw.strip() else ""
    except yaml.YAMLError:
        value = raw
    return key.split("."), value


def set_dotted(data: dict[str, Any], key: str, value: Any) -> None:
    """``data[a][b][c] = value`` for ``key = 'a.b.c'``, creating sections on the way (values as given).

    The one walk down a dotted key path, shared by ``--set`` and the grid's overrides.
    """
    parts = key.split(".")
    node = data
    for i, part in enumerate(parts[:-1]):
        nxt = node.get(part)
        if nxt is None:
            nxt = node[part] = {}
        if not isinstance(nxt, dict):
            raise ConfigError(key, f"{'.'.join(parts[: i + 1])} is a value, not a section")
        node = nxt
    node[parts[-1]] = copy.deepcopy(value)


def apply_overrides(data: dict[str, Any], overrides: list[str] | tuple[str, ...]) -> dict[str, Any]:
    """Set each ``key.path=value`` into a copy of ``data``, creating mappings on the way."""
    out = copy.deepcopy(data)
    for item in overrides:
        keys, value = parse_override(item)
        try:
            set_dotted(out, ".".join(keys), value)
        except ConfigError as e:
            raise UserError(f"--set {item!r}: {str(e).removeprefix(e.path + ': ')}") from None
    return out


# ----------------------------------------------------------------------------- renamed keys

# ``runtime.kernels`` was called ``runtime.scan``, and its value ``torch`` was called ``chunked``.
FORMER_KERNELS_KEY = "scan"
FORMER_KERNELS_VALUES = {"chunked": "torch"}


def refuse_former_keys(data: dict[str, Any]) -> None:
    """A config that still writes ``runtime.scan`` gets one line saying what to write instead."""
    runtime = data.get("runtime")
    if isinstance(runtime, dict) and FORMER_KERNELS_KEY in runtime:
        value = runtime[FORMER_KERNELS_KEY]
        new = FORMER_KERNELS_VALUES.get(value, value) if isinstance(value, str) else "auto"
        raise ConfigError(f"runtime.{FORMER_KERNELS_KEY}", f"was renamed: write runtime.kernels: {new} instead")


def saved_config_data(data: dict[str, Any]) -> dict[str, Any]:
    """A run dir's own saved config in today's keys: one written before ``runtime.scan`` was renamed
    ``runtime.kernels`` is translated silently (same choice, same hash), so old run dirs resume."""
    runtime = data.get("runtime")
    if not isinstance(runtime, dict) or FORMER_KERNELS_KEY not in runtime:
        return data
    runtime = dict(runtime)
    value = runtime.pop(FORMER_KERNELS_KEY)
    runtime["kernels"] = FORMER_KERNELS_VALUES.get(value, value)
    return {**data, "runtime": runtime}


def _hash_form(data: dict[str, Any]) -> dict[str, Any]:
    """``data`` with ``runtime.kernels`` spelled as it was before the rename (``runtime.scan``, ``torch``
    as ``chunked``), so every run dir and grid cell hashed before the rename keeps its hash."""
    runtime = data.get("runtime")
    if not isinstance(runtime, dict) or "kernels" not in runtime:
        return data
    former = {new: old for old, new in FORMER_KERNELS_VALUES.items()}
    runtime = {FORMER_KERNELS_KEY if k == "kernels" else k: former.get(v, v) if k == "kernels" else v
               for k, v in runtime.items()}
    return {**data, "runtime": runtime}


def config_from_dict(data: dict[str, Any], base_dir: Path | None = None) -> Config:
    """Validate a plain dict (already merged) into a ``Config``; mixer entries by their kind.

    ``plugins`` are loaded first (relative paths against ``base_dir``, else the current directory).
    """
    from blockyard.mixers import MIXERS
    from blockyard.mixers.plugins import load_plugins, resolve_plugin_paths

    refuse_former_keys(data)
    data = copy.deepcopy(data)
    if "plugins" in data:
        plugin_paths = resolve_plugin_paths(data["plugins"], base_dir)
        load_plugins(plugin_paths)
        data["plugins"] = [str(p) for p in plugin_paths]
    model = data.get("model")
    if model is None:
        model = data["model"] = {}
    if not isinstance(model, dict):
        raise ConfigError("model", f"expected a mapping of keys, got {model!r}")
    raw_mixers = model.get("mixers") or {}
    if not isinstance(raw_mixers, dict):
        raise ConfigError("model.mixers", "expected a mapping name -> {kind: ..., options}")
    mixers = {}
    for name, entry in raw_mixers.items():
        mixers[str(name)] = _parse_mixer(entry, f"model.mixers.{name}")
    pattern = model.get("pattern", ModelConfig.__dataclass_fields__["pattern"].default)
    if isinstance(pattern, (list, tuple)):
        for name in pattern:
            if isinstance(name, str) and name not in mixers and name in MIXERS:
                # A bare kind in the pattern is that kind with its default options.
                mixers[name] = MixerConfig(kind=name, options=parse(MIXERS[name].Options, {}, f"model.mixers.{name}"))
    model["mixers"] = mixers
    return parse(Config, data)


def load_config(path: str | Path, overrides: list[str] | tuple[str, ...] = ()) -> Config:
    """Read, inherit, override and validate a config file."""
    path = Path(path)
    data = resolve_extends(read_yaml(path), path.resolve().parent, (path.resolve(),))
    data = apply_overrides(data, overrides)
    if not data.get("name"):
        data["name"] = path.stem
    return config_from_dict(data, path.resolve().parent)


def replace(cfg: Config, overrides: dict[str, Any]) -> Config:
    """A new validated config with dotted-key overrides applied (used by grids)."""
    data = to_dict(cfg)
    items = [f"{k}={json.dumps(v)}" for k, v in overrides.items()]
    return config_from_dict(apply_overrides(data, items))


def dump_config(cfg: Config, plugins: list[str] | None = None) -> str:
    """The fully resolved config as YAML (what a run dir's ``config.yaml`` holds).

    ``plugins``: the entries to write instead of ``cfg.plugins`` (paths of copies, relative to
    the YAML file), so that a run dir names the plugin files it keeps.
    """
    data = to_dict(cfg)
    if plugins is not None:
        data["plugins"] = list(plugins)
    if not data["plugins"]:
        del data["plugins"]
    return yaml.safe_dump(data, sort_keys=False)


def dict_hash(data: dict[str, Any], base_dir: Path | None = None, length: int = 8) -> str:
    """The hash of a resolved config dict, as :func:`config_hash` computes it for the parsed config.

    Plugin files enter by content hash, not by path, read when this is called: a copy of the same
    file hashes the same; an edited file is another config. No plugins, no key: configs without plugins keep
    the hashes they had before the key existed.
    """
    from blockyard.mixers.plugins import file_digest, resolve_plugin_paths

    data = _hash_form(dict(data))
    data.pop("name", None)
    paths = resolve_plugin_paths(data.pop("plugins", None), base_dir)
    if paths:
        data["plugins"] = [file_digest(p) for p in paths]
    blob = json.dumps(data, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(blob.encode()).hexdigest()[:length]


def config_hash(cfg: Config, length: int = 8) -> str:
    """Short stable hash of everything that defines a run (the name excluded, plugin contents included)."""
    return dict_hash(to_dict(cfg), length=length)
