"""Coded text fields worked once per distinct value give what a plain per-row reading gives
(the reference below, one value at a time; pandas, a general-purpose library, holds the
columns as read through Arrow)."""

from __future__ import annotations

import ast
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest

from gridflow.config.layers import CODE_DEFAULTS, CODE_TARGETS
from gridflow.findings import Findings
from gridflow.io.codes import coded_texts

INFO = SimpleNamespace(key="layers.valves", layer="valves")


def _reference(values, is_float, role_name, codes):
    """(out, {bad text: count}) one row at a time."""
    targets = CODE_TARGETS.get(role_name)
    out, bad = [], {}
    for v in values:
        if v is None or (isinstance(v, float) and np.isnan(v)) or v is pd.NA:
            out.append(None)
            continue
        txt = str(int(v)) if is_float and float(v).is_integer() else str(v)
        txt = txt.strip()
        listed = bool(codes) and txt in codes
        if listed:
            txt = codes[txt]
        if targets is not None:
            low = txt.lower()
            if low in targets:
                out.append(low)
            else:
                out.append(CODE_DEFAULTS[role_name])
                bad[txt] = bad.get(txt, 0) + 1
        else:
            out.append(txt)
            if codes and not listed:
                bad[txt] = bad.get(txt, 0) + 1
    return out, bad


CASES = [
    ("status", {"O": "open", "C": "Closed"},
     pd.Series(["O", " C", "C ", None, "open", "x", " x", "Off", "O"], dtype="string")),
    ("type", None, pd.Series(["PRV", "prv ", None, "gate", "gate", "check"], dtype="string")),
    ("material", {"DI": "ductile iron"},
     pd.Series(["DI", "PVC", None, "DI ", "pvc"], dtype="string")),
    ("material", None, pd.Series(["DI", " PVC", None], dtype="string")),
    ("status", {"1": "open", "2": "closed"}, pd.Series([1.0, 2.0, 2.5, np.nan, 1.0, 3.0])),
    ("status", {"1": "open", "True": "closed"},
     pd.Series([1, 1.0, "1", True, None, " 1"], dtype=object)),
]


@pytest.mark.parametrize("role_name, codes, col", CASES)
def test_coded_texts_match_row_by_row(role_name, codes, col):
    f = Findings()
    got = coded_texts(col, "valves", role_name, codes, None, INFO, f, "FIELD")
    want, bad = _reference(col.astype(object).tolist(), col.dtype.kind == "f", role_name, codes)
    assert list(got) == want
    counts = {}
    for kind, msg in zip(f.kind, f.message):
        assert kind == "unknown_code"
        n, rest = msg.split(" feature(s) of layer 'valves' hold ", 1)
        counts[ast.literal_eval(rest.split(" in field ")[0])] = int(n)  # the quoted value
    assert counts == bad
