"""Default styles stored inside the output GeoPackage.

Desktop GIS reads a layer's default style from the GeoPackage's ``layer_styles`` table (one row
per layer, the style as XML, ``useAsDefault`` = 1). gridflow stores a rule-based style for every
result layer with geometry, so that what needs action stands out and the rest stays quiet:

- severity is encoded with a palette chosen to stay distinguishable with the common forms of
  colour-vision deficiency (vermillion for the worst, orange for warnings, blue for "too high",
  purple for "not supplied", light grey for "nothing to do"), and flagged features are drawn
  larger, on top (symbol levels), with a legend label in plain words;
- hydrants keep the NFPA 291 marking colours of their class (AA light blue, A green, B orange,
  C red), with a heavy dark ring when the hydrant fails its required flow.

Each rule is ``(label, filter, symbol)``: the filter is an expression over the layer's fields
(``ELSE`` for everything the other rules leave), the symbol a :class:`Marker` or :class:`Line`.
A feature drawn by several rules (a node below zero pressure is also below the working
minimum) shows the most severe on top: symbol levels draw the higher ``level`` last.
:data:`LAYER_STYLES` maps a layer name or a layer-name prefix (ending in
``_``) to its geometry kind and rules; :func:`style_for` finds the rules for a written layer.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from xml.sax.saxutils import quoteattr

__all__ = ["store_styles", "style_for", "style_xml", "expand_rules", "LAYER_STYLES", "Marker",
           "Line", "PALETTE", "NFPA_CLASS_COLORS"]

#: our palette, RGBA strings as desktop GIS reads them
PALETTE = {
    "critical": "213,94,0,255",       # vermillion: negative pressure, errors, failures
    "warning": "230,159,0,255",       # orange: below the working minimum, warnings
    "high": "0,114,178,255",          # blue: above a maximum
    "unsupplied": "120,40,140,255",   # purple: no path to any source or tank
    "device": "0,158,115,255",        # bluish green: pumps and regulating valves
    "closed": "40,40,40,255",         # near black: closed links
    "resolved": "0,158,115,255",      # bluish green: a flag that went away
    "quiet": "160,165,170,255",       # light grey: nothing to do
    "ring": "20,20,20,255",           # the ring around a hydrant that fails its required flow
}

#: NFPA 291 marking colours of hydrant classes (class AA light blue, A green, B orange, C red)
NFPA_CLASS_COLORS = {
    "AA": "120,190,240,255",
    "A": "40,160,70,255",
    "B": "245,140,20,255",
    "C": "215,40,40,255",
}


@dataclass(frozen=True)
class Marker:
    """A circle marker: fill colour, size [mm], optional ring (colour, width [mm])."""

    color: str
    size: float
    ring: str | None = None
    ring_width: float = 0.0
    level: int = 0


@dataclass(frozen=True)
class Line:
    """A line: colour, width [mm], dashed or solid."""

    color: str
    width: float
    dashed: bool = False
    level: int = 0


Rule = tuple[str, str, "Marker | Line"]

_PRESSURE_FLAGS = '"low_pressure" = 1 OR "high_pressure" = 1 OR "negative_pressure" = 1'


def _hydrant_rules() -> list[Rule]:
    out: list[Rule] = [("out of service", '"in_service" = 0',
                        Marker(PALETTE["quiet"], 2.0, ring=PALETTE["closed"], ring_width=0.4))]
    for cls, color in NFPA_CLASS_COLORS.items():
        out.append((f"class {cls}, fails its required flow",
                    f"\"nfpa_class\" = '{cls}' AND \"meets_required\" = 0",
                    Marker(color, 3.6, ring=PALETTE["ring"], ring_width=0.9, level=2)))
    for cls, color in NFPA_CLASS_COLORS.items():
        out.append((f"class {cls}, meets its required flow",
                    f"\"nfpa_class\" = '{cls}' AND coalesce(\"meets_required\", 1) <> 0",
                    Marker(color, 2.2, level=1)))
    out.append(("no fire-flow figure (not supplied)", "ELSE",
                Marker(PALETTE["unsupplied"], 2.0)))
    return out


#: layer name, or prefix ending in "_", -> (geometry kind, rules)
LAYER_STYLES: dict[str, tuple[str, list[Rule]]] = {
    "nodes_": ("point", [
        ("not supplied (no path to a source or tank)", '"supplied" = 0',
         Marker(PALETTE["unsupplied"], 2.8, level=3)),
        ("pressure below zero", '"negative_pressure" = 1',
         Marker(PALETTE["critical"], 3.0, level=3)),
        ("pressure below the working minimum", '"low_pressure" = 1',
         Marker(PALETTE["warning"], 2.6, level=2)),
        ("pressure above the maximum", '"high_pressure" = 1',
         Marker(PALETTE["high"], 2.6, level=2)),
        ("pressure within the criteria", "ELSE", Marker(PALETTE["quiet"], 1.0)),
    ]),
    "pipes_": ("line", [
        ("too fast or losing too much head", '"high_velocity" = 1 OR "high_headloss" = 1',
         Line(PALETTE["critical"], 1.2, level=3)),
        ("closed", "\"status\" = 'closed'", Line(PALETTE["closed"], 0.6, dashed=True, level=2)),
        ("pump or regulating valve",
         "\"kind\" = 'pump' OR (\"kind\" = 'valve' AND \"status\" NOT IN ('open', 'closed'))",
         Line(PALETTE["device"], 1.0, level=2)),
        ("within the criteria", "ELSE", Line(PALETTE["quiet"], 0.35)),
    ]),
    # the cleaned network written by `gridflow check` (no results, so no flags)
    "nodes_network": ("point", [
        ("source or tank", "\"kind\" <> 'junction'", Marker(PALETTE["device"], 2.4, level=1)),
        ("junction", "ELSE", Marker(PALETTE["quiet"], 1.0)),
    ]),
    "pipes_network": ("line", [
        ("closed", "\"status\" = 'closed'", Line(PALETTE["closed"], 0.6, dashed=True, level=1)),
        ("open", "ELSE", Line(PALETTE["quiet"], 0.35)),
    ]),
    "hydrants_fireflow": ("point", _hydrant_rules()),
    "flow_tests": ("point", [
        ("model differs from the field by more than the tolerance", '"out_of_tolerance" = 1',
         Marker(PALETTE["critical"], 3.2, level=2)),
        ("left out (see problem)", '"used" = 0',
         Marker(PALETTE["warning"], 2.4, ring=PALETTE["closed"], ring_width=0.4, level=1)),
        ("model within the tolerance of the field", "ELSE", Marker(PALETTE["quiet"], 2.0)),
    ]),
    "segments": ("line", [
        ("closing it cuts off other customers", '"cut_off_meters" > 0 OR "cut_off_hydrants" > 0',
         Line(PALETTE["critical"], 1.6, level=3)),
        ("no valve can isolate it", '"cannot_isolate" = 1',
         Line(PALETTE["unsupplied"], 1.4, level=3)),
        ("larger than the size bounds", '"oversized" = 1', Line(PALETTE["warning"], 1.2, level=2)),
        ("among the ten most critical", '"criticality_rank" <= 10',
         Line(PALETTE["high"], 1.2, level=2)),
        ("other segments", "ELSE", Line(PALETTE["quiet"], 0.5)),
    ]),
    "findings": ("mixed", [
        ("error: must be fixed", "\"severity\" = 'error'",
         Marker(PALETTE["critical"], 3.4, level=3)),
        ("warning: should be checked", "\"severity\" = 'warning'",
         Marker(PALETTE["warning"], 2.8, level=2)),
        ("for information", "ELSE", Marker(PALETTE["quiet"], 1.6)),
    ]),
    "changes": ("mixed", [
        ("new since the previous run", "\"change\" = 'new'",
         Marker(PALETTE["critical"], 3.0, level=2)),
        ("resolved since the previous run", "ELSE", Marker(PALETTE["resolved"], 2.4, level=1)),
    ]),
}


def style_for(layer_name: str) -> tuple[str, list[Rule]] | None:
    """The geometry kind and rules of a result layer, or None where it has no style.

    Examples
    --------
    >>> style_for("nodes_max_day")[0]
    'point'
    >>> style_for("run_info") is None
    True
    """
    if layer_name in LAYER_STYLES:
        return LAYER_STYLES[layer_name]
    for key, value in LAYER_STYLES.items():
        if key.endswith("_") and layer_name.startswith(key):
            return value
    return None


def _props(props: dict[str, object]) -> str:
    return "".join(f"<prop k={quoteattr(k)} v={quoteattr(str(v))}/>" for k, v in props.items())


def _marker_layer(m: Marker) -> str:
    props = {"name": "circle", "color": m.color, "size": m.size, "size_unit": "MM",
             "outline_color": m.ring or m.color,
             "outline_style": "solid" if m.ring else "no",
             "outline_width": m.ring_width, "outline_width_unit": "MM"}
    return (f'<layer class="SimpleMarker" pass="{m.level}" enabled="1" locked="0">'
            f"{_props(props)}</layer>")


def _line_layer(s: Line) -> str:
    props = {"line_color": s.color, "line_width": s.width, "line_width_unit": "MM",
             "line_style": "dash" if s.dashed else "solid", "capstyle": "round",
             "joinstyle": "round"}
    return (f'<layer class="SimpleLine" pass="{s.level}" enabled="1" locked="0">'
            f"{_props(props)}</layer>")


def _symbol(name: str, sym: Marker | Line) -> str:
    if isinstance(sym, Marker):
        return f'<symbol name="{name}" type="marker" alpha="1">{_marker_layer(sym)}</symbol>'
    return f'<symbol name="{name}" type="line" alpha="1">{_line_layer(sym)}</symbol>'


def expand_rules(kind: str, rules: Sequence[Rule]) -> list[tuple[str, str, str, Marker | Line]]:
    """The rules as written: ``(symbol name, label, filter, symbol)`` per written rule.

    ``kind`` is ``point``, ``line`` or ``mixed`` (a layer holding points and lines, such as
    ``findings``). For a mixed layer every rule is written twice, once for points with its
    marker and once for lines with a line of the same colour, each filtered by geometry type;
    its catch-all rule names what the earlier rules leave, since ``ELSE`` would not split by
    geometry.
    """
    out: list[tuple[str, str, str, Marker | Line]] = []
    for i, (label, expr, sym) in enumerate(rules):
        if kind != "mixed":
            out.append((str(i), label, expr, sym))
            continue
        assert isinstance(sym, Marker)
        if expr == "ELSE":
            prior = " OR ".join(f"({e})" for _, e, _ in rules[:i]) or "FALSE"
            cond = f"NOT ({prior})"
        else:
            cond = f"({expr})"
        out.append((f"{i}p", label, f"geometry_type($geometry) = 'Point' AND {cond}", sym))
        out.append((f"{i}l", label, f"geometry_type($geometry) = 'Line' AND {cond}",
                    Line(sym.color, max(sym.size / 3.0, 0.4), level=sym.level)))
    return out


def style_xml(kind: str, rules: Sequence[Rule]) -> str:
    """The style document of one layer: a rule renderer with symbol levels."""
    rule_xml, sym_xml = [], []
    for name, label, flt, sym in expand_rules(kind, rules):
        rule_xml.append(f'<rule key="r{name}" symbol="{name}" label={quoteattr(label)} '
                        f"filter={quoteattr(flt)}/>")
        sym_xml.append(_symbol(name, sym))
    return ("<!DOCTYPE qgis PUBLIC 'http://mrcc.com/qgis.dtd' 'SYSTEM'>"
            '<qgis styleCategories="Symbology">'
            '<renderer-v2 type="RuleRenderer" symbollevels="1" enableorderby="0" '
            'forceraster="0">'
            f'<rules key="root">{"".join(rule_xml)}</rules>'
            f'<symbols>{"".join(sym_xml)}</symbols></renderer-v2></qgis>')


def store_styles(gpkg_path: str, layer_names: Iterable[str]) -> int:
    """Add a default style for each result layer to the GeoPackage; returns how many."""
    rows = []
    for name in layer_names:
        found = style_for(name)
        if found is not None:
            kind, rules = found
            rows.append((name, "geom", f"gridflow {name}", style_xml(kind, rules), "", 1,
                         "gridflow default style: what needs action stands out"))
    if not rows:
        return 0
    con = sqlite3.connect(gpkg_path)
    try:
        con.execute("""CREATE TABLE IF NOT EXISTS layer_styles (
            id INTEGER PRIMARY KEY AUTOINCREMENT, f_table_catalog TEXT(256),
            f_table_schema TEXT(256), f_table_name TEXT(256), f_geometry_column TEXT(256),
            styleName TEXT(30), styleQML TEXT, styleSLD TEXT, useAsDefault BOOLEAN,
            description TEXT, owner TEXT(30), ui TEXT(30), update_time DATETIME DEFAULT
            CURRENT_TIMESTAMP)""")
        con.executemany("INSERT INTO layer_styles (f_table_catalog, f_table_schema, "
                        "f_table_name, f_geometry_column, styleName, styleQML, styleSLD, "
                        "useAsDefault, description) VALUES ('', '', ?, ?, ?, ?, ?, ?, ?)", rows)
        # register the table as plain attributes so GeoPackage readers accept it
        con.execute("INSERT OR IGNORE INTO gpkg_contents (table_name, data_type, identifier) "
                    "VALUES ('layer_styles', 'attributes', 'layer_styles')")
        con.commit()
    finally:
        con.close()
    return len(rows)
