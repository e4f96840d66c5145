"""The self-contained HTML report: summary, cautions, maps, HGL profile, tables, histograms.

Everything the page needs is inside the one file: inline CSS, figures as PNG data URIs, no
scripts, no fonts or images fetched from anywhere. The markup is well-formed XML (void
elements closed, only XML's own entities) so that any XML parser can read it.
"""

from __future__ import annotations

import html
import logging
import re
from collections.abc import Callable, Iterable
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd

from gridflow.errors import GridflowError
from gridflow.report import figures
from gridflow.report.fields import Fields, fields_for, require
from gridflow.report.profile import hgl_profile
from gridflow.units import OUTPUT, UnitSystem, pressure_m_from

__all__ = ["CAUTIONS", "write_report"]

log = logging.getLogger("gridflow")

CAUTIONS = (
    ("These results are planning estimates from a hydraulic model of the GIS as it is mapped "
     "today. Errors in the mapped network (diameters, connections, valve positions, "
     "elevations) and in the demands carry straight into the results."),
    ("Fire-flow figures are model estimates and must be confirmed by field flow tests before "
     "they are relied on."),
    ("Local codes, the fire authority and licensed engineers decide what is required and "
     "whether the system meets it; this report does not."),
)

NODE_FLAGS = ("low_pressure", "high_pressure", "negative_pressure")
PIPE_FLAGS = ("high_velocity", "high_headloss")
_SCENARIO = re.compile(r"^nodes_([a-z0-9_]+)$")


# ---------------------------------------------------------------- small HTML helpers
def _e(value) -> str:
    """Escape text for XML/HTML content and attributes."""
    if value is None or (isinstance(value, float) and np.isnan(value)):
        return ""
    return html.escape(str(value), quote=True)


def _num(digits: int) -> Callable[[object], str]:
    def fmt(v) -> str:
        try:
            x = float(v)
        except (TypeError, ValueError):
            return _e(v)
        if not np.isfinite(x):
            return "&#8211;"
        return f"{x:,.{digits}f}"
    return fmt


def _txt(v) -> str:
    return _e(v)


Column = tuple[str, str, Callable[[object], str]]


def _table(df: pd.DataFrame, columns: list[Column], *, table_id: str = "",
           caption: str = "") -> str:
    """A table of ``df``'s rows; ``columns`` are (field, header, formatter)."""
    cols = [c for c in columns if c[0] in df.columns]
    idattr = f' id="{_e(table_id)}"' if table_id else ""
    out = [f'<table{idattr}>']
    if caption:
        out.append(f"<caption>{_e(caption)}</caption>")
    out.append("<thead><tr>" + "".join(f'<th scope="col">{_e(h)}</th>' for _, h, _ in cols)
               + "</tr></thead><tbody>")
    values = [df[c].tolist() for c, _, _ in cols]
    for row in zip(*values):
        cells = []
        for (field, _, fmt), v in zip(cols, row):
            cls = ' class="n"' if fmt is not _txt else ""
            cells.append(f'<td{cls} data-field="{_e(field)}">{fmt(v)}</td>')
        out.append("<tr>" + "".join(cells) + "</tr>")
    if not values or not len(df):
        out.append(f'<tr><td colspan="{max(len(cols), 1)}">none</td></tr>')
    out.append("</tbody></table>")
    return "".join(out)


def _figure(uri: str, alt: str, caption: str) -> str:
    return (f'<figure><img src="{uri}" alt="{_e(alt)}"/>'
            f"<figcaption>{_e(caption)}</figcaption></figure>")


def _section(anchor: str, title: str, body: Iterable[str]) -> str:
    return f'<section id="{anchor}"><h2>{_e(title)}</h2>' + "".join(body) + "</section>"


def _p(text: str, cls: str = "") -> str:
    c = f' class="{cls}"' if cls else ""
    return f"<p{c}>{_e(text)}</p>"


# ---------------------------------------------------------------- reading the layers
def _scenarios(layers: dict) -> list[str]:
    names = [m.group(1) for k in layers if (m := _SCENARIO.match(k))]
    for s in names:
        if f"pipes_{s}" not in layers:
            raise GridflowError(f"the report found layer nodes_{s} but no pipes_{s}",
                                layer=f"pipes_{s}")
    if not names:
        raise GridflowError("the report needs at least one nodes_<scenario> layer; got: "
                            + ", ".join(layers), layer="nodes_<scenario>")
    return names


