"""Typed config machinery: frozen dataclasses <-> plain dicts, with validation next to each field.

Every config section is a frozen dataclass whose fields are declared with :func:`opt`, which
records the default, a one-line help text and the allowed values. :func:`parse` turns a plain
dict (from YAML) into such a dataclass, rejecting unknown keys, wrong types and values outside
the allowed range with a :class:`ConfigError` that quotes the dotted key path. Run configs
(``blockyard.config``) and grid files (``blockyard.grid.spec.GridFile``) are both declared this way.
"""

from __future__ import annotations

import dataclasses
import math
import types
import typing
from typing import TYPE_CHECKING, Any, TypeVar

from blockyard.errors import ConfigError

if TYPE_CHECKING:
    from _typeshed import DataclassInstance

T = TypeVar("T", bound="DataclassInstance")


def opt(
    default: Any,
    help: str,
    *,
    choices: typing.Sequence[Any] | None = None,
    min: float | None = None,
    max: float | None = None,
    above: float | None = None,
    allowed: str | None = None,
) -> Any:
    """Declare a config field: its default, what it means, and what values are allowed.

    ``min`` / ``max`` bound numbers inclusively; ``above`` is an exclusive lower bound and asks for a
    finite number. ``allowed`` says in words what the field takes: a value of the wrong type or out of
    range is then refused as ``key: <value>: <allowed>`` instead of the generic text.
    """
    meta = {"help": help, "choices": tuple(choices) if choices else None, "min": min, "max": max, "above": above,
            "allowed": allowed}
    if isinstance(default, (list, dict)):
        raise TypeError("use a tuple (or a default_factory) for container defaults")
    return dataclasses.field(default=default, metadata=meta)


def opt_factory(factory: Any, help: str) -> Any:
    """Declare a field whose default is built by ``factory`` (nested sections, dicts)."""
    return dataclasses.field(default_factory=factory, metadata={"help": help})


def _type_name(tp: Any) -> str:
    origin = typing.get_origin(tp)
    if origin in (tuple, list):
        (arg, *_) = typing.get_args(tp) or (Any,)
        return f"list of {_type_name(arg)}"
    if origin in (typing.Union, types.UnionType):
        return " or ".join(_type_name(a) for a in typing.get_args(tp))
    return {int: "integer", float: "number", bool: "true/false", str: "string",
            type(None): "null"}.get(tp, getattr(tp, "__name__", str(tp)))


def coerce(value: Any, tp: Any, path: str) -> Any:
    """Check ``value`` against the annotation ``tp`` and convert it (lists -> tuples, int -> float)."""
    origin = typing.get_origin(tp)
    if tp is Any:
        return value
    if origin in (typing.Union, types.UnionType):
        for arg in typing.get_args(tp):
            try:
                return coerce(value, arg, path)
            except ConfigError:
                continue
        raise ConfigError(path, f"expected {_type_name(tp)}, got {value!r}")
    if origin in (tuple, list):
        if not isinstance(value, (list, tuple)):
            raise ConfigError(path, f"expected a list, got {value!r}")
        args = typing.get_args(tp)
        item_tp = args[0] if args else Any
        return tuple(coerce(v, item_tp, f"{path}[{i}]") for i, v in enumerate(value))
    if tp is dict or origin is dict:
        if isinstance(value, dict):
            return dict(value)
        raise ConfigError(path, f"expected a mapping, got {value!r}")
    if tp is type(None):
        if value is None:
            return None
        raise ConfigError(path, f"expected null, got {value!r}")
    if tp is bool:
        if isinstance(value, bool):
            return value
        raise ConfigError(path, f"expected true or false, got {value!r}")
    if tp is int:
        if isinstance(value, int) and not isinstance(value, bool):
            return value
        if isinstance(value, float) and value.is_integer():
            return int(value)
        raise ConfigError(path, f"expected an integer, got {value!r}")
    if tp is float:
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            return float(value)
        raise ConfigError(path, f"expected a number, got {value!r}")
    if tp is str:
        if isinstance(value, str):
            return value
        raise ConfigError(path, f"expected a string, got {value!r}")
    if isinstance(tp, type) and dataclasses.is_dataclass(tp):
        return parse(tp, value, path)
    raise TypeError(f"unsupported annotation {tp!r} at {path}")


