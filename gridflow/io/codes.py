"""Coded text fields read through the config's ``codes``: never an unlisted value in silence."""

from __future__ import annotations

import numpy as np
import pandas as pd

from gridflow.config.layers import CODE_DEFAULTS, CODE_TARGETS
from gridflow.findings import Findings

__all__ = ["coded_texts"]


def coded_texts(col: pd.Series, role: str, role_name: str, codes: dict | None, ids, info,
           findings: Findings, fname: str = "") -> np.ndarray:
    """Text values, codes mapped. A value the config's codes do not list (for status, type and
    direction: one that maps to none of :data:`CODE_TARGETS`; for other fields with a codes
    table: one missing from it) is one warning finding per distinct value, with its count,
    and takes the field's default treatment (:data:`CODE_DEFAULTS`; others keep the value)."""
    missing = pd.isna(col).to_numpy()
    if col.dtype.kind == "f":  # integral numbers as codes: 3.0 -> "3"
        whole = col.where(col.isna() | (col % 1 != 0), col.round().astype("Int64").astype(str))
        txt = whole.astype(str)
    else:
        txt = col.astype(str)
    txt = txt.str.strip()
    listed = np.zeros(len(txt), bool)
    if codes:
        mapped = txt.map(codes)
        listed = mapped.notna().to_numpy()
        txt = mapped.where(mapped.notna(), txt)
    out = txt.to_numpy(dtype=object).copy()
    out[missing] = None
    targets = CODE_TARGETS.get(role_name)
    if targets is not None:
        low = pd.Series(out, dtype=object).str.lower().to_numpy(dtype=object).copy()
        low[missing] = None
        bad = ~(pd.Series(low).isin(targets).to_numpy() | missing)
        default = CODE_DEFAULTS.get(role_name)
        out = low
    else:
        bad = ~listed & ~missing if codes else np.zeros(len(out), bool)
        default = None
    if bad.any():
        vals, counts = np.unique(np.asarray(txt.to_numpy(dtype=object)[bad], dtype=str),
                                 return_counts=True)
        key = f"{info.key or 'layers.' + role}.codes.{role_name}"
        treat = f"treated as {default!r}" if default else "kept as written"
        aim = "" if targets is None else f" as one of {', '.join(targets)}"
        findings.add_many(
            "unknown_code", "warning", info.layer, ["" for _ in vals],
            [f"{c} feature(s) of layer {info.layer!r} hold {v!r} in field {fname!r} "
             f"({role_name}), which {key} does not list{aim}; {treat}"
             for v, c in zip(vals.tolist(), counts.tolist())])
        if targets is not None:
            out[bad] = default
    return out