def _check_layers(layers: dict, scenarios: list[str], f: Fields) -> None:
    for s in scenarios:
        require(layers[f"nodes_{s}"], f"nodes_{s}",
                ["node_id", "kind", "fixed_head", "zone", f.elevation, f.head, f.pressure,
                 f.demand, "supplied", *NODE_FLAGS])
        require(layers[f"pipes_{s}"], f"pipes_{s}",
                ["pipe_id", "kind", "from_node", "to_node", f.length, f.diameter, "status",
                 f.flow, f.velocity, f.unit_headloss, *PIPE_FLAGS])
    if "hydrants_fireflow" in layers:
        require(layers["hydrants_fireflow"], "hydrants_fireflow",
                ["hydrant_id", "node_id", "zone", f.static_pressure, f.required_flow,
                 f.available_flow, f.residual_pressure, "meets_required", "limited_by",
                 "nfpa_class"])
    if "findings" in layers:
        require(layers["findings"], "findings",
                ["kind", "severity", "layer", "feature_id", "message"])
    if "changes" in layers:
        require(layers["changes"], "changes", ["change", "layer", "feature_id", "flag"])


def _junction_mask(nodes: pd.DataFrame) -> pd.Series:
    return (nodes["fixed_head"].astype(int) == 0) & (nodes["supplied"].astype(int) == 1)


def _worst_scenario(layers: dict, scenarios: list[str], f: Fields) -> str:
    """The scenario with the lowest pressure at a supplied junction (first on ties)."""
    mins = []
    for s in scenarios:
        n = layers[f"nodes_{s}"]
        p = n.loc[_junction_mask(n), f.pressure].to_numpy(float)
        p = p[np.isfinite(p)]
        mins.append(p.min() if p.size else np.inf)
    return scenarios[int(np.argmin(mins))]


def _iterations(run_info: list[tuple[str, str]], scenario: str) -> str:
    keys = {f"iterations_{scenario}", f"{scenario}_iterations", f"iterations.{scenario}",
            f"{scenario}.iterations", f"iterations:{scenario}"}
    for k, v in run_info:
        if str(k).lower() in keys:
            return str(v)
    return ""


def _criterion_pressure(text: str, system: UnitSystem) -> float | None:
    """A criterion such as '35 psi' in the run's pressure unit, or None if not a pressure."""
    m = re.fullmatch(r"\s*([-+]?\d+(?:\.\d*)?(?:[eE][-+]?\d+)?)\s*([A-Za-z]+)\s*", str(text))
    if not m:
        return None
    try:
        head_m = pressure_m_from(float(m.group(1)), m.group(2))
    except KeyError:
        return None
    return head_m * OUTPUT[system]["pressure"][1]


def _label(key: str) -> str:
    return str(key).replace("_", " ")


