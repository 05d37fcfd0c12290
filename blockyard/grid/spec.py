"""The grid spec: a base config crossed with axes, variants and seeds, expanded into cells.

A grid file (YAML) holds::

    name: gate-ablation              # optional; default: the file's stem
    description: one line of why     # optional
    base: ../recurrence-only.yaml    # a config path relative to this file, or an inline mapping
    variants:                        # named sets of dotted-key overrides (several keys at once)
      gate_on:  {}
      gate_off: {model.mixers.recurrence.gate: false}
    reference: gate_on               # what every other variant is compared against
    axes:                            # dotted key -> list of values, crossed with each other
      model.width: [64, 96]
    seeds: [0, 1, 2]                 # each sets train.seed (init and data); or {first: 3, most: 10}
    budget_hours: 8                  # with seeds: {..., most: auto}: most = what fits in 8 h (blockyard.grid.budget)
    match: params                    # none | params | flops (see blockyard.grid.fairness)
    smallest_effect: 0.01            # nats/token: the smallest difference that matters (verdicts)
    null_control: false              # true: add the reference again under another init seed
    tune: {key: train.lr, values: [...], seeds: [100]}  # each variant at its own value (blockyard.grid.tuning);
                                     #   with a ladder, rungs: first tunes rung 1 and carries the value up
    ladder: [{model.width: 32}, ...] # optional: rungs of model size (see blockyard.grid.ladder), with
    tokens_per_param: 20             #   each rung's budget and a size to extrapolate to
    ladder_target: 1.0e7

The top-level keys are declared in ``GridFile`` with the run configs' schema machinery
(``blockyard.schema``: types, defaults, allowed values, help; ``blockyard grid --keys`` lists them).
Every cell is (variant, rung, one value per axis, seed). Each cell's config is validated by
``blockyard.config``; errors name the variant, axis or cell they come from.

``seeds: {first: F, most: M, step: S}`` runs seeds 0..F-1 first (``start: K`` numbers them from K instead),
then adds S seeds per round to the reference and every still-undecided variant until all are decided or M is
reached (see ``blockyard.grid.rounds``); the cells of every seed up to M are the grid's potential cells.
"""

from __future__ import annotations

import copy
import dataclasses
import itertools
import json
import re
from pathlib import Path
from typing import Any, ClassVar, TypeGuard, cast

from blockyard.config import Config, config_from_dict, read_yaml, resolve_extends, set_dotted
from blockyard.errors import ConfigError, UserError
from blockyard.grid.ladder import MIN_RUNGS, RUNG, Ladder, check_conflicts, parse_ladder, rung_overrides, rung_points
from blockyard.grid.tuning import Tuning, check_tuned_key, parse_tuning, value_for
from blockyard.schema import describe, opt, parse
from blockyard.text import aligned_table

MATCH_MODES = ("none", "params", "flops")
# The key each match mode adjusts (blockyard.grid.fairness); a tuning may not search it.
MATCHED_KEYS = {"params": "model.mlp_expansion", "flops": "train.tokens"}
SCHEDULE_KEYS = ("first", "most", "step", "start")
AUTO = "auto"  # seeds.most: auto (with budget_hours)
DEFAULT_SMALLEST_EFFECT = 0.01  # nats per token
# The variant name of a grid that declares no variants.
BASE_VARIANT = "base"
# The group ``null_control: true`` adds: the reference under init seed NULL_INIT_OFFSET + seed.
NULL_VARIANT = "null-control"
NULL_INIT_OFFSET = 1_000_000
# Keys a grid may not override: the seeds come from ``seeds:`` (the cells of one seed share their
# init, batches and validation windows: that is what pairs them), the name is the cell id.
_SEED_KEYS = ("train.seed", "train.data_seed", "train.init_seed")
_RESERVED_KEYS = (*_SEED_KEYS, "name")
_NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.\-]*$")
_NAME_RULE = "use letters, digits, '_', '.' and '-' (it names the grid dir)"


