"""Typed settings: dataclasses filled from a recipe YAML plus `key=value` overrides.

One way to override: `section.field=value` (value parsed as YAML). Unknown
keys and wrong types are errors that list the valid keys. Nothing here reads
a default with `.get(key, default)`: defaults live in the dataclasses.

>>> from dataclasses import dataclass
>>> @dataclass
... class Demo:
...     size: int = 3
...     name: str = "a"
>>> apply_overrides(Demo(), ["size=5"]).size
5
>>> apply_overrides(Demo(), ["colour=red"])  # doctest: +IGNORE_EXCEPTION_DETAIL
Traceback (most recent call last):
ConfigError: unknown key 'colour'; valid keys: name, size
"""

from __future__ import annotations

import dataclasses
import types
import typing
from pathlib import Path
from typing import Any

import yaml


class ConfigError(ValueError):
    """A recipe or override names an unknown key or gives a value of the wrong type."""


def _hints(cls) -> dict[str, Any]:
    return typing.get_type_hints(cls)


def _coerce(value: Any, hint: Any, where: str) -> Any:
    origin = typing.get_origin(hint)
    args = typing.get_args(hint)
    if hint is Any:
        return value
    if origin in (typing.Union, types.UnionType):
        if value is None and type(None) in args:
            return None
        for a in args:
            if a is type(None):
                continue
            try:
                return _coerce(value, a, where)
            except ConfigError:
                pass
        raise ConfigError(f"{where}: {value!r} fits none of {hint}")
    if dataclasses.is_dataclass(hint):
        if isinstance(value, hint):
            return value
        if not isinstance(value, dict):
            raise ConfigError(f"{where}: expected a mapping of {hint.__name__} settings, got {value!r}")
        return from_dict(hint, value, where)
    if origin in (tuple, list):
        if not isinstance(value, (list, tuple)):
            raise ConfigError(f"{where}: expected a list, got {value!r}")
        if origin is tuple and args and args[-1] is not Ellipsis:
            if len(args) != len(value):
                raise ConfigError(f"{where}: expected {len(args)} values, got {len(value)}")
            return tuple(_coerce(v, a, f"{where}[{i}]") for i, (v, a) in enumerate(zip(value, args)))
        inner = args[0] if args else Any
        seq = [_coerce(v, inner, f"{where}[{i}]") for i, v in enumerate(value)]
        return tuple(seq) if origin is tuple else seq
    if origin is dict:
        if not isinstance(value, dict):
            raise ConfigError(f"{where}: expected a mapping, got {value!r}")
        return dict(value)
    if hint is bool:
        if isinstance(value, bool):
            return value
        raise ConfigError(f"{where}: expected true or false, got {value!r}")
    if hint is float:
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            return float(value)
        raise ConfigError(f"{where}: expected a number, got {value!r}")
    if hint is int:
        if isinstance(value, int) and not isinstance(value, bool):
            return value
        raise ConfigError(f"{where}: expected a whole number, got {value!r}")
    if hint is str:
        if isinstance(value, str):
            return value
        raise ConfigError(f"{where}: expected text, got {value!r}")
    return value


def require(obj, section: str, positive=(), at_least_zero=(), fraction=()) -> None:
    """Range checks for a settings dataclass (call from __post_init__); errors name the field.

    >>> from dataclasses import dataclass
    >>> @dataclass
    ... class Demo:
    ...     size: int = 3
    ...     def __post_init__(self):
    ...         require(self, "demo", positive=("size",))
    >>> Demo(size=-1)  # doctest: +IGNORE_EXCEPTION_DETAIL
    Traceback (most recent call last):
    ConfigError: demo.size must be above 0, got -1
    """
    for name in positive:
        v = getattr(obj, name)
        if isinstance(v, (int, float)) and not isinstance(v, bool) and v <= 0:
            raise ConfigError(f"{section}.{name} must be above 0, got {v}")
    for name in at_least_zero:
        v = getattr(obj, name)
        if isinstance(v, (int, float)) and not isinstance(v, bool) and v < 0:
            raise ConfigError(f"{section}.{name} cannot be negative, got {v}")
    for name in fraction:
        v = getattr(obj, name)
        if isinstance(v, (int, float)) and not isinstance(v, bool) and not 0 <= v <= 1:
            raise ConfigError(f"{section}.{name} must lie between 0 and 1, got {v}")


