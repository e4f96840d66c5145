"""The self-contained HTML report: summary, cautions, maps, HGL profile, tables, histograms.

Computed from the run's in-memory results (:class:`~gridflow.report.data.ReportData`): each
table is a function of :mod:`gridflow.report.sections` returning a DataFrame, each figure a
function of :mod:`gridflow.report.figures`; the page is a Jinja2 template with autoescaping.
Everything the page needs is inside the one file (inline CSS, PNG data URIs, the inlined map
library and its data); it fetches nothing. The markup is well-formed XML.

Adding a table: write a function ``f(data) -> DataFrame`` in ``sections.py`` and add one
:class:`Table` for it in :func:`_context` (or pass ``extra_tables`` to :func:`write_report`).
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from jinja2 import Environment, PackageLoader, StrictUndefined, select_autoescape

from gridflow.errors import GridflowError
from gridflow.report import figures, sections
from gridflow.report.data import ReportData
from gridflow.report.interactive import assets, map_payload, payload_json, points_xy
from gridflow.report.profile import hgl_profile

__all__ = ["CAUTIONS", "Column", "Table", "write_report", "render_report"]

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


@dataclass(frozen=True)
class Column:
    """A table column: the frame's field, its header, and decimals (None: text)."""

    field: str
    header: str
    digits: int | None = None


@dataclass(frozen=True)
class Table:
    """A DataFrame shown with chosen columns (those the frame lacks are left out)."""

    frame: pd.DataFrame
    columns: Sequence[Column]
    table_id: str = ""
    caption: str = ""
    limit: int | None = None

    @property
    def shown(self) -> list[Column]:
        return [c for c in self.columns if c.field in self.frame.columns]

    @property
    def rows(self) -> list[list[tuple[Column, str]]]:
        cols = self.shown
        df = self.frame if self.limit is None else self.frame.head(self.limit)
        texts = [_format(df[c.field].to_numpy(), c.digits) for c in cols]
        return [list(zip(cols, row)) for row in zip(*texts)] if cols else []