@dataclasses.dataclass(frozen=True)
class GridFile:
    """The grid file's top-level keys: type, default, allowed values and meaning (``blockyard grid --keys``).

    Read by ``blockyard.schema.parse`` like a run config, so an unknown key, a wrong type or a value
    out of range is the same one-line error. ``seeds`` and ``ladder`` take several shapes and are
    checked by their own parsers (``_parse_seeds``, ``blockyard.grid.ladder.parse_ladder``); the rules
    between keys (a reference needs variants, budget_hours needs seeds.most: auto) by ``parse_grid``.
    """

    KEY_NOUN: ClassVar[str] = "grid key"

    name: str | None = opt(None, "the grid's name; names its dir under runs/grids/ (default: the file's stem)",
                           allowed=_NAME_RULE)
    description: str | None = opt(None, "one line of why the grid exists (the report's first line)")
    base: str | dict | None = opt(None, "required: the base config, a path relative to the grid file or an inline "
                                  "mapping (extends: is followed)",
                                  allowed="a config path (relative to the grid file) or an inline mapping")
    variants: dict | None = opt(None, "named sets of dotted-key overrides, name -> {dotted.key: value}; none: one "
                                f"variant, {BASE_VARIANT}", allowed="a mapping: variant name -> {dotted.key: value}")
    reference: str | None = opt(None, "the variant every other one is compared against (required with variants)",
                                allowed="the name of a variant")
    axes: dict | None = opt(None, "dotted key -> list of values; the axes are crossed with each other and the "
                            "variants", allowed="a mapping: dotted.key -> [values]")
    seeds: Any = opt(None, "required: a list of distinct seeds >= 0 (each sets train.seed: init and data), or "
                     "{first: F, most: M, step: S, start: K}: seeds added in rounds until every comparison is "
                     "decided (blockyard.grid.rounds); most: auto with budget_hours")
    match: str = opt("none", "fairness: none, params (variants matched to the reference's parameter count through "
                     "model.mlp_expansion) or flops (through train.tokens); blockyard.grid.fairness",
                     choices=MATCH_MODES)
    smallest_effect: float = opt(DEFAULT_SMALLEST_EFFECT, "nats/token: the smallest difference that matters "
                                 "(blockyard.grid.verdicts)", above=0.0,
                                 allowed=f"a number > 0 (nats per token; default {DEFAULT_SMALLEST_EFFECT})")
    null_control: bool = opt(False, f"add the reference again under another init seed ({NULL_VARIANT}): a "
                             "measured check that the grid finds no difference where there is none",
                             allowed="true or false")
    tune: dict | None = opt(None, "choose each variant's value of one numeric key in a first stage: {key, values, "
                            "seeds, budget, rungs} (blockyard.grid.tuning)",
                            allowed="a mapping: {key: train.lr, values: [...], seeds: [...], budget: 1.0}")
    budget_hours: float | None = opt(None, "with seeds.most: auto: the hours the worst case may take "
                                     "(blockyard.grid.budget)", above=0.0,
                                     allowed="a number of hours > 0 (with seeds.most: auto)")
    ladder: Any = opt(None, f"rungs of model size, smallest first: a list of at least {MIN_RUNGS} mappings of dotted "
                      "keys (blockyard.grid.ladder)")
    tokens_per_param: float | None = opt(
        None, "with a ladder: each rung's token budget as this many tokens per non-embedding parameter of the "
        "reference", above=0.0, allowed="a number > 0 (training tokens per non-embedding parameter of the reference "
        "at each rung; about 20 is compute-optimal)")
    ladder_target: float | None = opt(None, "with a ladder: a non-embedding parameter count to extrapolate the gaps "
                                      "to", above=0.0, allowed="a non-embedding parameter count (> 0) to extrapolate "
                                      "to")


def grid_keys_text() -> str:
    """Every grid-file key with its default and meaning (``blockyard grid --keys``), from ``GridFile``."""
    rows = [(key, "-" if default is None else json.dumps(default), help_text)
            for key, default, help_text in describe(GridFile)]
    return aligned_table(["key", "default", "meaning"], rows)


