"""Turn plain TOML tables into frozen dataclasses, checking every value once.

The parser is driven by the dataclasses' own field types and metadata, so a config section is
declared in one place (``pipeline/config.py``) and nothing downstream re-checks a value or reads
a raw dict. Field metadata understood here:

``doc``      one line shown in the template and in errors
``unit``     unit of the value (``"s"``, ``"um"``, ...)
``ge``/``gt``/``le``/``lt``   numeric bounds
``path``     ``"file"`` (must exist), ``"dir"`` (must exist), ``"out"`` (may not exist yet)
``length``   exact length of a tuple value
"""

from __future__ import annotations

import dataclasses
import difflib
import types
import typing
from pathlib import Path
from typing import Any, Literal, Union, get_args, get_origin

from pipeline.errors import ConfigError

__all__ = ["parse_section", "closest", "describe"]


def closest(word: str, options: typing.Iterable[str]) -> str:
    """Return ``" (did you mean 'x'?)"`` for the nearest option, or an empty string."""
    match = difflib.get_close_matches(word, list(options), n=1, cutoff=0.6)
    return f" (did you mean {match[0]!r}?)" if match else ""


def describe(value: Any) -> str:
    """Show a value as the user wrote it in TOML."""
    if isinstance(value, str):
        return repr(value)
    if isinstance(value, bool):
        return "true" if value else "false"
    return repr(value)


class _Ctx(typing.NamedTuple):
    source: str
    base_dir: Path
    check_files: bool


def _fail(ctx: _Ctx, key: str, value: Any, expected: str) -> ConfigError:
    return ConfigError(f"{ctx.source}: {key} = {describe(value)}: expected {expected}")


def _is_optional(tp: Any) -> tuple[bool, Any]:
    origin = get_origin(tp)
    if origin in (Union, types.UnionType):
        args = [a for a in get_args(tp) if a is not type(None)]
        if len(args) == 1 and len(get_args(tp)) == 2:
            return True, args[0]
    return False, tp


def _parse_value(ctx: _Ctx, key: str, value: Any, tp: Any, meta: typing.Mapping[str, Any]) -> Any:
    optional, tp = _is_optional(tp)
    if value is None and optional:
        return None
    origin = get_origin(tp)
    if tp is bool:
        if not isinstance(value, bool):
            raise _fail(ctx, key, value, "true or false")
        return value
    if tp is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise _fail(ctx, key, value, "a whole number")
        _check_bounds(ctx, key, value, meta)
        return value
    if tp is float:
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise _fail(ctx, key, value, "a number" + _unit(meta))
        _check_bounds(ctx, key, value, meta)
        return float(value)
    if tp is str:
        if not isinstance(value, str):
            raise _fail(ctx, key, value, "a string")
        return value
    if tp is Path:
        return _parse_path(ctx, key, value, meta)
    if origin is Literal:
        choices = get_args(tp)
        if value not in choices:
            hint = closest(value, [str(c) for c in choices]) if isinstance(value, str) else ""
            allowed = ", ".join(describe(c) for c in choices)
            raise ConfigError(
                f"{ctx.source}: {key} = {describe(value)}: expected one of {allowed}{hint}"
            )
        return value
    if origin is tuple:
        return _parse_tuple(ctx, key, value, tp, meta)
    if origin is dict:
        if not isinstance(value, dict):
            raise _fail(ctx, key, value, "a table")
        _, vt = get_args(tp)
        return types.MappingProxyType(
            {str(k): _parse_value(ctx, f"{key}.{k}", v, vt, {}) for k, v in value.items()}
        )
    if dataclasses.is_dataclass(tp):
        if not isinstance(value, dict):
            raise _fail(ctx, key, value, "a table")
        return parse_section(typing.cast(type, tp), value, key, source=ctx.source, base_dir=ctx.base_dir,
                             check_files=ctx.check_files)
    raise TypeError(f"config field {key} has an unsupported type {tp!r}")  # a bug, not user input