def from_dict(cls, data: dict, where: str = "config"):
    """Build dataclass `cls` from a (possibly partial) mapping; missing keys keep defaults."""
    hints = _hints(cls)
    names = [f.name for f in dataclasses.fields(cls)]
    unknown = sorted(set(data) - set(names))
    if unknown:
        raise ConfigError(f"{where}: unknown key {unknown[0]!r}; valid keys: {', '.join(sorted(names))}")
    kwargs = {k: _coerce(v, hints[k], f"{where}.{k}") for k, v in data.items()}
    return cls(**kwargs)


def _set(obj, path: list[str], value: Any, where: str):
    name = path[0]
    names = [f.name for f in dataclasses.fields(obj)]
    if name not in names:
        raise ConfigError(f"unknown key {where + name!r}; valid keys: {', '.join(sorted(names))}")
    hint = _hints(type(obj))[name]
    current = getattr(obj, name)
    if len(path) > 1:
        if not dataclasses.is_dataclass(current):
            raise ConfigError(f"{where + name!r} is a value, not a section")
        new = _set(current, path[1:], value, f"{where}{name}.")
    else:
        new = _coerce(value, hint, where + name)
    return dataclasses.replace(obj, **{name: new})


def apply_overrides(cfg, overrides: list[str]):
    """Apply `a.b=value` strings (value parsed as YAML) to a dataclass tree; returns a new tree."""
    for item in overrides:
        if "=" not in item:
            raise ConfigError(f"override {item!r} must look like section.key=value")
        key, raw = item.split("=", 1)
        try:
            value = yaml.safe_load(raw) if raw.strip() else ""
        except yaml.YAMLError as err:
            raise ConfigError(f"override {item!r}: the value is not valid YAML ({str(err).splitlines()[0]}); "
                              "quote it for the shell, e.g. 'train.trainer={accelerator: gpu, devices: 1}'") from None
        cfg = _set(cfg, key.strip().split("."), value, "")
    return cfg


def to_dict(cfg) -> dict:
    """Dataclass tree -> plain dict (tuples become lists), ready for YAML or JSON."""

    def plain(v):
        if dataclasses.is_dataclass(v):
            return {f.name: plain(getattr(v, f.name)) for f in dataclasses.fields(v)}
        if isinstance(v, (list, tuple)):
            return [plain(x) for x in v]
        if isinstance(v, dict):
            return {k: plain(x) for k, x in v.items()}
        return v

    return plain(cfg)


def load(cls, recipe: str | Path | None = None, overrides: list[str] = ()):
    """Defaults <- recipe YAML (only its differences from defaults) <- overrides."""
    cfg = cls()
    if recipe is not None:
        path = Path(recipe)
        if not path.is_file():
            raise ConfigError(f"{path}: recipe file not found")
        try:
            data = yaml.safe_load(path.read_text(encoding="utf-8")) or {}
        except yaml.YAMLError as err:
            raise ConfigError(f"{path}: not valid YAML: {yaml_problem(err)}") from None
        if not isinstance(data, dict):
            raise ConfigError(f"{path}: a recipe is a mapping of sections")
        merged = _merge(to_dict(cfg), data, str(path))
        cfg = from_dict(cls, merged, str(path))
    return apply_overrides(cfg, list(overrides))


def yaml_problem(err) -> str:
    """One line for a YAML error: what is wrong and where.

    >>> import yaml
    >>> try:
    ...     yaml.safe_load("a: [1, 2")
    ... except yaml.YAMLError as e:
    ...     print(yaml_problem(e))
    line 1, column 9: expected ',' or ']', but got '<stream end>'
    """
    mark = getattr(err, "problem_mark", None)
    problem = getattr(err, "problem", None) or str(err).splitlines()[0]
    return f"line {mark.line + 1}, column {mark.column + 1}: {problem}" if mark is not None else problem


def _merge(base: dict, top: dict, where: str) -> dict:
    out = dict(base)
    for k, v in top.items():  # unknown keys are reported by from_dict, with the valid ones
        both = isinstance(v, dict) and isinstance(base.get(k), dict)
        out[k] = _merge(base[k], v, f"{where}.{k}") if both else v
    return out


def save(cfg, path: str | Path) -> None:
    """Write the final config as YAML (temporary file, then rename)."""
    path = Path(path)
    tmp = path.with_name(path.name + ".tmp")
    tmp.write_text(yaml.safe_dump(to_dict(cfg), sort_keys=False), encoding="utf-8")
    tmp.replace(path)