@dataclasses.dataclass(frozen=True)
class SeedSchedule:
    """``seeds: {first, most, step}``: seeds added in rounds until every comparison is decided."""

    first: int
    most: int  # with ``auto``: seeds.first until blockyard.grid.budget resolves it from ``budget_hours``
    step: int = 1
    auto: bool = False  # ``most: auto``: the most seeds whose worst case fits in ``budget_hours``
    budget_hours: float | None = None
    start: int = 0  # the first seed number: seeds start .. start + most - 1 (another set of seeds, same design)

    def looks(self) -> tuple[int, ...]:
        """Seeds per group after each round: first, first + step, ..., most."""
        return (*range(self.first, self.most, self.step), self.most)

    def seed_order(self) -> tuple[int, ...]:
        """The seed numbers in the order rounds add them."""
        return tuple(range(self.start, self.start + self.most))


@dataclasses.dataclass(frozen=True)
class Design:
    """How a grid's cells become verdicts (``blockyard.grid.verdicts``); recorded in the grid index."""

    smallest_effect: float = DEFAULT_SMALLEST_EFFECT
    schedule: SeedSchedule | None = None  # None: a fixed list of seeds, one look
    null_control: bool = False

    def to_json(self) -> str:
        return json.dumps(dataclasses.asdict(self), sort_keys=True)

    @classmethod
    def from_json(cls, text: str | None) -> Design:
        """The recorded design; a grid dir from before designs were recorded gets the defaults."""
        if not text:
            return cls()
        data = json.loads(text)
        schedule = SeedSchedule(**data["schedule"]) if data.get("schedule") else None  # keys added later default
        return cls(float(data["smallest_effect"]), schedule, bool(data.get("null_control")))


@dataclasses.dataclass(frozen=True)
class GridSpec:
    """A parsed, validated grid file (before fairness matching)."""

    name: str
    description: str
    text: str  # the grid file's text (copied into the grid dir)
    base: dict[str, Any]  # the base config as a plain dict, ``extends:`` resolved
    variants: dict[str, dict[str, Any]]  # name -> {dotted key: value}; {BASE_VARIANT: {}} if none
    reference: str | None
    axes: dict[str, tuple[Any, ...]]  # dotted key -> values
    seeds: tuple[int, ...]  # every seed a cell may get (with a schedule: 0 .. most - 1)
    match: str
    design: Design = Design()
    tuning: Tuning | None = None  # the ``tune`` block: stage 1 chooses each variant's value
    ladder: Ladder | None = None  # rungs of model size: the first part of every point

    @property
    def groups(self) -> list[str]:
        """Variant names in plan order, the null control (if any) right after the reference."""
        names = list(self.variants)
        if self.design.null_control and self.reference is not None:
            names.insert(names.index(self.reference) + 1, NULL_VARIANT)
        return names


@dataclasses.dataclass(frozen=True)
class Cell:
    """One training run of the grid: a variant at one axis point and one seed."""

    id: str
    variant: str
    point: tuple[tuple[str, Any], ...]  # (("rung", k) with a ladder, (dotted axis key, value), ...) in axis order
    seed: int
    overrides: dict[str, Any]  # every dotted-key override applied to the base, in order
    cfg: Config
    # Fairness adjustments (dotted key -> value) applied on top; empty for the reference.
    adjustments: dict[str, Any] = dataclasses.field(default_factory=dict)

    @property
    def point_label(self) -> str:
        """The axis point in words (``width=64, depth=3``); empty without axes."""
        return ", ".join(f"{k}={_value_text(v)}" for k, v in self.point)


# ----------------------------------------------------------------------------- reading


def load_grid(path: str | Path) -> GridSpec:
    """Read and validate a grid file; every cell's config is validated too."""
    path = Path(path)
    if path.is_dir():
        raise UserError(f"{path}: is a folder; expected a grid YAML file")
    data = read_yaml(path)
    text = path.read_text()
    return parse_grid(data, base_dir=path.resolve().parent, default_name=path.stem, text=text)