# ---------------------------------------------------------------- sections
def _summary(layers, scenarios, run_info, f: Fields, criteria, worst: str) -> str:
    first_n, first_p = layers[f"nodes_{scenarios[0]}"], layers[f"pipes_{scenarios[0]}"]
    kinds = first_n["kind"].astype(str).value_counts()
    pkinds = first_p["kind"].astype(str).value_counts()
    is_pipe = first_p["kind"].astype(str) == "pipe"
    unit, k = f.long_length
    total = float(first_p.loc[is_pipe, f.length].sum()) * k
    hyd = layers.get("hydrants_fireflow")
    fnd = layers.get("findings")
    cards = [("nodes", f"{len(first_n):,}", ", ".join(f"{v:,} {i}" for i, v in kinds.items())),
             ("links", f"{len(first_p):,}", ", ".join(f"{v:,} {i}" for i, v in pkinds.items())),
             ("main length", f"{total:,.1f} {unit}", "pipes only"),
             ("scenarios", str(len(scenarios)), f"lowest pressure in {worst}")]
    if hyd is not None:
        fail = int((hyd["meets_required"].fillna(0).astype(int) == 0).sum())
        cards.append(("hydrants", f"{len(hyd):,}", f"{fail:,} below required fire flow"))
    if fnd is not None:
        sev = fnd["severity"].astype(str).value_counts()
        cards.append(("findings", f"{len(fnd):,}",
                      ", ".join(f"{sev.get(s, 0):,} {s}" for s in ("error", "warning", "info"))))
    body = ['<div class="cards">']
    for title, big, small in cards:
        body.append(f'<div class="card"><div class="k">{_e(title)}</div>'
                    f'<div class="v">{_e(big)}</div><div class="s">{_e(small)}</div></div>')
    body.append("</div>")

    body.append("<h3>Run</h3>")
    ri = pd.DataFrame(run_info, columns=["key", "value"]) if run_info else pd.DataFrame(
        {"key": [], "value": []})
    # the headline items first; the whole run record (hashes, demand totals, per-scenario
    # residuals) folded below them
    head_keys = ("name", "tool_version", "config", "unit_system", "headloss_model",
                 "started_utc", "ended_utc", "seconds_total", "findings", "changes_new",
                 "changes_resolved")
    top = ri[ri["key"].isin(head_keys)]
    body.append(_table(top, [("key", "item", _txt), ("value", "value", _txt)],
                       table_id="run"))
    body.append("<details><summary>Full run record (" + str(len(ri)) + " items)</summary>")
    body.append(_table(ri, [("key", "item", _txt), ("value", "value", _txt)],
                       table_id="run_record"))
    body.append("</details>")
    if criteria:
        body.append("<h3>Criteria used for the flags</h3>")
        cr = pd.DataFrame({"key": [_label(c) for c in criteria], "value": list(criteria.values())})
        body.append(_table(cr, [("key", "criterion", _txt), ("value", "value", _txt)],
                           table_id="criteria"))

    rows = []
    for s in scenarios:
        n, p = layers[f"nodes_{s}"], layers[f"pipes_{s}"]
        j = n[_junction_mask(n)]
        pr = j[f.pressure].astype(float)
        lo = pr.idxmin() if pr.notna().any() else None
        rows.append({
            "scenario": s, "iterations": _iterations(run_info, s),
            "demand": float(n[f.demand].sum()),
            "min_p": float(pr.min()) if lo is not None else np.nan,
            "min_node": "" if lo is None else str(j.loc[lo, "node_id"]),
            "max_p": float(pr.max()) if lo is not None else np.nan,
            "max_v": float(p[f.velocity].abs().max()) if len(p) else np.nan,
            **{fl: int(n[fl].astype(int).sum()) for fl in NODE_FLAGS},
            "unsupplied": int(((n["supplied"].astype(int) == 0)
                               & (n["fixed_head"].astype(int) == 0)).sum()),
            **{fl: int(p[fl].astype(int).sum()) for fl in PIPE_FLAGS},
        })
    body.append("<h3>Scenarios</h3>")
    body.append(_table(pd.DataFrame(rows), [
        ("scenario", "scenario", _txt), ("iterations", "solver iterations", _txt),
        ("demand", f"total demand [{f.u_flow}]", _num(1)),
        ("min_p", f"lowest pressure [{f.u_pressure}]", _num(1)), ("min_node", "at node", _txt),
        ("max_p", f"highest pressure [{f.u_pressure}]", _num(1)),
        ("max_v", f"highest velocity [{f.u_velocity}]", _num(2)),
        ("low_pressure", "low pressure", _num(0)), ("high_pressure", "high pressure", _num(0)),
        ("negative_pressure", "negative pressure", _num(0)),
        ("unsupplied", "unsupplied", _num(0)), ("high_velocity", "high velocity", _num(0)),
        ("high_headloss", "high head loss", _num(0))], table_id="scenarios"))

    body.append("<h3>Flags by scenario and zone</h3>")
    body.append(_table(_flags_by_zone(layers, scenarios), [
        ("scenario", "scenario", _txt), ("zone", "zone", _txt), ("nodes", "nodes", _num(0)),
        ("low_pressure", "low pressure", _num(0)), ("high_pressure", "high pressure", _num(0)),
        ("negative_pressure", "negative pressure", _num(0)),
        ("unsupplied", "unsupplied", _num(0)), ("pipes", "pipes", _num(0)),
        ("high_velocity", "high velocity", _num(0)),
        ("high_headloss", "high head loss", _num(0))], table_id="flags-by-zone"))

    if hyd is not None:
        body.append("<h3>Fire flow by zone</h3>")
        body.append(_table(_fire_by_zone(hyd, f), [
            ("zone", "zone", _txt), ("hydrants", "hydrants", _num(0)),
            ("meets", "meet required flow", _num(0)), ("fails", "below required", _num(0)),
            ("AA", "class AA", _num(0)), ("A", "class A", _num(0)), ("B", "class B", _num(0)),
            ("C", "class C", _num(0)),
            ("min_avail", f"lowest available [{f.u_flow}]", _num(0))], table_id="fire-by-zone"))
        si = " (about 95, 63 and 32 L/s)" if f.system == "SI" else ""
        body.append(_p("Classes by available flow at 20 psi residual (NFPA 291): AA 1500 gpm "
                       f"or more, A 1000-1499, B 500-999, C below 500{si}. Fire-flow figures "
                       "are model estimates: confirm them by field flow tests.", "note"))
    body.append(_changes(layers.get("changes")))
    if fnd is not None:
        body.append(_findings(fnd))
    return _section("summary", "Summary", body)


