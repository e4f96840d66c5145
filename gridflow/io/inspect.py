"""Layers and schemas of a GIS file, inspected with fiona (for drafting a config).

:func:`inspect_gis` lists every layer's name, geometry type, feature count, CRS, fields and
types, and keeps a sample of values (at most :data:`SAMPLE_FEATURES` features a layer, evenly
spaced) with their ranges and coded values. fiona is the right tool here: listing layers costs
the same as with pyogrio, and reading a few thousand features one by one is cheap; bulk reading
of the network stays with pyogrio and Arrow (:mod:`gridflow.io.read`).
"""

from __future__ import annotations

import re
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from gridflow.errors import InputError

__all__ = ["inspect_gis", "LayerInfo", "FieldInfo", "SAMPLE_FEATURES", "MAX_CODES",
           "name_tokens", "code_text", "fmt_number"]


#: features read per layer for value ranges and coded values (evenly spaced over the layer)
SAMPLE_FEATURES = 5000
#: a text field with at most this many distinct values in the sample is a coded field
MAX_CODES = 25


@dataclass
class FieldInfo:
    """One attribute field and what its sampled values look like."""

    name: str
    type: str
    values: list = field(repr=False, default_factory=list)
    n_sampled: int = 0

    @property
    def tokens(self) -> set[str]:
        return name_tokens(self.name)

    @property
    def numeric(self) -> bool:
        return self.type.startswith(("int", "float"))

    @property
    def n_null(self) -> int:
        return self.n_sampled - len(self.values)

    def _num(self) -> np.ndarray:
        try:
            return np.asarray(self.values, dtype=float)
        except (TypeError, ValueError):
            return np.array([], dtype=float)

    @property
    def lo(self) -> float:
        a = self._num()
        return float(np.min(a)) if len(a) else float("nan")

    @property
    def hi(self) -> float:
        a = self._num()
        return float(np.max(a)) if len(a) else float("nan")

    @property
    def median(self) -> float:
        a = self._num()
        return float(np.median(a)) if len(a) else float("nan")

    @property
    def counts(self) -> Counter:
        return Counter(code_text(v) for v in self.values)

    @property
    def unique_ratio(self) -> float:
        return len(set(map(str, self.values))) / len(self.values) if self.values else 0.0

    @property
    def coded(self) -> bool:
        return (not self.numeric or self.type.startswith("int")) and \
            0 < len(self.counts) <= MAX_CODES and (self.unique_ratio < 0.5
                                                   or len(self.values) < 20)

    def describe(self) -> str:
        """``DIAM_IN: float, 2-24`` or ``MATL: str, 6 codes``: the evidence in a comment."""
        empty = f", {self.n_null} of {self.n_sampled} empty" if self.n_null else ""
        if not self.values:
            return f"{self.name}: {self.type}, all empty"
        if self.numeric:
            return f"{self.name}: {self.type}, {fmt_number(self.lo)}-{fmt_number(self.hi)}{empty}"
        if self.coded:
            return f"{self.name}: {self.type}, {len(self.counts)} codes{empty}"
        return f"{self.name}: {self.type}, e.g. {str(self.values[0])[:30]!r}{empty}"


@dataclass
class LayerInfo:
    """One layer: geometry, CRS, size and fields."""

    name: str
    geometry: str
    count: int
    crs: str
    projected: bool | None
    fields: dict[str, FieldInfo]
    z: list = field(repr=False, default_factory=list)

    @property
    def kind(self) -> str:
        g = self.geometry.lower()
        if "line" in g:
            return "line"
        if "point" in g:
            return "point"
        if "polygon" in g:
            return "polygon"
        return "none"

    @property
    def has_z(self) -> bool:
        return "3d" in self.geometry.lower() or self.geometry.lower().endswith(" z") or \
            bool(self.z)


def inspect_gis(path: str | Path, *, sample: int = SAMPLE_FEATURES) -> list[LayerInfo]:
    """Every layer of a GIS file: name, geometry type, CRS, fields, types, sampled values.

    Raises
    ------
    InputError
        The file does not exist or no layer can be read from it.
    """
    import fiona

    path = Path(path)
    if not path.exists():
        raise InputError(f"GIS file {path} does not exist", file=str(path))
    try:
        names = fiona.listlayers(path)
    except Exception as exc:  # fiona's errors are many; all mean the file is unreadable
        raise InputError(f"{path}: no layer can be read ({exc})", file=str(path)) from None
    out = []
    for name in names:
        try:
            with fiona.open(path, layer=name) as src:
                out.append(_inspect_layer(src, name, sample))
        except Exception as exc:
            raise InputError(f"{path}: layer {name!r} cannot be read ({exc})", file=str(path),
                             layer=name) from None
    return out


def _inspect_layer(src, name: str, sample: int) -> LayerInfo:
    n = len(src)
    step = max(1, n // sample) if sample else 1
    props = dict(src.schema.get("properties") or {})
    fields = {f: FieldInfo(f, str(t).split(":")[0]) for f, t in props.items()}
    z: list[float] = []
    m = 0
    for _, feat in src.items(0, n, step):
        m += 1
        for f, v in feat.properties.items():
            if f in fields and v is not None and not (isinstance(v, float) and np.isnan(v)) \
                    and not (isinstance(v, str) and not v.strip()):
                fields[f].values.append(v.strip() if isinstance(v, str) else v)
        if feat.geometry is not None and len(z) < 2 * sample:
            z.extend(_zs(feat.geometry.coordinates))
    for f in fields.values():
        f.n_sampled = m
    crs = src.crs
    crs_text = crs.to_string() if crs else ""
    projected = None
    if crs:
        try:
            import pyproj

            projected = bool(pyproj.CRS.from_user_input(crs_text).is_projected)
        except Exception:
            projected = None
    return LayerInfo(name, str(src.schema.get("geometry") or "None"), n, crs_text, projected,
                     fields, z)


def _zs(coords) -> list[float]:
    """Z values of a (nested) coordinate list."""
    if not coords:
        return []
    if isinstance(coords[0], (int, float)):
        return [float(coords[2])] if len(coords) > 2 else []
    out: list[float] = []
    for c in coords:
        out.extend(_zs(c))
    return out



def name_tokens(name: str) -> set[str]:
    """Upper-case words of a name: ``DIAM_IN`` -> {DIAM, IN}; ``PipeSize2`` -> {PIPE, SIZE, 2}."""
    parts = re.findall(r"[A-Z]+(?![a-z])|[A-Z]?[a-z]+|\d+", name)
    toks = {p.upper() for p in parts}
    return toks | {re.sub(r"[^A-Za-z0-9]", "", name).upper()}


def fmt_number(x: float) -> str:
    if not np.isfinite(x):
        return "nan"
    return f"{x:.4g}" if abs(x - round(x)) > 1e-9 else f"{int(round(x))}"


def code_text(v) -> str:
    if isinstance(v, float) and v.is_integer():
        return str(int(v))
    return str(v).strip()