def parse_grid(
    data: dict[str, Any],
    *,
    base_dir: Path,
    default_name: str = "grid",
    text: str | None = None,
) -> GridSpec:
    """Validate a grid mapping (the parsed YAML); relative paths resolve against ``base_dir``."""
    f = parse(GridFile, data)
    name = f.name or default_name
    if not _NAME_RE.match(name):
        raise ConfigError("name", f"{name!r}: {_NAME_RULE}")
    base = _parse_base(f.base, base_dir)
    variants = _parse_variants(f.variants)
    reference = _parse_reference(f.reference, variants, declared=f.variants is not None)
    axes = _parse_axes(f.axes)
    seeds, schedule = _parse_seeds(f.seeds, f.budget_hours)
    design = Design(f.smallest_effect, schedule, _check_null_control(f.null_control, reference, variants))
    if f.match != "none" and reference is None:
        raise ConfigError("match", f"match: {f.match} needs variants and a reference to match against")
    for key in axes:
        for vname, overrides in variants.items():
            if key in overrides:
                raise ConfigError(f"axes.{key}", f"also set by variants.{vname}; set each key in one place")
    set_by = {**{k: f"variants.{v}" for v, o in variants.items() for k in o}, **{k: "axes" for k in axes}}
    ladder = parse_ladder(f.ladder, f.tokens_per_param, f.ladder_target, _check_override_key)
    if ladder is not None:
        check_conflicts(ladder, axes, variants)
        for i, rung in enumerate(ladder.rungs, start=1):
            for k in rung:
                set_by.setdefault(k, ladder.rung_path(i))
    tuning = parse_tuning(f.tune, seeds=seeds, reserved=_RESERVED_KEYS, matched_key=MATCHED_KEYS.get(f.match),
                          set_by=set_by, has_ladder=ladder is not None)
    spec = GridSpec(
        name=name,
        description=(f.description or "").strip(),
        text=text if text is not None else json.dumps(data, indent=2, default=str),
        base=base,
        variants=variants,
        reference=reference,
        axes=axes,
        seeds=seeds,
        match=f.match,
        design=design,
        tuning=tuning,
        ladder=ladder,
    )
    _validate_pieces(spec)
    return spec


def _parse_base(raw: str | dict | None, base_dir: Path) -> dict[str, Any]:
    if raw is None:
        raise ConfigError("base", "required: a config path (relative to the grid file) or an inline mapping")
    if isinstance(raw, str):
        path = (base_dir / raw).resolve()
        try:
            data = read_yaml(path)
        except UserError as e:
            raise ConfigError("base", str(e)) from None
        return resolve_extends(data, path.parent, (path,))
    return resolve_extends(copy.deepcopy(raw), base_dir)


def _check_override_key(path: str, key: Any) -> str:
    if not isinstance(key, str) or not key or any(not part for part in key.split(".")):
        raise ConfigError(path, f"{key!r} is not a dotted config key (e.g. model.width)")
    if key in _RESERVED_KEYS:
        why = ("set to the cell id" if key == "name" else
               "set by seeds: the cells of one seed share init, batches and validation windows, which pairs them"
               + ("; null_control: true adds the reference under another init seed" if key != "train.seed" else ""))
        raise ConfigError(f"{path}.{key}", f"cannot be overridden in a grid ({why})")
    return key


def _parse_variants(raw: dict | None) -> dict[str, dict[str, Any]]:
    if raw is None:
        return {BASE_VARIANT: {}}
    if not raw:
        raise ConfigError("variants", "expected a mapping: variant name -> {dotted.key: value, ...}")
    variants: dict[str, dict[str, Any]] = {}
    for vname, overrides in raw.items():
        if not isinstance(vname, str) or not _NAME_RE.match(vname):
            raise ConfigError(f"variants.{vname}", "variant names use letters, digits, '_', '.' and '-'")
        if overrides is None:
            overrides = {}
        if not isinstance(overrides, dict):
            raise ConfigError(f"variants.{vname}", f"expected a mapping of dotted keys to values, got {overrides!r}")
        for key in overrides:
            _check_override_key(f"variants.{vname}", key)
        variants[vname] = dict(overrides)
    return variants


