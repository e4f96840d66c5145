"""The report's interactive map: a data payload for the map script, and the inlined assets.

The map runs offline inside the one HTML file: the vendored map library (Leaflet, BSD 2-Clause,
``static/leaflet``), its stylesheet without the image references, gridflow's own map script
(``static/map.js``) and a JSON payload. Coordinates are the working CRS's metres, shifted to
the network's lower-left corner and drawn on a flat plane (no tiles, no web projection).

What is drawn follows :mod:`gridflow.report.geometry`: at most a budget of mains (widest first;
flagged mains always, up to their own budget), junctions one by one below a budget and else
aggregated on a grid (each cell shows the lowest pressure, with the flagged junctions drawn on
top), and hydrants and findings worst first up to a budget. The payload therefore stays near a
few megabytes whatever the network size.
"""

from __future__ import annotations

import json
import re
from functools import cache
from importlib import resources

import numpy as np
import pandas as pd

from gridflow.network import NODE_KINDS
from gridflow.report import palette as pal
from gridflow.report.data import NODE_FLAGS, PIPE_FLAGS, ReportData
from gridflow.report.geometry import MAX_POINTS, MAX_SEGMENTS, extent, grid_min, pick, skeleton

__all__ = ["map_payload", "payload_json", "points_xy", "assets"]

_NODE_BITS = (*NODE_FLAGS, "unsupplied")


def _r(values, digits: int) -> list:
    """Rounded floats for JSON, None where not finite."""
    a = np.round(np.asarray(values, dtype=float), digits)
    out = a.astype(object)
    out[~np.isfinite(a)] = None
    return out.tolist()


def _bits(flags: list[np.ndarray], idx: np.ndarray) -> list[int]:
    out = np.zeros(len(idx), dtype=np.int64)
    for k, fl in enumerate(flags):
        out |= (np.asarray(fl)[idx].astype(np.int64) & 1) << k
    return out.tolist()


def points_xy(frame: pd.DataFrame | None) -> np.ndarray:
    """One representative point per row (NaN where no geometry)."""
    if frame is None or "geometry" not in frame.columns or not len(frame):
        return np.full((0 if frame is None else len(frame), 2), np.nan)
    import shapely

    g = np.asarray(frame["geometry"].to_numpy(), dtype=object)
    ok = np.array([x is not None for x in g], bool)
    out = np.full((len(g), 2), np.nan)
    if ok.any():
        geoms = g[ok]
        empty = shapely.is_empty(geoms)
        pts = shapely.point_on_surface(geoms[~empty])
        sub = np.full((len(geoms), 2), np.nan)
        sub[~empty] = shapely.get_coordinates(pts)
        out[ok] = sub
    return out


