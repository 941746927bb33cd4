"""Typed dataclass configs loaded from TOML (stdlib tomllib), strict about keys and types.

Shared by every stage; torch-free so the runtime and bench can use it.
"""
from __future__ import annotations

import dataclasses
import json
import sys
import types
import typing
from pathlib import Path
from typing import Any, TypeVar

from .errors import InputError

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - Python 3.10
    import tomli as tomllib

T = TypeVar("T")


class ConfigError(InputError):
    pass


def _check_type(where: str, value: Any, tp: Any) -> Any:
    origin = typing.get_origin(tp)
    args = typing.get_args(tp)
    if tp is Any:
        return value
    if origin in (typing.Union, types.UnionType):
        for a in args:
            try:
                return _check_type(where, value, a)
            except ConfigError:
                continue
        raise ConfigError(f"{where}: {value!r} is not a {_tname(tp)}")
    if tp is type(None):
        if value is None:
            return None
        raise ConfigError(f"{where}: {value!r} is not none")
    if dataclasses.is_dataclass(tp):
        if not isinstance(value, dict):
            raise ConfigError(f"{where}: expected a table, got {value!r}")
        return from_dict(tp, value, where)
    if origin in (list, tuple):
        if not isinstance(value, (list, tuple)):
            raise ConfigError(f"{where}: expected a list, got {value!r}")
        item = args[0] if args else Any
        vals = [_check_type(f"{where}[{i}]", v, item) for i, v in enumerate(value)]
        return tuple(vals) if origin is tuple else vals
    if origin is dict:
        if not isinstance(value, dict):
            raise ConfigError(f"{where}: expected a table, got {value!r}")
        return {k: _check_type(f"{where}.{k}", v, args[1] if args else Any) for k, v in value.items()}
    if tp in (dict, list):
        if not isinstance(value, tp):
            raise ConfigError(f"{where}: expected a {'table' if tp is dict else 'list'}, got {value!r}")
        return value
    if tp is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ConfigError(f"{where}: {value!r} is not a number")
        return float(value)
    if tp is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise ConfigError(f"{where}: {value!r} is not an integer")
        return value
    if tp is bool:
        if not isinstance(value, bool):
            raise ConfigError(f"{where}: {value!r} is not true/false")
        return value
    if tp is str:
        if not isinstance(value, str):
            raise ConfigError(f"{where}: {value!r} is not a string")
        return value
    return value


def _tname(tp: Any) -> str:
    return getattr(tp, "__name__", str(tp))


def from_dict(cls: type[T], data: dict, where: str = "") -> T:
    """Build dataclass `cls` from a dict; unknown keys and wrong types name the key."""
    hints = typing.get_type_hints(cls)
    fields = {f.name: f for f in dataclasses.fields(cls)}
    unknown = [k for k in data if k not in fields]
    if unknown:
        prefix = f"{where}." if where else ""
        raise ConfigError(f"unknown key {prefix}{unknown[0]!r} (known: {', '.join(fields)})")
    kwargs = {k: _check_type(f"{where}.{k}" if where else k, v, hints[k]) for k, v in data.items()}
    try:
        return cls(**kwargs)
    except ValueError as e:
        raise ConfigError(str(e)) from None
    except TypeError as e:
        raise ConfigError(f"{where or cls.__name__}: {e}") from None


BASE_KEY = "base"


def _merge(base: dict, top: dict) -> dict:
    """`top` over `base`: tables merge key by key, anything else (values, lists, arrays of
    tables such as a recipe's [[student]] list) is replaced whole."""
    out = dict(base)
    for k, v in top.items():
        out[k] = _merge(out[k], v) if isinstance(v, dict) and isinstance(out.get(k), dict) else v
    return out


def read_toml(path: Path, _seen: tuple[Path, ...] = ()) -> dict:
    """A TOML file as a dict, with its `base = "other.toml"` (a path relative to the file)
    read first and overridden by this file's keys: configs that differ in a few settings
    name their common file instead of repeating it."""
    path = Path(path)
    if not path.is_file():
        raise ConfigError(f"{path}: no such config file")
    try:
        data = tomllib.loads(path.read_text())
    except tomllib.TOMLDecodeError as e:
        raise ConfigError(f"{path}: not valid TOML ({e})") from None
    if BASE_KEY not in data:
        return data
    ref = data.pop(BASE_KEY)
    if not isinstance(ref, str) or not ref:
        raise ConfigError(f"{path}: {BASE_KEY} = {ref!r}: expected the path of another TOML file")
    base_path = (path.parent / ref).resolve()
    chain = _seen + (path.resolve(),)
    if base_path in chain:
        raise ConfigError(f"{path}: {BASE_KEY} = {ref!r} includes itself "
                          f"({' -> '.join(p.name for p in chain + (base_path,))})")
    if not base_path.is_file():
        raise ConfigError(f"{path}: {BASE_KEY} = {ref!r}: no such file ({base_path})")
    return _merge(read_toml(base_path, chain), data)


def load(cls: type[T], path: Path | None, overrides: dict | None = None) -> T:
    """Load TOML at `path` (or defaults when None; `base` includes resolved, read_toml),
    apply non-None overrides, validate."""
    data: dict = {}
    if path is not None:
        path = Path(path)
        data = read_toml(path)
    for k, v in (overrides or {}).items():
        if v is not None:
            data[k] = v
    try:
        return from_dict(cls, data)
    except ConfigError as e:
        raise ConfigError(f"{path}: {e}" if path else str(e)) from None


def to_jsonable(cfg: Any) -> Any:
    if dataclasses.is_dataclass(cfg):
        return {f.name: to_jsonable(getattr(cfg, f.name)) for f in dataclasses.fields(cfg)}
    if isinstance(cfg, (list, tuple)):
        return [to_jsonable(v) for v in cfg]
    if isinstance(cfg, dict):
        return {k: to_jsonable(v) for k, v in cfg.items()}
    if isinstance(cfg, Path):
        return str(cfg)
    return cfg


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, list):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, dict):  # inline table
        return "{" + ", ".join(f"{k} = {_toml_value(x)}" for k, x in v.items() if x is not None) + "}"
    raise TypeError(f"cannot write {v!r} as TOML")


def dumps_toml(cfg: Any) -> str:
    """Write a resolved config as TOML (flat keys, then one table per nested dict/list of dicts)."""
    data = to_jsonable(cfg)
    lines, tables = [], []
    for k, v in data.items():
        if v is None:
            continue
        if isinstance(v, dict):
            tables.append((k, v, False))
        elif isinstance(v, list) and v and isinstance(v[0], dict):
            tables.append((k, v, True))
        else:
            lines.append(f"{k} = {_toml_value(v)}")
    for k, v, is_array in tables:
        for item in (v if is_array else [v]):
            lines.append("")
            lines.append(f"[[{k}]]" if is_array else f"[{k}]")
            lines += [f"{ik} = {_toml_value(iv)}" for ik, iv in item.items() if iv is not None]
    return "\n".join(lines) + "\n"