def _check_range(value: Any, meta: typing.Mapping[str, Any], path: str) -> None:
    choices = meta.get("choices")
    if choices and value not in choices:
        allowed = ", ".join(str(c) for c in choices)
        raise ConfigError(path, f"{value!r} is not allowed (allowed: {allowed})")
    lo, hi, above = meta.get("min"), meta.get("max"), meta.get("above")
    items = value if isinstance(value, tuple) else (value,)
    for v in items:
        if isinstance(v, (int, float)) and not isinstance(v, bool):
            if above is not None and not (math.isfinite(v) and v > above):
                raise ConfigError(path, f"{v!r} is not allowed (must be a finite number > {above})")
            if lo is not None and v < lo:
                raise ConfigError(path, f"{v!r} is too small (must be >= {lo})")
            if hi is not None and v > hi:
                raise ConfigError(path, f"{v!r} is too large (must be <= {hi})")


def parse(cls: type[T], data: Any, path: str = "") -> T:
    """Build the dataclass ``cls`` from a dict, validating every key; missing keys take defaults.

    After the fields are checked, a ``validate(self, path)`` method on ``cls`` (if any) runs the
    cross-field checks. An unknown key is called a ``cls.KEY_NOUN`` (a class variable; default "key").
    """
    if data is None:
        data = {}
    if dataclasses.is_dataclass(data) and isinstance(data, cls):
        return data
    if not isinstance(data, dict):
        raise ConfigError(path, f"expected a mapping of keys, got {data!r}")
    hints = typing.get_type_hints(cls)
    fields = {f.name: f for f in dataclasses.fields(cls) if f.init}
    unknown = sorted(set(data) - set(fields))
    if unknown:
        key = f"{path}.{unknown[0]}" if path else str(unknown[0])
        noun = getattr(cls, "KEY_NOUN", "key")
        raise ConfigError(key, f"unknown {noun} (allowed: {', '.join(sorted(fields))})")
    kwargs = {}
    for name, value in data.items():
        key = f"{path}.{name}" if path else name
        meta = fields[name].metadata
        try:
            parsed = coerce(value, hints[name], key)
            _check_range(parsed, meta, key)
        except ConfigError:
            if not meta.get("allowed"):
                raise
            raise ConfigError(key, f"{value!r}: {meta['allowed']}") from None
        kwargs[name] = parsed
    obj = cls(**kwargs)
    validate = getattr(obj, "validate", None)
    if callable(validate):
        validate(path)
    return obj


def to_dict(obj: Any) -> Any:
    """A dataclass tree as plain dicts, lists and scalars (for YAML and hashing)."""
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        custom = getattr(obj, "to_dict", None)
        if callable(custom):
            return custom()
        return {f.name: to_dict(getattr(obj, f.name)) for f in dataclasses.fields(obj)}
    if isinstance(obj, (list, tuple)):
        return [to_dict(v) for v in obj]
    if isinstance(obj, dict):
        return {k: to_dict(v) for k, v in obj.items()}
    return obj


def field_default(f: dataclasses.Field[Any]) -> Any:
    """The default of a config field (its value, or what its factory builds); every config field has one."""
    if f.default is not dataclasses.MISSING:
        return f.default
    if f.default_factory is not dataclasses.MISSING:
        return f.default_factory()
    raise TypeError(f"field {f.name!r} has no default: declare it with opt() or opt_factory()")


def describe(cls: type, prefix: str = "") -> list[tuple[str, Any, str]]:
    """(dotted key, default, help) for every field of ``cls``, nested sections included."""
    rows: list[tuple[str, Any, str]] = []
    hints = typing.get_type_hints(cls)
    for f in dataclasses.fields(cls):
        key = f"{prefix}{f.name}"
        tp = hints[f.name]
        if isinstance(tp, type) and dataclasses.is_dataclass(tp):
            rows.extend(describe(tp, key + "."))
            continue
        rows.append((key, to_dict(field_default(f)), f.metadata.get("help", "")))
    return rows