def map_payload(d: ReportData) -> dict | None:
    """The data the map script draws (None if the run has no coordinates)."""
    if d.node_xy is None:
        return None
    f, net, xy = d.fields, d.network, np.asarray(d.node_xy, dtype=float)
    x0, y0, x1, y1 = extent(xy)
    scen = d.scenarios

    # nodes: all if few, else the flagged ones (worst first) and grid cells per scenario
    p = np.vstack([np.where(s.junction, s.result.pressure_m, np.nan) for s in scen])
    node_bad = np.zeros(net.n_nodes, bool)
    for s in scen:
        for fl in NODE_FLAGS:
            node_bad |= s.node_flags[fl].astype(bool)
        node_bad |= s.unsupplied
    many = int((~net.is_fixed).sum()) > MAX_POINTS
    with np.errstate(invalid="ignore"):
        low = np.nanmin(np.where(np.isfinite(p), p, np.inf), axis=0)
    shown = pick(low, node_bad if many else np.ones(net.n_nodes, bool))
    shown = np.union1d(shown, np.flatnonzero(net.is_fixed))
    cells: list[dict | None] = []
    for s, ps in zip(scen, p):
        if many:
            j = np.flatnonzero(s.junction)
            g = grid_min(xy[j], d.conv(ps[j], "pressure"), (x0, y0, x1, y1))
            cells.append({"x": _r(g.x0 - x0, 1), "y": _r(g.y0 - y0, 1), "size": round(g.size, 1),
                          "n": g.count.tolist(), "v": _r(g.worst, 1)})
        else:
            cells.append(None)
    nodes = {
        "id": net.node_id[shown].astype(str).tolist(),
        "x": _r(xy[shown, 0] - x0, 1), "y": _r(xy[shown, 1] - y0, 1),
        "kind": np.asarray(NODE_KINDS, dtype=object)[net.node_kind[shown]].tolist(),
        "zone": net.zone[shown].astype(str).tolist(),
        "elev": _r(d.conv(net.elevation_m[shown], "elevation"), 1),
        "p": [_r(d.conv(s.result.pressure_m[shown], "pressure"), 1) for s in scen],
        "head": [_r(d.conv(s.result.head_m[shown], "head"), 1) for s in scen],
        "flags": [_bits([*(s.node_flags[fl] for fl in NODE_FLAGS), s.unsupplied], shown)
                  for s in scen],
    }

    # mains: the skeleton plus the flagged ones (fastest first)
    flagged = np.zeros(net.n_links, bool)
    for s in scen:
        for fl in PIPE_FLAGS:
            flagged |= s.pipe_flags[fl].astype(bool)
    vmax = np.vstack([np.abs(s.result.velocity_ms) for s in scen]).max(axis=0)
    hot = pick(-vmax, flagged, MAX_SEGMENTS)
    mains_idx = np.union1d(skeleton(net.diameter_m, budget=MAX_SEGMENTS), hot)
    a, b = net.from_idx[mains_idx], net.to_idx[mains_idx]
    seg = np.column_stack([xy[a, 0] - x0, xy[a, 1] - y0, xy[b, 0] - x0, xy[b, 1] - y0])
    mains = {
        "id": net.link_id[mains_idx].astype(str).tolist(),
        "seg": _r(seg.ravel(), 1),
        "dia": _r(d.conv(net.diameter_m[mains_idx], "diameter"), 1),
        "len": _r(d.conv(net.length_m[mains_idx], "length"), 1),
        "q": [_r(d.conv(s.result.flow_m3s[mains_idx], "flow"), 2) for s in scen],
        "v": [_r(d.conv(s.result.velocity_ms[mains_idx], "velocity"), 2) for s in scen],
        "uhl": [_r(d.conv(s.result.unit_headloss[mains_idx], "unit_headloss"), 2)
                for s in scen],
        "flags": [_bits([s.pipe_flags[fl] for fl in PIPE_FLAGS], mains_idx) for s in scen],
        "flagged": np.flatnonzero(flagged[mains_idx]).tolist(),
    }

    payload: dict = {
        "scenarios": [s.name for s in scen], "crs": d.crs,
        "extent": [0.0, 0.0, round(x1 - x0, 1), round(y1 - y0, 1)],
        "units": {"pressure": f.u_pressure, "len": f.u_len, "flow": f.u_flow,
                  "velocity": f.u_velocity, "diameter": f.u_diameter,
                  "uhl": f.u_unit_headloss},
        "nodeFlags": list(_NODE_BITS), "pipeFlags": list(PIPE_FLAGS),
        "ramp": pal.PRESSURE_STOPS, "fireColors": pal.FIRE_CLASS,
        "severityColors": pal.SEVERITY, "flagColors": pal.FLAG,
        "nodes": nodes, "cells": cells, "mains": mains,
        "counts": {"nodes": net.n_nodes, "nodesShown": int(len(shown)),
                   "mains": net.n_links, "mainsShown": int(len(mains_idx)),
                   "aggregated": bool(many)},
    }
    lo_hi = np.nanpercentile(d.conv(p[np.isfinite(p)], "pressure"), [1, 99]) \
        if np.isfinite(p).any() else np.array([0.0, 1.0])
    payload["pressureRange"] = _r(lo_hi, 1)
    payload["hydrants"] = _hydrants(d, x0, y0)
    payload["findings"] = _findings(d, x0, y0)
    payload["segments"] = _segments(d, x0, y0)
    payload["flowTests"] = _flow_tests(d, x0, y0)
    return payload