def _flags_by_zone(layers, scenarios) -> pd.DataFrame:
    parts = []
    for s in scenarios:
        n, p = layers[f"nodes_{s}"], layers[f"pipes_{s}"]
        nd = pd.DataFrame({"zone": n["zone"].fillna("").astype(str),
                           **{fl: n[fl].astype(int) for fl in NODE_FLAGS},
                           "unsupplied": ((n["supplied"].astype(int) == 0)
                                          & (n["fixed_head"].astype(int) == 0)).astype(int)})
        ng = nd.groupby("zone").agg(nodes=("zone", "size"), **{c: (c, "sum") for c in
                                                                 (*NODE_FLAGS, "unsupplied")})
        zone_of = pd.Series(n["zone"].fillna("").astype(str).to_numpy(),
                            index=n["node_id"].astype(str).to_numpy())
        zone_of = zone_of[~zone_of.index.duplicated()]
        pz = zone_of.reindex(p["from_node"].astype(str).to_numpy()).fillna("").to_numpy()
        pd_ = pd.DataFrame({"zone": pz, **{fl: p[fl].astype(int).to_numpy() for fl in PIPE_FLAGS}})
        pg = pd_.groupby("zone").agg(pipes=("zone", "size"),
                                     **{c: (c, "sum") for c in PIPE_FLAGS})
        t = ng.join(pg, how="outer").fillna(0).reset_index()
        t.insert(0, "scenario", s)
        parts.append(t)
    out = pd.concat(parts, ignore_index=True)
    out["zone"] = out["zone"].replace("", "(none)")
    return out


def _fire_by_zone(hyd: pd.DataFrame, f: Fields) -> pd.DataFrame:
    h = pd.DataFrame({"zone": hyd["zone"].fillna("").astype(str).replace("", "(none)"),
                      "meets": hyd["meets_required"].fillna(0).astype(int),
                      "cls": hyd["nfpa_class"].fillna("").astype(str),
                      "avail": hyd[f.available_flow].astype(float)})
    h["fails"] = 1 - h["meets"]
    for c in ("AA", "A", "B", "C"):
        h[c] = (h["cls"] == c).astype(int)
    g = h.groupby("zone").agg(hydrants=("zone", "size"), meets=("meets", "sum"),
                              fails=("fails", "sum"), AA=("AA", "sum"), A=("A", "sum"),
                              B=("B", "sum"), C=("C", "sum"), min_avail=("avail", "min"))
    return g.reset_index()


def _changes(changes: pd.DataFrame | None) -> str:
    body = ["<h3>Changes since the previous run</h3>"]
    if changes is None:
        body.append(_p("No previous run was given, so there is nothing to compare with."))
        return "".join(body)
    if not len(changes):
        body.append(_p("No flag is new or resolved since the previous run."))
        return "".join(body)
    c = changes.astype({"change": str, "layer": str, "flag": str})
    counts = (c.groupby(["layer", "flag", "change"]).size().unstack("change", fill_value=0)
              .reset_index())
    for col in ("new", "resolved"):
        if col not in counts:
            counts[col] = 0
    body.append(_table(counts, [("layer", "layer", _txt), ("flag", "flag", _txt),
                                ("new", "new", _num(0)), ("resolved", "resolved", _num(0))],
                       table_id="changes"))
    listed = c.sort_values(["change", "layer", "flag", "feature_id"]).head(200)
    body.append("<details><summary>" + _e(f"The changes ({len(listed)} of {len(c)} listed)")
                + "</summary>")
    body.append(_table(listed, [("change", "change", _txt), ("layer", "layer", _txt),
                                ("feature_id", "id", _txt), ("flag", "flag", _txt)]))
    body.append("</details>")
    return "".join(body)


