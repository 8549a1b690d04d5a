"""A small declarative validator: turn a parsed TOML table into a frozen dataclass.

Each dataclass field may carry ``metadata={"check": fn}`` where ``fn(value)`` returns ``None``
when the value is fine, or a phrase saying what is allowed ("an integer ≥ 1"). Unknown keys,
wrong types and failed checks all raise one `SweepError` naming the file, the key path, the
bad value and what is allowed, with a "did you mean" for misspelt keys.
"""

from __future__ import annotations

import dataclasses
import math
import types
import typing
from collections.abc import Callable
from typing import Any, Literal, get_args, get_origin, get_type_hints

from kablate.errors import SweepError, did_you_mean

Check = Callable[[Any], str | None]


def check(fn: Check, default: Any = dataclasses.MISSING) -> Any:
    """A dataclass field whose value must pass ``fn``."""
    if default is dataclasses.MISSING:
        return dataclasses.field(metadata={"check": fn})
    if isinstance(default, list | dict):
        return dataclasses.field(
            default_factory=lambda: type(default)(default), metadata={"check": fn}
        )
    return dataclasses.field(default=default, metadata={"check": fn})


def at_least(low: float, kind: str = "an integer") -> Check:
    return lambda v: None if v >= low else f"must be {kind} ≥ {low:g}"


def between(low: float, high: float, kind: str = "a number") -> Check:
    return lambda v: None if low <= v <= high else f"must be {kind} from {low:g} to {high:g}"


def below(high: float, kind: str = "a number") -> Check:
    return lambda v: None if 0 <= v < high else f"must be {kind} ≥ 0 and < {high:g}"


def describe(value: Any) -> str:
    """How a bad value is shown in an error message: on one line, at most about 60 characters."""
    readable = isinstance(value, str) and value.isprintable()
    text = f'"{value}"' if readable else repr(value)
    return text if len(text) <= 60 else f"{text[:57]}..."


class Where:
    """The file and key path of the value being read."""

    def __init__(self, source: str, path: str = ""):
        self.source, self.path = source, path

    def key(self, name: str | int) -> Where:
        if isinstance(name, int):
            return Where(self.source, f"{self.path}[{name}]")
        return Where(self.source, f"{self.path}.{name}" if self.path else name)

    def fail(self, message: str) -> SweepError:
        return SweepError(self.source, self.path, message)


def read_table(cls: type, raw: Any, where: Where) -> Any:
    """Build dataclass ``cls`` from the table ``raw``; raise `SweepError` on anything wrong."""
    if not isinstance(raw, dict):
        raise where.fail(f"must be a table, but got {describe(raw)}")
    fields = {f.name: f for f in dataclasses.fields(cls) if f.init}
    hints = get_type_hints(cls)
    for name in raw:
        if name not in fields:
            hint = did_you_mean(name, list(fields))
            allowed = ", ".join(sorted(fields))
            raise where.key(name).fail(f"is not a known key{hint} (allowed here: {allowed})")
    values = {}
    for name, field in fields.items():
        if name not in raw:
            if (
                field.default is dataclasses.MISSING
                and field.default_factory is dataclasses.MISSING
            ):
                raise where.key(name).fail("is required but missing")
            continue
        value = read_value(hints[name], raw[name], where.key(name))
        fn = field.metadata.get("check")
        problem = fn(value) if fn else None
        if problem:
            raise where.key(name).fail(f"{problem}, but got {describe(raw[name])}")
        values[name] = value
    return cls(**values)


def read_value(hint: Any, raw: Any, where: Where) -> Any:
    """Read one value of type ``hint``: scalars, Literal, tuples, dicts, dataclasses, Optional."""
    origin, args = get_origin(hint), get_args(hint)
    if origin in (typing.Union, types.UnionType):
        inner = [a for a in args if a is not type(None)]
        if raw is None and len(inner) < len(args):
            return None
        return read_value(inner[0], raw, where)
    if dataclasses.is_dataclass(hint):
        return read_table(hint, raw, where)
    if origin is Literal:
        if raw not in args:
            allowed = ", ".join(describe(a) for a in args)
            hint_text = did_you_mean(str(raw), [str(a) for a in args])
            raise where.fail(f"must be one of {allowed}, but got {describe(raw)}{hint_text}")
        return raw
    if origin is tuple:
        if not isinstance(raw, list):
            raise where.fail(f"must be a list, but got {describe(raw)}")
        return tuple(read_value(args[0], item, where.key(i)) for i, item in enumerate(raw))
    if origin is dict:
        if not isinstance(raw, dict):
            raise where.fail(f"must be a table, but got {describe(raw)}")
        return {k: read_value(args[1], v, where.key(k)) for k, v in raw.items()}
    return read_scalar(hint, raw, where)


def read_scalar(hint: type, raw: Any, where: Where) -> Any:
    # TOML booleans are Python bools, which are also ints: keep them apart.
    if hint is bool:
        ok = isinstance(raw, bool)
    elif hint is int:
        ok = isinstance(raw, int) and not isinstance(raw, bool)
    elif hint is float:
        ok = isinstance(raw, int | float) and not isinstance(raw, bool)
        # TOML writes inf and nan, and integers too large for a float; no setting means them.
        if ok and not (math.isfinite(raw) if isinstance(raw, float) else abs(raw) < 1e308):
            raise where.fail(f"must be a finite number, but got {describe(raw)}")
        raw = float(raw) if ok else raw
    elif hint is str:
        ok = isinstance(raw, str)
    elif hint is Any:
        ok = True
    else:  # pragma: no cover - a schema bug, not a user error
        raise TypeError(f"unsupported schema type {hint!r}")
    if not ok:
        names = {bool: "true or false", int: "an integer", float: "a number", str: "a string"}
        raise where.fail(f"must be {names[hint]}, but got {describe(raw)}")
    return raw