def _hydrants(d: ReportData, x0: float, y0: float) -> dict | None:
    h, f = d.hydrants, d.fields
    if h is None or not len(h):
        return None
    xy = points_xy(h)
    ratio = (h[f.available_flow].astype(float) / h[f.required_flow].astype(float)).to_numpy()
    idx = pick(ratio, np.isfinite(xy).all(axis=1))
    sub = h.iloc[idx]

    def text(col: str) -> list[str]:
        return sub[col].fillna("").astype(str).tolist() if col in sub else [""] * len(sub)

    return {
        "id": text("hydrant_id"), "node": text("node_id"), "zone": text("zone"),
        "x": _r(xy[idx, 0] - x0, 1), "y": _r(xy[idx, 1] - y0, 1),
        "static": _r(sub[f.static_pressure], 1), "required": _r(sub[f.required_flow], 0),
        "available": _r(sub[f.available_flow], 0),
        "residual": _r(sub[f.residual_pressure], 1),
        "meets": sub["meets_required"].fillna(0).astype(int).tolist(),
        "limitedBy": text("limited_by"), "cls": text("nfpa_class"),
        "total": len(h), "shown": len(idx)}


def _findings(d: ReportData, x0: float, y0: float) -> dict | None:
    fd = d.findings
    if fd is None or not len(fd):
        return None
    xy = points_xy(fd)
    sev = fd["severity"].astype(str).to_numpy()
    rank = np.where(sev == "error", 0.0, np.where(sev == "warning", 1.0, 2.0))
    idx = pick(rank, np.isfinite(xy).all(axis=1))
    sub = fd.iloc[idx]
    return {"x": _r(xy[idx, 0] - x0, 1), "y": _r(xy[idx, 1] - y0, 1),
            **{k: sub[k].fillna("").astype(str).tolist()
               for k in ("kind", "severity", "layer", "feature_id", "message")},
            "total": len(fd), "shown": len(idx)}


#: segments drawn at most (those needing action first, then by criticality)
MAX_MAP_SEGMENTS = 400


def segments_to_draw(sg: pd.DataFrame, present: np.ndarray) -> np.ndarray:
    """Positions of the segments the map draws, among those with geometry (``present``):
    those whose closure cuts off others, oversized or that cannot be isolated first, then by
    criticality rank; at most :data:`MAX_MAP_SEGMENTS`."""
    cut = sg["cut_off_segments"].to_numpy() > 0
    over = sg["oversized"].to_numpy() == 1
    lone = sg["cannot_isolate"].to_numpy() == 1
    rank = (sg["criticality_rank"].to_numpy(dtype=float) if "criticality_rank" in sg
            else np.full(len(sg), np.nan))
    score = np.where(cut | over | lone, -1e9, np.where(np.isfinite(rank), rank, 1e9))
    return pick(score, np.asarray(present, dtype=bool), MAX_MAP_SEGMENTS)