def _findings(fnd: pd.DataFrame) -> str:
    body = ["<h3>Findings in the GIS</h3>"]
    t = pd.DataFrame({"kind": fnd["kind"].astype(str), "severity": fnd["severity"].astype(str)})
    counts = t.groupby(["kind", "severity"]).size().rename("count").reset_index()
    body.append(_table(counts, [("kind", "kind", _txt), ("severity", "severity", _txt),
                                ("count", "count", _num(0))], table_id="findings-count"))
    order = {"error": 0, "warning": 1, "info": 2}
    f2 = pd.DataFrame(fnd.drop(columns="geometry", errors="ignore"))
    f2["_o"] = f2["severity"].astype(str).map(order).fillna(3)
    f2 = f2.sort_values(["_o", "kind", "feature_id"], kind="stable").head(200)
    body.append("<details><summary>" + _e(f"Findings, most severe first ({len(f2)} of "
                                          f"{len(fnd)} listed)") + "</summary>")
    body.append(_table(f2, [("severity", "severity", _txt), ("kind", "kind", _txt),
                            ("layer", "layer", _txt), ("feature_id", "id", _txt),
                            ("message", "message", _txt)]))
    body.append("</details>")
    return "".join(body)


def _maps(layers, scenarios, f: Fields) -> str:
    pipes = layers[f"pipes_{scenarios[0]}"]
    if not isinstance(pipes, gpd.GeoDataFrame) or pipes.geometry.name not in pipes.columns:
        return _section("maps", "Maps", [_p("The layers carry no geometry: no maps.")])
    crs = pipes.crs

    def same(g):
        return g.to_crs(crs) if crs is not None and g.crs is not None and g.crs != crs else g

    nodes = {s: same(layers[f"nodes_{s}"]) for s in scenarios}
    body = [_figure(figures.pressure_maps(pipes, nodes, f), "map of pressure at nodes",
                    "Pressure at supplied junctions in each scenario (one colour scale). "
                    "Squares: sources and tanks; hollow circles: nodes not supplied.")]
    hv = np.zeros(len(pipes), bool)
    hh = np.zeros(len(pipes), bool)
    for s in scenarios:
        p = layers[f"pipes_{s}"]
        if len(p) == len(pipes):
            hv |= p["high_velocity"].astype(int).to_numpy() == 1
            hh |= p["high_headloss"].astype(int).to_numpy() == 1
    body.append(_figure(figures.flagged_pipes_map(pipes, hv, hh), "map of flagged pipes",
                        "Pipes flagged for high velocity or high unit head loss in any scenario."))
    fnd = layers.get("findings")
    if isinstance(fnd, gpd.GeoDataFrame) and fnd.geometry.name in fnd.columns:
        body.append(_figure(figures.findings_map(pipes, same(fnd)), "map of findings",
                            "Findings in the GIS that have a location, by severity."))
    hyd = layers.get("hydrants_fireflow")
    if isinstance(hyd, gpd.GeoDataFrame) and hyd.geometry.name in hyd.columns:
        body.append(_figure(figures.hydrants_map(pipes, same(hyd)),
                            "map of hydrants by fire-flow class",
                            "Hydrants coloured by fire-flow class; rings mark hydrants below "
                            "their required fire flow (model estimates; confirm by field "
                            "flow tests)."))
    return _section("maps", "Maps", body)


def _hgl(layers, worst: str, f: Fields, hgl_path, criteria, system) -> str:
    nodes, pipes = layers[f"nodes_{worst}"], layers[f"pipes_{worst}"]
    try:
        prof = hgl_profile(nodes, pipes, list(hgl_path) if hgl_path else None)
    except GridflowError as exc:
        log.warning("HGL profile not drawn: %s", exc)
        return _section("hgl", "Hydraulic grade line profile",
                        [_p(f"No profile could be drawn: {exc}", "caution-inline")])
    how = ("along the path set in the config" if hgl_path else
           "from the nearest source or tank to the lowest-pressure node")
    title = (f"Scenario {worst}: {prof['node_id'].iloc[0]} to {prof['node_id'].iloc[-1]} "
             f"({how})")
    minp = None
    if criteria and "min_pressure" in criteria:
        minp = _criterion_pressure(criteria["min_pressure"], system)
    uri = figures.hgl_figure(prof, f, title=title, min_pressure=minp)
    u = f.u_len
    body = [_figure(uri, "hydraulic grade line profile",
                    "Ground, hydraulic grade line (the solver's heads) and the pipes' "
                    "pressure-rating limit (ground plus rating as head, where pipes carry a "
                    "rating). Pressure at a point is the height of the grade line above "
                    "ground.")]
    body.append("<details><summary>" + _e(f"Profile values ({len(prof)} nodes)") + "</summary>")
    body.append(_table(prof, [(f"distance_{u}", f"distance [{u}]", _num(1)),
                              ("node_id", "node", _txt), ("pipe_id", "via pipe", _txt),
                              (f.elevation, f"ground [{u}]", _num(3)),
                              (f.head, f"head [{u}]", _num(3)),
                              (f.pressure, f"pressure [{f.u_pressure}]", _num(2)),
                              (f"rating_head_{u}", f"rating limit as head [{u}]", _num(3))],
                       table_id="hgl-profile"))
    body.append("</details>")
    return _section("hgl", "Hydraulic grade line profile", body)


