"""Demand categories: the config's categories and each meter's category from its code."""

from __future__ import annotations

import numpy as np
import pandas as pd

from gridflow.demand.records import Context
from gridflow.errors import ConfigError

__all__ = ["as_codes", "code_table", "known_categories", "meter_categories", "meter_field"]


def known_categories(cfg) -> tuple[str, ...]:
    dem = cfg.demand
    cats = list(dem.categories) + [dem.default_category]
    cats += [z.nrw_category for z in dem.zones.values()]
    cats += [p.category for p in dem.points]
    return tuple(dict.fromkeys(cats))


def code_table(cfg) -> dict[str, str]:
    """Utility code -> category name; a category's own name also maps to it."""
    table: dict[str, str] = {}
    for name, sec in cfg.demand.categories.items():
        for i, code in enumerate(sec.codes):
            if code in table and table[code] != name:
                raise ConfigError(f"config key demand.categories.{name}.codes[{i}]: code "
                                  f"{code!r} is already mapped to category {table[code]!r}",
                                  key=f"demand.categories.{name}.codes[{i}]")
            table[code] = name
    for name in cfg.demand.categories:
        table.setdefault(name, name)
    return table


def as_codes(values: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """Factorize raw utility codes into (codes, unique text); NaN/empty -> code -1.

    Whole-number floats (a numeric field read with NaNs) are written without '.0'.
    """
    codes, uniques = pd.factorize(values, use_na_sentinel=True)
    text = []
    for u in uniques:  # one entry per distinct code, not per meter
        if isinstance(u, float) and u.is_integer():
            u = int(u)
        text.append(str(u).strip())
    text_arr = np.asarray(text, dtype=object)
    if len(text_arr):
        empty = text_arr == ""
        if empty.any():
            codes = np.where(empty[np.maximum(codes, 0)] & (codes >= 0), -1, codes)
    return np.asarray(codes), text_arr


def meter_categories(ctx: Context, meters, ids: np.ndarray,
                      geoms: np.ndarray) -> tuple[np.ndarray, list[str]]:
    cfg = ctx.cfg
    default = cfg.demand.default_category
    cat_names = list(dict.fromkeys(list(cfg.demand.categories) + [default]))
    default_i = cat_names.index(default)
    if "category" not in meters.columns:
        return np.full(len(meters), default_i, dtype=np.int64), cat_names
    codes, uniques = as_codes(meters["category"])
    table = code_table(cfg)
    if not table:  # no categories configured: everything is the default category
        return np.full(len(meters), default_i, dtype=np.int64), cat_names
    unique_cat = np.array([cat_names.index(table[u]) if u in table else -1 for u in uniques],
                          dtype=np.int64)
    if len(uniques):
        per_meter = np.where(codes >= 0, unique_cat[np.maximum(codes, 0)], default_i)
    else:
        per_meter = np.full(len(meters), default_i, dtype=np.int64)
    unmapped = (codes >= 0) & (per_meter < 0)
    if unmapped.any():
        k = np.flatnonzero(unmapped)
        field_name = meter_field(cfg, "category")
        ctx.findings.add_many(
            "meter_unknown_category", "warning", ctx.meter_layer, ids[k].tolist(),
            [f"meter {i}: category code {uniques[c]!r} (field {field_name}) is not in "
             f"[demand.categories]; counted as {default}" for i, c in zip(ids[k], codes[k])],
            geoms[k].tolist())
        per_meter[unmapped] = default_i
    return per_meter, cat_names


def meter_field(cfg, role: str) -> str:
    sec = cfg.layers.meters
    return sec.fields.get(role, role) if sec is not None else role