def _segments(d: ReportData, x0: float, y0: float) -> dict | None:
    """Valve segments that need a look: closure cuts off others, oversized, cannot be
    isolated, then the most critical; geometry simplified to about 2 m."""
    import shapely

    sg = d.segments
    if sg is None or not len(sg) or "geometry" not in sg:
        return None
    geom = np.asarray(sg.geometry.values, dtype=object)
    has = ~(shapely.is_missing(geom) | shapely.is_empty(geom))
    idx = segments_to_draw(sg, has)
    if not len(idx):
        return None
    cut = sg["cut_off_segments"].to_numpy() > 0
    over = sg["oversized"].to_numpy() == 1
    lone = sg["cannot_isolate"].to_numpy() == 1
    sub = sg.iloc[idx]
    parts, owner = shapely.get_parts(shapely.simplify(geom[idx], 2.0), return_index=True)
    xy, pidx = shapely.get_coordinates(parts, return_index=True)
    xy = xy - [x0, y0]
    lines: list[list[list[float]]] = [[] for _ in idx]
    splits = np.flatnonzero(np.diff(pidx)) + 1
    for k, chunk in zip(owner[np.unique(pidx)], np.split(xy, splits)):
        lines[k].append(_r(chunk.ravel(), 1))
    kind = np.where(cut[idx], "cuts_off", np.where(over[idx], "oversized",
                                                    np.where(lone[idx], "cannot_isolate",
                                                             "critical")))
    L, _ = out_field_safe(d, "length")

    def col(name: str, digits: int | None = None) -> list:
        if name not in sub:
            return [None] * len(sub)
        v = sub[name]
        return _r(v, digits) if digits is not None else v.fillna("").astype(str).tolist()

    return {"id": col("segment_id"), "lines": lines, "kind": kind.tolist(),
            "valves": col("valve_ids"), "length": col(f"length_{L}", 0),
            "meters": col("meters", 0), "cutOff": col("cut_off_segments", 0),
            "cutMeters": col("cut_off_meters", 0), "out": col("meters_out_of_water", 0),
            "low": col("meters_low_pressure", 0), "rank": col("criticality_rank", 0),
            "total": len(sg), "shown": len(idx)}


def _flow_tests(d: ReportData, x0: float, y0: float) -> dict | None:
    """Field flow tests at their residual hydrant: model minus field residual pressure."""
    ft = d.flow_tests
    if ft is None or not len(ft) or "geometry" not in ft:
        return None
    xy = points_xy(ft)
    ok = np.flatnonzero(np.isfinite(xy).all(axis=1))
    if not len(ok):
        return None
    sub = ft.iloc[ok]
    P, _ = out_field_safe(d, "pressure")

    def col(name: str, digits: int | None = None) -> list:
        if name not in sub:
            return [None] * len(sub)
        v = sub[name]
        return _r(v, digits) if digits is not None else v.fillna("").astype(str).tolist()

    return {"id": col("test_id"), "x": _r(xy[ok, 0] - x0, 1), "y": _r(xy[ok, 1] - y0, 1),
            "fieldResidual": col(f"field_residual_pressure_{P}", 1),
            "modelResidual": col(f"model_residual_pressure_{P}", 1),
            "diff": col(f"residual_diff_{P}", 1),
            "out": [int(v) if v == v else 0 for v in sub.get("out_of_tolerance",
                                                              pd.Series(0, index=sub.index))],
            "problem": col("problem")}


def out_field_safe(d: ReportData, quantity: str) -> tuple[str, float]:
    from gridflow.units import out_field

    return out_field(quantity, d.units)


def payload_json(payload: dict) -> str:
    """JSON safe inside a script element of an XML-well-formed page (no <, >, &)."""
    text = json.dumps(payload, separators=(",", ":"), allow_nan=False)
    return text.replace("<", "\\u003c").replace(">", "\\u003e").replace("&", "\\u0026")


@cache
def assets() -> dict[str, str]:
    """The map library, its stylesheet (image references left out), licence and map script."""
    root = resources.files("gridflow.report") / "static"
    lib = root / "leaflet"
    css = (lib / "leaflet.css").read_text(encoding="utf-8")
    css = re.sub(r"[a-z-]+\s*:\s*url\([^)]*\)\s*;?", "", css)
    css = re.sub(r"/\*.*?\*/", "", css, flags=re.S)
    return {"library": (lib / "leaflet.js").read_text(encoding="utf-8"),
            "library_css": css,
            "licence": (lib / "LICENSE").read_text(encoding="utf-8"),
            "script": (root / "map.js").read_text(encoding="utf-8")}