def _parse_reference(raw: str | None, variants: dict[str, dict[str, Any]], *, declared: bool) -> str | None:
    if not declared:
        if raw is not None:
            raise ConfigError("reference", "names a variant, but the grid declares no variants")
        return None
    if raw is None:
        raise ConfigError("reference", f"required with variants: one of {', '.join(variants)}")
    if raw not in variants:
        raise ConfigError("reference", f"{raw!r} is not a variant (variants: {', '.join(variants)})")
    return raw


def _parse_axes(raw: dict | None) -> dict[str, tuple[Any, ...]]:
    if raw is None:
        return {}
    axes: dict[str, tuple[Any, ...]] = {}
    for key, values in raw.items():
        _check_override_key("axes", key)
        if not isinstance(values, list) or not values:
            raise ConfigError(f"axes.{key}", "expected a list of values")
        texts = [json.dumps(v, sort_keys=True) for v in values]
        if len(set(texts)) != len(texts):
            raise ConfigError(f"axes.{key}", "lists a value twice")
        axes[key] = tuple(values)
    return axes


def _parse_seeds(raw: Any, budget_hours: float | None = None) -> tuple[tuple[int, ...], SeedSchedule | None]:
    """A list of seeds (fixed design), or ``{first, most, step}`` (seeds 0 .. most - 1, added in rounds);
    ``most: auto`` goes with ``budget_hours`` and nothing else."""
    schedule = _parse_schedule(raw) if isinstance(raw, dict) else None
    if budget_hours is not None and (schedule is None or not schedule.auto):
        raise ConfigError("budget_hours", "only with seeds: {first: F, most: auto, step: S} (it sets most); "
                          "remove it or set seeds.most: auto")
    if schedule is not None and schedule.auto:
        schedule = dataclasses.replace(schedule, budget_hours=_parse_budget_hours(budget_hours))
    if schedule is not None:
        return schedule.seed_order(), schedule
    allowed = "expected a list of distinct non-negative integers, e.g. [0, 1, 2], or {first: 3, most: 10}"
    if not isinstance(raw, list) or not raw:
        raise ConfigError("seeds", allowed)
    for s in raw:
        if not _is_int(s) or s < 0:
            raise ConfigError("seeds", f"{s!r}: {allowed}")
    if len(set(raw)) != len(raw):
        raise ConfigError("seeds", f"lists a seed twice; {allowed}")
    return tuple(raw), None


def _is_int(x: Any) -> TypeGuard[int]:
    return isinstance(x, int) and not isinstance(x, bool)


def _parse_schedule(raw: dict[str, Any]) -> SeedSchedule:
    unknown = sorted(str(k) for k in set(raw) - set(SCHEDULE_KEYS))
    if unknown:
        raise ConfigError(f"seeds.{unknown[0]}", f"unknown key (allowed: {', '.join(SCHEDULE_KEYS)})")
    first, most, step = raw.get("first"), raw.get("most"), raw.get("step", 1)
    if not _is_int(first) or first < 2:
        raise ConfigError("seeds.first", f"{first!r}: an integer >= 2 (an interval needs two pairs)")
    auto = most == AUTO
    if not auto and (not _is_int(most) or most < first):
        raise ConfigError("seeds.most", f"{most!r}: an integer >= seeds.first ({first}), or auto with budget_hours")
    if not _is_int(step) or step < 1:
        raise ConfigError("seeds.step", f"{step!r}: an integer >= 1 (seeds added per round)")
    start = raw.get("start", 0)
    if not _is_int(start) or start < 0:
        raise ConfigError("seeds.start", f"{start!r}: an integer >= 0 (the first seed number; default 0)")
    return SeedSchedule(first, first if auto else cast(int, most), step, auto=auto, start=start)


def _parse_budget_hours(raw: float | None) -> float:
    if raw is None:
        raise ConfigError("seeds.most", "auto needs the grid key budget_hours: H (hours the worst case may take)")
    return raw