def _unit(meta: typing.Mapping[str, Any]) -> str:
    return f" in {meta['unit']}" if "unit" in meta else ""


def _check_bounds(ctx: _Ctx, key: str, value: float, meta: typing.Mapping[str, Any]) -> None:
    unit = f" {meta['unit']}" if "unit" in meta else ""
    if "gt" in meta and not value > meta["gt"]:
        raise _fail(ctx, key, value, f"a value > {meta['gt']}{unit}")
    if "ge" in meta and not value >= meta["ge"]:
        raise _fail(ctx, key, value, f"a value >= {meta['ge']}{unit}")
    if "lt" in meta and not value < meta["lt"]:
        raise _fail(ctx, key, value, f"a value < {meta['lt']}{unit}")
    if "le" in meta and not value <= meta["le"]:
        raise _fail(ctx, key, value, f"a value <= {meta['le']}{unit}")


def _parse_tuple(ctx: _Ctx, key: str, value: Any, tp: Any, meta: typing.Mapping[str, Any]) -> tuple:
    if not isinstance(value, list):
        raise _fail(ctx, key, value, "a list [ ... ]")
    args = get_args(tp)
    if len(args) == 2 and args[1] is Ellipsis:
        item_types = [args[0]] * len(value)
    else:
        item_types = list(args)
        if len(value) != len(item_types):
            raise _fail(ctx, key, value, f"a list of {len(item_types)} values")
    if "length" in meta and len(value) != meta["length"]:
        raise _fail(ctx, key, value, f"a list of {meta['length']} values")
    item_meta = {k: v for k, v in meta.items() if k in ("gt", "ge", "lt", "le", "unit", "path")}
    return tuple(
        _parse_value(ctx, f"{key}[{i}]", v, t, item_meta)
        for i, (v, t) in enumerate(zip(value, item_types, strict=True))
    )


def _parse_path(ctx: _Ctx, key: str, value: Any, meta: typing.Mapping[str, Any]) -> Path:
    if not isinstance(value, str) or not value:
        raise _fail(ctx, key, value, "a path string")
    path = Path(value).expanduser()
    if not path.is_absolute():
        # resolved, so messages and logs show runs/demo rather than configs/../runs/demo
        path = (ctx.base_dir / path).resolve()
    kind = meta.get("path", "out")
    if ctx.check_files and kind == "file" and not path.is_file():
        raise ConfigError(f"{ctx.source}: {key} = {describe(value)}: no such file {path}")
    if ctx.check_files and kind == "dir" and not path.is_dir():
        raise ConfigError(f"{ctx.source}: {key} = {describe(value)}: no such folder {path}")
    return path


def parse_section(
    cls: type,
    table: typing.Mapping[str, Any],
    section: str,
    *,
    source: str,
    base_dir: Path,
    check_files: bool = True,
) -> Any:
    """Build the frozen dataclass ``cls`` from one TOML table.

    Raises
    ------
    ConfigError
        For an unknown key (with a suggestion), a missing required key, or a bad value; the
        message names ``section.key``, the value seen and what is allowed.
    """
    ctx = _Ctx(source, base_dir, check_files)
    hints = typing.get_type_hints(cls)
    fields = {f.name: f for f in dataclasses.fields(cls) if f.init}
    for key in table:
        if key not in fields:
            hint = closest(key, fields)
            raise ConfigError(
                f"{source}: unknown key {section}.{key}{hint}; "
                f"allowed keys: {', '.join(sorted(fields))}"
            )
    kwargs = {}
    for name, f in fields.items():
        full = f"{section}.{name}"
        if name in table:
            kwargs[name] = _parse_value(ctx, full, table[name], hints[name], f.metadata)
        elif f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING:
            doc = f.metadata.get("doc", "")
            raise ConfigError(f"{source}: missing required key {full} ({doc})")
    obj = cls(**kwargs)
    check = getattr(obj, "check", None)
    if callable(check):
        problem = check()
        if problem:
            raise ConfigError(f"{source}: [{section}] {problem}")
    return obj