def _tables(layers, scenarios, f: Fields, worst_rows: int) -> str:
    body = [f"<h3>Lowest pressures (worst {worst_rows} nodes over all scenarios)</h3>"]
    parts = []
    for s in scenarios:
        n = layers[f"nodes_{s}"]
        j = pd.DataFrame(n.loc[_junction_mask(n)].drop(columns="geometry", errors="ignore"))
        j["scenario"] = s
        parts.append(j)
    allj = pd.concat(parts, ignore_index=True)
    allj = allj[allj[f.pressure].notna()]
    if len(allj):
        allj["flags"] = _flag_names(allj, NODE_FLAGS)
        worst = allj.loc[allj.groupby(allj["node_id"].astype(str))[f.pressure].idxmin()]
        worst = worst.sort_values([f.pressure, "node_id"], kind="stable").head(worst_rows)
    else:
        worst = allj
    body.append(_table(worst, [("node_id", "node", _txt), ("zone", "zone", _txt),
                               ("scenario", "scenario", _txt),
                               (f.pressure, f"pressure [{f.u_pressure}]", _num(1)),
                               (f.elevation, f"ground [{f.u_len}]", _num(1)),
                               (f.head, f"head [{f.u_len}]", _num(1)),
                               (f.demand, f"demand [{f.u_flow}]", _num(2)),
                               ("flags", "flags", _txt)], table_id="worst-nodes"))
    unsup = []
    for s in scenarios:
        n = layers[f"nodes_{s}"]
        ids = n.loc[(n["supplied"].astype(int) == 0) & (n["fixed_head"].astype(int) == 0),
                    "node_id"].astype(str)
        if len(ids):
            more = f" and {len(ids) - 50} more" if len(ids) > 50 else ""
            unsup.append(_p(f"Not supplied in {s} ({len(ids)}): "
                            + ", ".join(ids.head(50)) + more, "note"))
    body.extend(unsup)

    body.append(f"<h3>Fastest mains (top {worst_rows} over all scenarios)</h3>")
    parts = []
    for s in scenarios:
        p = layers[f"pipes_{s}"]
        p = pd.DataFrame(p[p["kind"].astype(str) == "pipe"].drop(columns="geometry",
                                                                 errors="ignore"))
        p["scenario"] = s
        p["_speed"] = p[f.velocity].astype(float).abs()
        parts.append(p)
    allp = pd.concat(parts, ignore_index=True)
    allp = allp[allp["_speed"].notna()]
    if len(allp):
        allp["flags"] = _flag_names(allp, PIPE_FLAGS)
        fast = allp.loc[allp.groupby(allp["pipe_id"].astype(str))["_speed"].idxmax()]
        fast = fast.sort_values(["_speed", "pipe_id"], ascending=[False, True],
                                kind="stable").head(worst_rows)
    else:
        fast = allp
    body.append(_table(fast, [("pipe_id", "pipe", _txt), ("from_node", "from", _txt),
                              ("to_node", "to", _txt), ("scenario", "scenario", _txt),
                              (f.diameter, f"diameter [{f.u_diameter}]", _num(1)),
                              (f.flow, f"flow [{f.u_flow}]", _num(1)),
                              ("_speed", f"velocity [{f.u_velocity}]", _num(2)),
                              (f.unit_headloss, f"unit head loss [{f.u_unit_headloss}]",
                               _num(2)),
                              ("flags", "flags", _txt)], table_id="fastest-mains"))

    hyd = layers.get("hydrants_fireflow")
    if hyd is not None:
        h = pd.DataFrame(hyd.drop(columns="geometry", errors="ignore"))
        h = h[h["meets_required"].fillna(0).astype(int) == 0].copy()
        h["_ratio"] = h[f.available_flow].astype(float) / h[f.required_flow].astype(float)
        h = h.sort_values(["_ratio", "hydrant_id"], kind="stable")
        cap = max(worst_rows, 200)
        body.append(f"<h3>Hydrants below their required fire flow ({len(h)})</h3>")
        body.append(_table(h.head(cap), [
            ("hydrant_id", "hydrant", _txt), ("node_id", "node", _txt), ("zone", "zone", _txt),
            (f.static_pressure, f"static pressure [{f.u_pressure}]", _num(1)),
            (f.required_flow, f"required [{f.u_flow}]", _num(0)),
            (f.available_flow, f"available [{f.u_flow}]", _num(0)),
            (f.residual_pressure, f"residual at required [{f.u_pressure}]", _num(1)),
            ("limited_by", "limited by", _txt), ("nfpa_class", "class", _txt)],
            table_id="failing-hydrants"))
        if len(h) > cap:
            body.append(_p(f"{len(h) - cap} more are in the hydrants_fireflow layer.", "note"))
        body.append(_p("Available flows are model estimates at the residual target; confirm "
                       "them by field flow tests before relying on them.", "note"))
    return _section("tables", "Tables", body)


