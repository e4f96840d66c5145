"""A small declarative schema for the TOML config.

Each config section is a frozen dataclass whose fields carry, in their metadata, a parser and a
one-line doc. :func:`parse_section` walks a TOML table against such a class: unknown keys are
errors (with a "did you mean"), values are parsed and checked, and every error names the full
config key (``layers.pipes.fields.diameter``) and what it expects.

Quantities are strings with a unit, parsed with pint and converted to SI once here:
``"20 psi"``, ``"140 kPa"``, ``"0.5 m"``, ``"1000 gpm"``, ``"5 ft/s"``. Pressures are returned
as metres of water head.
"""

from __future__ import annotations

import dataclasses
import difflib
from collections.abc import Callable, Iterable
from typing import Any

from gridflow.errors import ConfigError
from gridflow.units import FT, GPM, INCH, KPA_PER_M_HEAD, M_HEAD_PER_PSI, RHO_WATER, G

__all__ = [
    "opt",
    "parse_section",
    "P_STR",
    "P_BOOL",
    "P_INT",
    "P_FLOAT",
    "one_of",
    "quantity",
    "section",
    "table_of",
    "list_of",
    "str_map",
    "number_map",
    "reference_rows",
]

Parser = Callable[[Any, str], Any]


def opt(default: Any = dataclasses.MISSING, *, parse: Parser, doc: str,
        default_factory: Any = dataclasses.MISSING) -> Any:
    """A config field: its parser, its one-line doc, and its default (none: required)."""
    meta = {"parse": parse, "doc": doc}
    if default_factory is not dataclasses.MISSING:
        return dataclasses.field(default_factory=default_factory, metadata=meta)
    return dataclasses.field(default=default, metadata=meta)


def parse_section(cls: type, table: Any, where: str) -> Any:
    """Parse a TOML table into the dataclass ``cls``; ``where`` is the key path for messages."""
    if not isinstance(table, dict):
        raise ConfigError(f"config key {where or '(top level)'} must be a table, got "
                          f"{type(table).__name__}", key=where or None)
    fields = {f.name: f for f in dataclasses.fields(cls) if "parse" in f.metadata}
    unknown = [k for k in table if k not in fields]
    if unknown:
        k = unknown[0]
        near = difflib.get_close_matches(k, list(fields), n=1)
        hint = f"; did you mean {near[0]!r}?" if near else f"; known keys: {', '.join(fields)}"
        raise ConfigError(f"unknown config key {_join(where, k)}{hint}", key=_join(where, k))
    values = {}
    for name, f in fields.items():
        key = _join(where, name)
        if name in table:
            values[name] = f.metadata["parse"](table[name], key)
        elif f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING:
            raise ConfigError(f"config key {key} is required: {f.metadata['doc']}", key=key)
    return cls(**values)


def _join(where: str, key: str) -> str:
    return f"{where}.{key}" if where else key


def _type_error(key: str, expected: str, value: Any) -> ConfigError:
    return ConfigError(f"config key {key} expects {expected}, got {value!r} "
                       f"({type(value).__name__})", key=key)


def P_STR(value: Any, key: str) -> str:
    if not isinstance(value, str):
        raise _type_error(key, "a string", value)
    return value


def P_BOOL(value: Any, key: str) -> bool:
    if not isinstance(value, bool):
        raise _type_error(key, "true or false", value)
    return value


def P_INT(value: Any, key: str) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        raise _type_error(key, "a whole number", value)
    return value