def _check_null_control(on: bool, reference: str | None, variants: dict[str, dict[str, Any]]) -> bool:
    if on and reference is None:
        raise ConfigError("null_control", "needs variants and a reference (the null control repeats the reference)")
    if on and NULL_VARIANT in variants:
        raise ConfigError("null_control", f"the grid already has a variant named {NULL_VARIANT}; rename it")
    return on


# ----------------------------------------------------------------------------- configs


def config_with(base: dict[str, Any], overrides: dict[str, Any]) -> Config:
    """The base dict with dotted-key overrides applied, validated (``blockyard.config.replace`` on a dict)."""
    data = copy.deepcopy(base)
    for key, value in overrides.items():
        set_dotted(data, key, value)
    _default_mixer_kinds(data)
    return config_from_dict(data)


def _default_mixer_kinds(data: dict[str, Any]) -> None:
    """``model.mixers.<kind>.<option>`` set without a ``kind``: the entry named after a mixer kind is that kind.

    This mirrors the config rule that a bare kind in ``model.pattern`` is that kind with default
    options, so a variant can set ``model.mixers.recurrence.gate`` whether or not the base spelled
    the entry out.
    """
    from blockyard.mixers import MIXERS

    mixers = (data.get("model") or {}).get("mixers") if isinstance(data.get("model"), dict) else None
    if not isinstance(mixers, dict):
        return
    for name, entry in mixers.items():
        if isinstance(entry, dict) and "kind" not in entry and name in MIXERS:
            entry["kind"] = name


def _validate_pieces(spec: GridSpec) -> None:
    """Each variant alone, then each axis value alone, on the base: errors name their source."""
    try:
        config_with(spec.base, {})
    except ConfigError as e:
        raise ConfigError("base", str(e)) from None
    for vname, overrides in spec.variants.items():
        try:
            config_with(spec.base, overrides)
        except ConfigError as e:
            raise ConfigError(f"variants.{vname}", str(e)) from None
    for key, values in spec.axes.items():
        for value in values:
            try:
                config_with(spec.base, {key: value})
            except ConfigError as e:
                detail = str(e).removeprefix(f"{key}: ")
                raise ConfigError(f"axes.{key}", f"value {_value_text(value)}: {detail}") from None
    ladder = spec.ladder
    for k, rung in enumerate(ladder.rungs if ladder is not None else (), start=1):
        try:
            config_with(spec.base, rung)
        except ConfigError as e:
            raise ConfigError(ladder.rung_path(k) if ladder is not None else "ladder", str(e)) from None
    if spec.tuning is not None:
        _validate_tuning(spec, spec.tuning)


def _validate_tuning(spec: GridSpec, tuning: Tuning) -> None:
    """The tuned key is a number in every variant; each value is valid there."""
    check_tuned_key(tuning, {v: config_with(spec.base, o) for v, o in spec.variants.items()})
    for value in tuning.values:
        try:
            config_with(spec.base, {tuning.key: value})
        except ConfigError as e:
            detail = str(e).removeprefix(f"{tuning.key}: ")
            raise ConfigError("tune.values", f"value {_value_text(value)}: {detail}") from None


def _value_text(value: Any) -> str:
    if isinstance(value, (list, tuple)):
        return "[" + ",".join(_value_text(v) for v in value) + "]"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, dict):
        return json.dumps(value, sort_keys=True)
    return str(value)


def _slug(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.]+", "_", text).strip("_") or "x"


def _axis_labels(keys: list[str]) -> dict[str, str]:
    """Short labels for cell ids: the key's last part, or the whole key where those collide."""
    last = [k.split(".")[-1] for k in keys]
    return {k: (short if last.count(short) == 1 else k.replace(".", "_")) for k, short in zip(keys, last, strict=True)}


def cell_id(variant: str, point: tuple[tuple[str, Any], ...], seed: int, labels: dict[str, str]) -> str:
    """``<variant>-<axis><value>...-seed<k>``: the cell's folder name under ``cells/``."""
    parts = [variant] + [_slug(f"{labels[k]}{_value_text(v)}") for k, v in point] + [f"seed{seed}"]
    return "-".join(parts)


