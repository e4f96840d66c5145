"""Coded text fields read through the config's ``codes``: never an unlisted value in silence."""

from __future__ import annotations

import numpy as np
import pandas as pd

from gridflow.config.layers import CODE_DEFAULTS, CODE_TARGETS
from gridflow.findings import Findings

__all__ = ["coded_texts", "coded_text_parts"]


def coded_texts(col: pd.Series, role: str, role_name: str, codes: dict | None, ids, info,
           findings: Findings, fname: str = "") -> np.ndarray:
    """Text values, codes mapped. A value the config's codes do not list (for status, type and
    direction: one that maps to none of :data:`CODE_TARGETS`; for other fields with a codes
    table: one missing from it) is one warning finding per distinct value, with its count,
    and takes the field's default treatment (:data:`CODE_DEFAULTS`; others keep the value)."""
    return coded_text_parts(col, role, role_name, codes, ids, info, findings, fname)[0]


def coded_text_parts(col: pd.Series, role: str, role_name: str, codes: dict | None, ids, info,
                     findings: Findings, fname: str = ""):
    """:func:`coded_texts`, and the same values as distinct texts and a position per row:
    ``(values, texts, code)``, ``values[i] = texts[code[i]]`` (None where ``code[i] < 0``)."""
    # the work below runs once per distinct value (a coded field holds a few), then the
    # answers are spread back to the rows by their factor codes
    if col.dtype == object:  # mixed Python values: 1 and 1.0 hash alike but read apart
        missing = pd.isna(col).to_numpy()
        row_code, uniq = pd.factorize(col.astype(str).to_numpy(dtype=object))
        row_code[missing] = -1
    else:
        row_code, uniq = pd.factorize(col, use_na_sentinel=True)
        missing = row_code < 0
    u = pd.Series(uniq, dtype=object if col.dtype == object else col.dtype)
    if col.dtype.kind == "f":  # integral numbers as codes: 3.0 -> "3"
        whole = u.where(u.isna() | (u % 1 != 0), u.round().astype("Int64").astype(str))
        txt_u = whole.astype(str)
    else:
        txt_u = u.astype(str)
    txt_u = txt_u.str.strip()
    if codes:
        mapped = txt_u.map(codes)
        listed_u = mapped.notna().to_numpy()
        txt_u = mapped.where(mapped.notna(), txt_u)
    else:
        listed_u = np.zeros(len(u), bool)
    txt_u = txt_u.to_numpy(dtype=object)
    targets = CODE_TARGETS.get(role_name)
    if targets is not None:
        low_u = pd.Series(txt_u, dtype=object).str.lower().to_numpy(dtype=object)
        bad_u = ~pd.Series(low_u).isin(targets).to_numpy()
        default = CODE_DEFAULTS.get(role_name)
        out_u = low_u
    else:
        bad_u = ~listed_u if codes else np.zeros(len(u), bool)
        default = None
        out_u = txt_u
    take = np.where(missing, 0, row_code)
    out = np.empty(len(col), dtype=object)
    if len(u):
        out[:] = out_u[take]
    out[missing] = None
    bad = np.zeros(len(col), bool)
    if len(u):
        bad = bad_u[take] & ~missing
    if bad.any():
        per_u = np.bincount(row_code[~missing], minlength=len(u))
        vals, inv = np.unique(np.asarray(txt_u[bad_u], dtype=str), return_inverse=True)
        counts = np.bincount(inv.ravel(), weights=per_u[bad_u], minlength=len(vals)).astype(int)
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
    final_u = np.asarray(out_u, dtype=object).copy()
    if targets is not None and len(u):
        final_u[bad_u] = default
    return out, final_u, np.where(missing, -1, row_code)
