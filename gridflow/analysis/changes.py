"""Flags new or resolved since the previous night's output (the ``changes`` layer).

A flag is keyed by (layer, feature id, flag name). Layers are compared by name, so a scenario
added or removed tonight shows all its flags as new or resolved.
"""

from __future__ import annotations

import logging
from pathlib import Path

import pandas as pd

from gridflow.errors import InputError

__all__ = ["flag_set", "compare_flags", "read_previous_flags"]

log = logging.getLogger("gridflow")

FLAG_FIELDS = {
    "nodes_": ("node_id", ("low_pressure", "high_pressure", "negative_pressure")),
    "pipes_": ("pipe_id", ("high_velocity", "high_headloss")),
    "hydrants_fireflow": ("hydrant_id", ()),
}


def _spec(layer: str):
    for prefix, spec in FLAG_FIELDS.items():
        if layer.startswith(prefix):
            return spec
    return None


def flag_set(layers: dict[str, pd.DataFrame]) -> set[tuple[str, str, str]]:
    """All raised flags as (layer, feature_id, flag) triples.

    Unsupplied nodes count as the flag ``unsupplied``; hydrants that fail their required flow
    as ``fails_required``.
    """
    from gridflow.io.deferred import materialize

    out: set[tuple[str, str, str]] = set()
    for name, layer in layers.items():
        spec = _spec(name)
        if spec is None or layer is None or len(layer) == 0:
            continue
        df = materialize(layer)  # one deferred layer at a time
        id_field, flags = spec
        ids = df[id_field].astype(str).to_numpy()
        for flag in flags:
            if flag in df:
                hit = df[flag].fillna(0).astype(int).to_numpy() == 1
                out.update((name, i, flag) for i in ids[hit])
        if name.startswith("nodes_") and "supplied" in df:
            hit = df["supplied"].fillna(1).astype(int).to_numpy() == 0
            out.update((name, i, "unsupplied") for i in ids[hit])
        if name == "hydrants_fireflow" and "meets_required" in df:
            hit = df["meets_required"].fillna(1).astype(int).to_numpy() == 0
            out.update((name, i, "fails_required") for i in ids[hit])
    return out


def compare_flags(now: set, before: set) -> pd.DataFrame:
    """Rows ``change`` (new / resolved), ``layer``, ``feature_id``, ``flag``, sorted."""
    rows = [("new", *t) for t in sorted(now - before)]
    rows += [("resolved", *t) for t in sorted(before - now)]
    return pd.DataFrame(rows, columns=["change", "layer", "feature_id", "flag"])


def read_previous_flags(path: str | Path) -> set[tuple[str, str, str]]:
    """The flags of a previous gridflow output GeoPackage (read only).

    Raises
    ------
    InputError
        If the file cannot be read as a gridflow output.
    """
    import pyogrio

    path = Path(path)
    try:
        names = [n for n, _ in pyogrio.list_layers(path)]
    except Exception as exc:
        raise InputError(f"cannot read the previous output {path}: {exc}",
                         file=str(path)) from None
    layers = {}
    for name in names:
        spec = _spec(name)
        if spec is None:
            continue
        id_field, flags = spec
        extra = ["supplied"] if name.startswith("nodes_") else []
        extra += ["meets_required"] if name == "hydrants_fireflow" else []
        info = pyogrio.read_info(path, layer=name)
        have = set(info["fields"])
        cols = [c for c in (id_field, *flags, *extra) if c in have]
        if id_field not in have:
            raise InputError(f"previous output {path} layer {name} has no field {id_field}",
                             file=str(path), layer=name, field=id_field)
        layers[name] = pyogrio.read_dataframe(path, layer=name, columns=cols,
                                              read_geometry=False)
    return flag_set(layers)