def _flag_names(df: pd.DataFrame, flags: tuple[str, ...]) -> pd.Series:
    out = pd.Series("", index=df.index, dtype=object)
    for fl in flags:
        on = df[fl].fillna(0).astype(int) == 1
        out[on] = out[on] + np.where(out[on] == "", "", ", ") + fl.replace("_", " ")
    return out


def _histograms(layers, scenarios, f: Fields, criteria, system) -> str:
    lines = []
    for key, text in (criteria or {}).items():
        if "pressure" in str(key) and "residual" not in str(key):
            v = _criterion_pressure(text, system)
            if v is not None:
                lines.append((f"{_label(key)} ({text})", v))
    nodes = {s: layers[f"nodes_{s}"] for s in scenarios}
    uri = figures.pressure_histograms(nodes, f, lines)
    return _section("distribution", "Pressure distribution",
                    [_figure(uri, "histograms of pressure per scenario",
                             "Pressure at supplied junctions, per scenario; lines mark the "
                             "pressure criteria.")])


# ---------------------------------------------------------------- the page
_CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',Roboto,Helvetica,Arial,sans-serif;
color:#22313f;background:#f6f7f9;margin:0;line-height:1.4}
main{max-width:1180px;margin:0 auto;padding:16px 24px 48px;background:#fff}
header h1{font-size:1.6em;margin:0.4em 0 0.1em}
header p{margin:0;color:#6b7785}
nav{margin:10px 0 0;font-size:0.95em}
nav a{margin-right:14px;color:#1f5fa8}
h2{border-bottom:2px solid #2f7f8f;padding-bottom:3px;margin-top:1.6em}
h3{margin:1.2em 0 0.4em}
.caution{border:2px solid #b8323f;border-left:10px solid #b8323f;background:#fbf0ee;
padding:10px 16px;margin:14px 0}
.caution h2{border:0;margin:0 0 4px;color:#8c1f2b;font-size:1.2em}
.caution ul{margin:4px 0 0 0;padding-left:20px}
.caution-inline{color:#8c1f2b;font-weight:600}
.note{color:#4d5966;font-size:0.92em}
.cards{display:flex;flex-wrap:wrap;gap:10px;margin:10px 0}
.card{flex:1 1 150px;border:1px solid #d5dae0;border-radius:6px;padding:8px 12px;
background:#eef4f6}
.card .k{font-size:0.8em;text-transform:uppercase;color:#4d5966}
.card .v{font-size:1.5em;font-weight:700}
.card .s{font-size:0.8em;color:#4d5966}
table{border-collapse:collapse;margin:6px 0 12px;font-size:0.88em}
caption{text-align:left;font-weight:600}
th,td{border:1px solid #d5dae0;padding:3px 7px;text-align:left}
th{background:#e3ebef}
td.n{text-align:right;font-variant-numeric:tabular-nums}
tbody tr:nth-child(even){background:#f6f8fa}
figure{margin:10px 0 18px}
figure img{max-width:100%;height:auto;border:1px solid #e1e4e8}
figcaption{font-size:0.9em;color:#4d5966}
footer{margin-top:28px;font-size:0.85em;color:#6b7785;border-top:1px solid #d5dae0;
padding-top:8px}
"""


def _page(title: str, subtitle: str, sections: list[str]) -> str:
    cautions = "".join(f"<li>{_e(c)}</li>" for c in CAUTIONS)
    nav = ('<nav><a href="#summary">Summary</a><a href="#maps">Maps</a>'
           '<a href="#hgl">Grade line profile</a><a href="#tables">Tables</a>'
           '<a href="#distribution">Pressure distribution</a></nav>')
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8"/>'
        '<meta name="viewport" content="width=device-width, initial-scale=1"/>'
        f"<title>{_e(title)}</title><style>{_CSS}</style></head><body><main>"
        f"<header><h1>{_e(title)}</h1><p>{_e(subtitle)}</p>{nav}</header>"
        '<aside class="caution" id="cautions" role="note"><h2>Read this first</h2>'
        f"<ul>{cautions}</ul></aside>"
        + "".join(sections)
        + "<footer>" + _e(" ".join(CAUTIONS)) + "</footer></main></body></html>\n")


def write_report(html_path: Path, layers: dict, run_info: list[tuple[str, str]], *,
                 units: UnitSystem = "US", hgl_path: list[str] | None = None,
                 worst_rows: int = 20, criteria: dict | None = None) -> Path:
    """Write the self-contained HTML report of a run.

    Parameters
    ----------
    html_path : Path
        Where the report goes; written to a temporary file beside it and renamed into place.
    layers : dict of str to GeoDataFrame or DataFrame
        The run's output layers under their contract names: ``nodes_<scenario>`` and
        ``pipes_<scenario>`` for each scenario (discovered from the names, in dict order),
        and optionally ``hydrants_fireflow``, ``findings``, ``changes``.
    run_info : list of (str, str)
        The run record (key, value); ``iterations_<scenario>`` keys give the solver
        iterations shown per scenario.
    units : {'US', 'SI'}
        Which field names (``pressure_psi`` or ``pressure_kpa``...) the layers carry.
    hgl_path : list of str, optional
        Node ids for the hydraulic grade line profile (see :func:`hgl_profile`); default from
        a source to the lowest-pressure node of the worst scenario.
    worst_rows : int
        Rows in the worst-nodes and fastest-mains tables.
    criteria : dict of str to str, optional
        Criteria as display strings (``{"min_pressure": "35 psi"}``) for legends; pressure
        criteria are drawn on the histograms, ``min_pressure`` on the profile.

    Returns
    -------
    Path
        ``html_path``.

    Raises
    ------
    GridflowError
        If a layer lacks a field the report needs (naming layer and field).
    OutputError
        If the file cannot be written.

    Notes
    -----
    A profile path that cannot be drawn (an unknown node id, nodes not connected) does not
    stop the report: the profile section says why, and a warning is logged.
    """
    html_path = Path(html_path)
    f = fields_for(units)
    scenarios = _scenarios(layers)
    _check_layers(layers, scenarios, f)
    worst = _worst_scenario(layers, scenarios, f)
    info = {str(k): str(v) for k, v in run_info}
    title = "Network hydraulics report" + (f": {info['name']}" if info.get("name") else "")
    when = info.get("end_time") or info.get("end") or info.get("start_time") or ""
    subtitle = (f"gridflow {info.get('tool_version', '')} {('- ' + when) if when else ''} - "
                f"units: {'US customary' if units == 'US' else 'SI'} - scenarios: "
                + ", ".join(scenarios))
    sections = [
        _summary(layers, scenarios, list(run_info), f, criteria, worst),
        _maps(layers, scenarios, f),
        _hgl(layers, worst, f, hgl_path, criteria, units),
        _tables(layers, scenarios, f, worst_rows),
        _histograms(layers, scenarios, f, criteria, units),
    ]
    text = _page(title, subtitle, sections)
    _write_atomic(html_path, text)
    return html_path


def _write_atomic(path: Path, text: str) -> None:
    """The page, written through the one atomic-write helper (:mod:`gridflow.io.atomic`)."""
    from gridflow.io.atomic import write_text

    write_text(path, text, what="the report")