def _format(values: np.ndarray, digits: int | None) -> list[str]:
    if digits is None:
        return ["" if v is None or (isinstance(v, float) and np.isnan(v)) else str(v)
                for v in values]
    out = []
    for v in values:
        try:
            x = float(v)
        except (TypeError, ValueError):
            out.append(str(v))
            continue
        out.append(f"{x:,.{digits}f}" if np.isfinite(x) else "\u2013")
    return out


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
.gf-map{height:620px;border:1px solid #c3c9d1}
.gf-map.leaflet-container{background:#fbfcfd}
.gf-pop table{font-size:0.85em;margin:4px 0}
.gf-legend{background:#fff;padding:6px 8px;border:1px solid #c3c9d1;font-size:0.8em;
max-width:220px;line-height:1.3}
.gf-ramp{display:inline-block;width:200px;height:10px;margin-top:3px}
pre.licence{font-size:0.8em;white-space:pre-wrap}
footer{margin-top:28px;font-size:0.85em;color:#6b7785;border-top:1px solid #d5dae0;
padding-top:8px}
@media print{.gf-map,#maps h3:first-of-type{display:none}}
"""


@dataclass(frozen=True)
class _Fig:
    uri: str
    alt: str
    caption: str


def _env() -> Environment:
    return Environment(loader=PackageLoader("gridflow.report", "templates"),
                       autoescape=select_autoescape(["html", "j2"], default=True),
                       undefined=StrictUndefined, trim_blocks=False, lstrip_blocks=False)


def _maps(d: ReportData) -> list[_Fig]:
    if d.node_xy is None:
        return []
    hv = np.zeros(d.network.n_links, bool)
    hh = np.zeros(d.network.n_links, bool)
    for s in d.scenarios:
        hv |= s.pipe_flags["high_velocity"].astype(bool)
        hh |= s.pipe_flags["high_headloss"].astype(bool)
    out = [_Fig(figures.pressure_maps(d), "map of pressure at nodes",
                "Pressure at supplied junctions in each scenario (one colour scale; on large "
                "networks the lowest pressure per grid cell). Squares: sources and tanks; "
                "hollow circles: nodes not supplied."),
           _Fig(figures.flagged_pipes_map(d, hv, hh), "map of flagged pipes",
                "Pipes flagged for high velocity or high unit head loss in any scenario.")]

    if d.findings is not None and "geometry" in d.findings.columns:
        out.append(_Fig(figures.findings_map(d, points_xy(d.findings),
                                             d.findings["severity"].astype(str).to_numpy()),
                        "map of findings", "Findings in the GIS that have a location, by "
                        "severity."))
    if d.hydrants is not None and "geometry" in d.hydrants.columns:
        h = d.hydrants
        out.append(_Fig(figures.hydrants_map(
            d, points_xy(h), h["nfpa_class"].fillna("").astype(str).to_numpy(),
            h["meets_required"].fillna(0).astype(int).to_numpy() == 0),
            "map of hydrants by fire-flow class", "Hydrants coloured by fire-flow class; rings "
            "mark hydrants below their required fire flow (model estimates; confirm by field "
            "flow tests)."))
    return out


def _context(d: ReportData, extra_tables: Sequence[Callable[[ReportData], Table | None]]
             ) -> dict:
    f = d.fields
    C = Column
    title = "Network hydraulics report" + (f": {d.name}" if d.name else "")
    when = d.info("ended_utc") or d.info("started_utc")
    subtitle = (f"gridflow {d.info('tool_version')} {('- ' + when) if when else ''} - units: "
                f"{'US customary' if d.units == 'US' else 'SI'} - scenarios: "
                + ", ".join(s.name for s in d.scenarios))
    ri = pd.DataFrame(d.run_info or [], columns=["key", "value"])
    head_keys = ("name", "tool_version", "config", "unit_system", "headloss_model",
                 "started_utc", "ended_utc", "seconds_total", "findings", "changes_new",
                 "changes_resolved")
    kv = [C("key", "item"), C("value", "value")]
    ctx: dict = {
        "title": title, "subtitle": subtitle, "css": _CSS, "cautions": CAUTIONS,
        "cards": sections.overview(d).to_dict("records"),
        "run_head": Table(ri[ri["key"].isin(head_keys)], kv, "run"),
        "run_record": Table(ri, kv, "run_record"),
        "criteria": Table(sections.criteria_table(d), [C("criterion", "criterion"),
                                                       C("value", "value", 2),
                                                       C("unit", "unit")], "criteria"),
        "scenarios": Table(sections.scenario_summary(d), [
            C("scenario", "scenario"), C("iterations", "solver iterations"),
            C("demand", f"total demand [{f.u_flow}]", 1),
            C("min_p", f"lowest pressure [{f.u_pressure}]", 1), C("min_node", "at node"),
            C("max_p", f"highest pressure [{f.u_pressure}]", 1),
            C("max_v", f"highest velocity [{f.u_velocity}]", 2),
            C("low_pressure", "low pressure", 0), C("high_pressure", "high pressure", 0),
            C("negative_pressure", "negative pressure", 0), C("unsupplied", "unsupplied", 0),
            C("high_velocity", "high velocity", 0), C("high_headloss", "high head loss", 0)],
            "scenarios"),
        "flags_by_zone": Table(sections.flags_by_zone(d), [
            C("scenario", "scenario"), C("zone", "zone"), C("nodes", "nodes", 0),
            C("low_pressure", "low pressure", 0), C("high_pressure", "high pressure", 0),
            C("negative_pressure", "negative pressure", 0), C("unsupplied", "unsupplied", 0),
            C("pipes", "pipes", 0), C("high_velocity", "high velocity", 0),
            C("high_headloss", "high head loss", 0)], "flags-by-zone"),
        "zone_note": (f"Zones are the utility's own, from the GIS. {sections.UNNAMED_ZONE} "
                      "groups the parts of the network the GIS puts in no named zone: where "
                      "closed valves, pressure-reducing valves or pumps cut a part off (often "
                      "a single node) and no feature in it carries a zone name, gridflow gives "
                      "it an automatic name (zone_1, zone_2 ... in the results layers)."),
        "fire_by_zone": None, "fire_note": "",
        "changes": None, "changes_list": None, "changes_list_title": "",
        "findings_counts": Table(sections.findings_counts(d), [
            C("kind", "kind"), C("severity", "severity"), C("count", "count", 0)],
            "findings-count"),
        "findings_list": None, "findings_list_title": "",
        "routine": Table(sections.routine_counts(d), [C("kind", "kind"),
                                                      C("count", "count", 0)], "routine"),
        "worst_rows": d.worst_rows, "unsupplied": sections.unsupplied(d),
        "worst_nodes": Table(sections.worst_nodes(d), [
            C("node_id", "node"), C("zone", "zone"), C("scenario", "scenario"),
            C(f.pressure, f"pressure [{f.u_pressure}]", 1),
            C(f.elevation, f"ground [{f.u_len}]", 1), C(f.head, f"head [{f.u_len}]", 1),
            C(f.demand, f"demand [{f.u_flow}]", 2), C("flags", "flags")], "worst-nodes"),
        "fastest_mains": Table(sections.fastest_mains(d), [
            C("pipe_id", "pipe"), C("from_node", "from"), C("to_node", "to"),
            C("scenario", "scenario"), C(f.diameter, f"diameter [{f.u_diameter}]", 1),
            C(f.flow, f"flow [{f.u_flow}]", 1), C("_speed", f"velocity [{f.u_velocity}]", 2),
            C(f.unit_headloss, f"unit head loss [{f.u_unit_headloss}]", 2),
            C("flags", "flags")], "fastest-mains"),
        "failing": None, "failing_total": 0,
        "extra_tables": [t for t in (fn(d) for fn in extra_tables) if t is not None],
    }
    if d.hydrants is not None:
        ctx["fire_by_zone"] = Table(sections.fire_by_zone(d), [
            C("zone", "zone"), C("hydrants", "hydrants", 0),
            C("meets", "meet required flow", 0), C("fails", "below required", 0),
            C("AA", "class AA", 0), C("A", "class A", 0), C("B", "class B", 0),
            C("C", "class C", 0), C("min_avail", f"lowest available [{f.u_flow}]", 0)],
            "fire-by-zone")
        si = " (about 95, 63 and 32 L/s)" if d.units == "SI" else ""
        ctx["fire_note"] = ("Classes by available flow at 20 psi residual (NFPA 291): AA 1500 "
                            f"gpm or more, A 1000-1499, B 500-999, C below 500{si}. Fire-flow "
                            "figures are model estimates: confirm them by field flow tests.")
        fail = sections.failing_hydrants(d)
        ctx["failing_total"] = len(fail)
        ctx["failing"] = Table(fail, [
            C("hydrant_id", "hydrant"), C("node_id", "node"), C("zone", "zone"),
            C(f.static_pressure, f"static pressure [{f.u_pressure}]", 1),
            C(f.required_flow, f"required [{f.u_flow}]", 0),
            C(f.available_flow, f"available [{f.u_flow}]", 0),
            C(f.residual_pressure, f"residual at required [{f.u_pressure}]", 1),
            C("limited_by", "limited by"), C("nfpa_class", "class")], "failing-hydrants",
            limit=max(d.worst_rows, 200))
    if d.changes is not None:
        ctx["changes"] = Table(sections.changes_counts(d), [
            C("layer", "layer"), C("flag", "flag"), C("new", "new", 0),
            C("resolved", "resolved", 0)], "changes")
        listed = d.changes.astype(str).sort_values(["change", "layer", "flag", "feature_id"])
        ctx["changes_list"] = Table(listed, [C("change", "change"), C("layer", "layer"),
                                             C("feature_id", "id"), C("flag", "flag")],
                                    limit=200)
        ctx["changes_list_title"] = f"The changes ({min(len(listed), 200)} of {len(listed)} " \
                                    "listed)"
    if d.findings is not None and len(d.findings):
        fd = pd.DataFrame(d.findings.drop(columns="geometry", errors="ignore"))
        fd["_o"] = fd["severity"].astype(str).map({"error": 0, "warning": 1}).fillna(2)
        fd = fd.sort_values(["_o", "kind", "feature_id"], kind="stable")
        ctx["findings_list"] = Table(fd, [C("severity", "severity"), C("kind", "kind"),
                                          C("layer", "layer"), C("feature_id", "id"),
                                          C("message", "message")], limit=200)
        ctx["findings_list_title"] = (f"Findings, most severe first ({min(len(fd), 200)} of "
                                      f"{len(fd)} listed)")
    ctx.update(_profile(d))
    ctx["histograms"] = figures.pressure_histograms(d, [
        (f"minimum pressure ({d.conv(d.criteria.min_pressure, 'pressure'):.0f} "
         f"{f.u_pressure})", float(d.conv(d.criteria.min_pressure, "pressure"))),
        (f"maximum pressure ({d.conv(d.criteria.max_pressure, 'pressure'):.0f} "
         f"{f.u_pressure})", float(d.conv(d.criteria.max_pressure, "pressure")))])
    ctx["maps"] = _maps(d)
    ctx["map"] = None
    payload = map_payload(d)
    if payload is not None:
        a = assets()
        c = payload["counts"]
        note = (f"Drawn: {c['mainsShown']:,} of {c['mains']:,} mains (the widest, and every "
                f"flagged one), {c['nodesShown']:,} of {c['nodes']:,} nodes"
                + ("; the other junctions as grid cells showing their lowest pressure."
                   if c["aggregated"] else "."))
        ctx["map"] = {"data": payload_json(payload), "library": a["library"],
                      "library_css": a["library_css"], "licence": a["licence"],
                      "script": a["script"], "note": note}
    return ctx


def _profile(d: ReportData) -> dict:
    s = d.worst_scenario()
    f = d.fields
    try:
        prof = hgl_profile(s.network, s.result, d.units, d.hgl_path,
                           pressure_rating_m=d.pressure_rating_m)
    except GridflowError as exc:
        log.warning("HGL profile not drawn: %s", exc)
        return {"profile_error": str(exc), "profile": None, "profile_fig": ""}
    how = ("along the path set in the config" if d.hgl_path else
           "from the nearest source or tank to the lowest-pressure node")
    title = (f"Scenario {s.name}: {prof['node_id'].iloc[0]} to {prof['node_id'].iloc[-1]} "
             f"({how})")
    fig = figures.hgl_figure(prof, f, title=title,
                             min_pressure=float(d.conv(d.criteria.min_pressure, "pressure")))
    u = f.u_len
    table = Table(prof, [Column(f"distance_{u}", f"distance [{u}]", 1),
                         Column("node_id", "node"), Column("pipe_id", "via pipe"),
                         Column(f.elevation, f"ground [{u}]", 3),
                         Column(f.head, f"head [{u}]", 3),
                         Column(f.pressure, f"pressure [{f.u_pressure}]", 2),
                         Column(f"rating_head_{u}", f"rating limit as head [{u}]", 3)],
                  "hgl-profile")
    return {"profile_error": "", "profile": table, "profile_fig": fig}


def render_report(data: ReportData, *,
                  extra_tables: Sequence[Callable[[ReportData], Table | None]] = ()) -> str:
    """The report page as text."""
    return _env().get_template("report.html.j2").render(**_context(data, extra_tables))


def write_report(html_path: Path, data: ReportData, *,
                 extra_tables: Sequence[Callable[[ReportData], Table | None]] = ()) -> Path:
    """Write the self-contained HTML report of a run.

    Parameters
    ----------
    html_path : Path
        Where the report goes; written to a temporary file beside it and renamed into place.
    data : ReportData
        The run's results (see :class:`~gridflow.report.data.ReportData`).
    extra_tables : sequence of callables, optional
        Functions ``f(data) -> Table`` (or None to skip) whose tables close the Tables section.

    Returns
    -------
    Path
        ``html_path``.

    Raises
    ------
    OutputError
        If the file cannot be written (nothing is left behind).

    Notes
    -----
    A profile path that cannot be drawn (an unknown node id, nodes not connected) does not
    stop the report: the profile section says why, and a warning is logged.
    """
    html_path = Path(html_path)
    _write_atomic(html_path, render_report(data, extra_tables=extra_tables))
    return html_path


def _write_atomic(path: Path, text: str) -> None:
    """The page, written through the one atomic-write helper (:mod:`gridflow.io.atomic`)."""
    from gridflow.io.atomic import write_text

    write_text(path, text, what="the report")