def P_FLOAT(value: Any, key: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise _type_error(key, "a number", value)
    return float(value)


def one_of(*choices: str) -> Parser:
    def parse(value: Any, key: str) -> str:
        if value not in choices:
            raise ConfigError(f"config key {key} expects one of {', '.join(map(repr, choices))}, "
                              f"got {value!r}", key=key)
        return value
    parse.__doc__ = " | ".join(choices)
    return parse


def _ureg():
    from gridflow.units import ureg

    return ureg()


_DIMS = {
    "length": ("m", "[length]"),
    "pressure": ("m", None),  # pressure as metres of water head; see _pressure_head
    "flow": ("m**3/s", "[length] ** 3 / [time]"),
    "velocity": ("m/s", "[length] / [time]"),
    "ratio": ("dimensionless", ""),  # e.g. unit head loss "10 ft/kft"
}


def quantity(dimension: str, *, minimum: float | None = None) -> Parser:
    """Parser for a string with a unit, returning SI (pressures as metres of water head).

    ``dimension`` is one of length, pressure, flow, velocity, ratio. A bare number is refused:
    a value without a unit is the commonest config mistake in mixed-unit utilities.
    """
    target, _ = _DIMS[dimension]

    def parse(value: Any, key: str) -> float:
        if isinstance(value, bool) or not isinstance(value, str):
            raise _type_error(key, f"a {dimension} with its unit, e.g. {_EXAMPLE[dimension]!r}",
                              value)
        try:
            q = _ureg().Quantity(value)
        except Exception:
            raise ConfigError(f"config key {key}: cannot read {value!r} as a {dimension}; write "
                              f"it like {_EXAMPLE[dimension]!r}", key=key) from None
        try:
            if dimension == "pressure":
                out = _pressure_head(q)
            else:
                out = float(q.to(target).magnitude)
        except Exception:
            raise ConfigError(f"config key {key}: {value!r} is not a {dimension}; write it like "
                              f"{_EXAMPLE[dimension]!r}", key=key) from None
        if minimum is not None and out < minimum:
            raise ConfigError(f"config key {key}: {value!r} must be at least {minimum:g} "
                              f"({target})", key=key)
        return out

    parse.__doc__ = f"{dimension}, e.g. {_EXAMPLE[dimension]!r}"
    return parse


_EXAMPLE = {"length": "0.5 m", "pressure": "20 psi", "flow": "1000 gpm",
            "velocity": "5 ft/s", "ratio": "10 ft/kft"}


def _pressure_head(q) -> float:
    """A pint quantity of pressure or of head (length) as metres of water head."""
    if q.check("[length]"):
        return float(q.to("m").magnitude)
    pa = float(q.to("Pa").magnitude)
    return pa / (RHO_WATER * G)


def section(cls: type) -> Parser:
    def parse(value: Any, key: str) -> Any:
        return parse_section(cls, value, key)
    parse.__doc__ = f"table ({cls.__name__})"
    parse.section_cls = cls  # type: ignore[attr-defined]
    return parse


def table_of(item: Parser) -> Parser:
    """A table whose keys are free names (zones, scenarios, categories) and values parsed."""
    def parse(value: Any, key: str) -> dict:
        if not isinstance(value, dict):
            raise _type_error(key, "a table", value)
        return {str(k): item(v, _join(key, str(k))) for k, v in value.items()}
    return parse


def list_of(item: Parser) -> Parser:
    def parse(value: Any, key: str) -> list:
        if not isinstance(value, list):
            raise _type_error(key, "a list", value)
        return [item(v, f"{key}[{i}]") for i, v in enumerate(value)]
    return parse


def str_map(value: Any, key: str) -> dict[str, str]:
    """A table of strings to strings (field maps, coded values)."""
    if not isinstance(value, dict):
        raise _type_error(key, "a table of names", value)
    out = {}
    for k, v in value.items():
        if not isinstance(v, (str, int)) or isinstance(v, bool):
            raise _type_error(_join(key, str(k)), "a string", v)
        out[str(k)] = str(v)
    return out


def number_map(value: Any, key: str) -> dict[str, float]:
    if not isinstance(value, dict):
        raise _type_error(key, "a table of numbers", value)
    return {str(k): P_FLOAT(v, _join(key, str(k))) for k, v in value.items()}


def reference_rows(cls: type, where: str = "") -> Iterable[tuple[str, str, str]]:
    """(key, default, doc) rows for the README's config reference, depth first."""
    for f in dataclasses.fields(cls):
        if "parse" not in f.metadata:
            continue
        key = _join(where, f.name)
        if f.default is not dataclasses.MISSING:
            default = _show_default(f.default, f.metadata["parse"])
        elif f.default_factory is not dataclasses.MISSING:
            default = "(see below)" if dataclasses.is_dataclass(f.default_factory) else "{}"
        else:
            default = "required"
        yield key, default, f.metadata["doc"]
        sub = getattr(f.metadata["parse"], "section_cls", None)
        if sub is not None:
            yield from reference_rows(sub, key)


# how each unit system's users write a quantity: (US unit, factor from SI, SI unit, factor)
_SHOW_UNITS = {"length": ("ft", 1 / FT, "m", 1.0),
               "pressure": ("psi", 1 / M_HEAD_PER_PSI, "kPa", KPA_PER_M_HEAD),  # from m head
               "flow": ("gpm", 1 / GPM, "L/s", 1000.0),
               "velocity": ("ft/s", 1 / FT, "m/s", 1.0),
               "ratio": ("ft/kft", 1000.0, "m/km", 1000.0)}


def _show_default(value: Any, parser: Parser) -> str:
    """A default for the reference, as a US user and as an SI user would write it."""
    doc = (parser.__doc__ or "").split(",")[0]
    if isinstance(value, float) and doc in _SHOW_UNITS:
        us, f_us, si, f_si = _SHOW_UNITS[doc]
        if doc == "length" and 0 < value < 0.3:  # diameters, roughness: inches and mm
            us, f_us, si, f_si = "in", 1 / INCH, "mm", 1000.0
        return f"'{_nice(value * f_us, 3)} {us}' / '{_nice(value * f_si, 3)} {si}'"
    return repr(value)


def _nice(x: float, digits: int) -> str:
    """``x`` to ``digits`` significant figures, without an exponent or trailing zeros."""
    if x == 0:
        return "0"
    from math import floor, log10

    r = round(x, digits - 1 - floor(log10(abs(x))))
    return f"{r:f}".rstrip("0").rstrip(".")