def expand_cells(spec: GridSpec) -> list[Cell]:
    """Every (group, rung, axis point, seed), its config validated; order: group (``spec.groups``), point, seed."""
    keys = list(spec.axes)
    labels = {RUNG: RUNG, **_axis_labels(keys)}
    points = [rung + tuple(zip(keys, combo, strict=True))
              for rung in rung_points(spec.ladder)
              for combo in itertools.product(*(spec.axes[k] for k in keys))]
    cells: list[Cell] = []
    seen: dict[str, Cell] = {}
    for vname in spec.groups:
        for point in points:
            for seed in spec.seeds:
                cid = cell_id(vname, point, seed, labels)
                overrides = {**_group_overrides(spec, vname, seed), **rung_overrides(spec.ladder, point),
                             **{k: v for k, v in point if k != RUNG}, "train.seed": seed, "name": cid}
                try:
                    cfg = config_with(spec.base, overrides)
                except ConfigError as e:
                    raise ConfigError(f"cell {cid}", str(e)) from None
                cell = Cell(id=cid, variant=vname, point=point, seed=seed, overrides=overrides, cfg=cfg)
                if cid in seen:
                    raise UserError(f"axes: cells {seen[cid].overrides} and {overrides} share the id {cid}; "
                                    "use values that read differently")
                seen[cid] = cell
                cells.append(cell)
    return cells


def _group_overrides(spec: GridSpec, name: str, seed: int) -> dict[str, Any]:
    """A variant's overrides; the null control's are the reference's under another init seed."""
    if name == NULL_VARIANT and name not in spec.variants:
        return {**spec.variants[spec.reference or ""], "train.init_seed": NULL_INIT_OFFSET + seed}
    return spec.variants[name]


# ----------------------------------------------------------------------------- tuning (two stages)


def tuning_cells(spec: GridSpec, cells: list[Cell]) -> list[Cell]:
    """Stage 1: every tuned (variant, point) of ``cells`` (the verdict cells, matched, untuned) at each value and
    tuning seed, with the verdict cell's fairness adjustments and ``tune.budget`` x its budget.

    A tuning cell's point is the verdict point with ``(tune.key, value)`` appended; the null control
    is not tuned (it follows the reference).
    """
    tuning = spec.tuning
    if tuning is None:
        return []
    templates: dict[tuple, Cell] = {}
    for c in cells:
        if c.variant != NULL_VARIANT:
            templates.setdefault((c.variant, c.point), c)
    labels = {RUNG: RUNG, **_axis_labels([*spec.axes, tuning.key])}
    out = []
    for point in tuning.tuned_points(p for _, p in templates):
        for (variant, _), template in ((k, t) for k, t in templates.items() if k[1] == point):
            fixed = {**template.overrides, **template.adjustments, **tuning.budget_overrides(template.cfg)}
            for value in tuning.values:
                tpoint = (*point, (tuning.key, value))
                for seed in tuning.seeds:
                    cid = cell_id(variant, tpoint, seed, labels)
                    overrides = {**fixed, tuning.key: value, "train.seed": seed, "name": cid}
                    try:
                        cfg = config_with(spec.base, overrides)
                    except ConfigError as e:
                        raise ConfigError(f"tuning cell {cid}", str(e)) from None
                    out.append(Cell(cid, variant, tpoint, seed, overrides, cfg, dict(template.adjustments)))
    return out


def tuned_cells(spec: GridSpec, cells: list[Cell], chosen: dict[tuple, float]) -> list[Cell]:
    """Stage 2: the verdict cells, each at its variant's chosen value (the null control at the reference's)."""
    tuning = spec.tuning
    if tuning is None:
        return cells
    out = []
    for c in cells:
        owner = spec.reference if c.variant == NULL_VARIANT and NULL_VARIANT not in spec.variants else c.variant
        value = value_for(tuning, chosen, owner or c.variant, c.point)
        overrides = {**c.overrides, tuning.key: value}
        out.append(dataclasses.replace(c, overrides=overrides, cfg=config_with(spec.base, {**overrides,
                                                                                             **c.adjustments})))
    return out
