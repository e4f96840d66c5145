"""Default styles stored inside the output GeoPackage.

Desktop GIS reads a layer's default style from the GeoPackage's ``layer_styles`` table (one row
per layer, the style as XML, ``useAsDefault`` = 1). gridflow stores a rule-based style per
result layer so flagged features stand out: our own palette, flagged features drawn larger in
a strong magenta-red, unflagged ones in a quiet slate, unsupplied nodes in amber.
"""

from __future__ import annotations

import sqlite3
from xml.sax.saxutils import escape

__all__ = ["store_styles", "STYLE_RULES"]

FLAG_COLOR = "196,30,92,255"
QUIET_COLOR = "96,110,128,255"
AMBER = "230,145,20,255"
FIRE_FAIL = "196,30,92,255"
FIRE_PASS = "40,130,90,255"

#: (prefix, geometry kind, [(label, filter expression, colour, size)]) per layer family
STYLE_RULES = {
    "nodes_": ("point", [
        ("unsupplied", '"supplied" = 0', AMBER, 2.6),
        ("pressure flag", '"low_pressure" = 1 OR "high_pressure" = 1 OR '
                          '"negative_pressure" = 1', FLAG_COLOR, 2.6),
        ("ok", "ELSE", QUIET_COLOR, 1.2)]),
    "pipes_": ("line", [
        ("velocity or head-loss flag", '"high_velocity" = 1 OR "high_headloss" = 1',
         FLAG_COLOR, 1.2),
        ("closed", "\"status\" = 'closed'", AMBER, 0.6),
        ("ok", "ELSE", QUIET_COLOR, 0.35)]),
    "hydrants_fireflow": ("point", [
        ("fails required flow", '"meets_required" = 0', FIRE_FAIL, 3.0),
        ("meets required flow", "ELSE", FIRE_PASS, 2.0)]),
}


def _symbol(kind: str, i: int, color: str, size: float) -> str:
    if kind == "point":
        layer = (f'<layer class="SimpleMarker"><prop k="color" v="{color}"/>'
                 f'<prop k="size" v="{size}"/><prop k="outline_style" v="no"/></layer>')
        stype = "marker"
    else:
        layer = (f'<layer class="SimpleLine"><prop k="line_color" v="{color}"/>'
                 f'<prop k="line_width" v="{size}"/></layer>')
        stype = "line"
    return f'<symbol name="{i}" type="{stype}" alpha="1">{layer}</symbol>'


def style_xml(kind: str, rules) -> str:
    rule_xml, sym_xml = [], []
    for i, (label, expr, color, size) in enumerate(rules):
        if expr == "ELSE":
            rule_xml.append(f'<rule key="r{i}" symbol="{i}" label="{escape(label)}" '
                            'filter="ELSE"/>')
        else:
            rule_xml.append(f'<rule key="r{i}" symbol="{i}" label="{escape(label)}" '
                            f'filter="{escape(expr, {chr(34): "&quot;"})}"/>')
        sym_xml.append(_symbol(kind, i, color, size))
    return ('<!DOCTYPE qgis PUBLIC \'http://mrcc.com/qgis.dtd\' \'SYSTEM\'>'
            '<qgis styleCategories="Symbology"><renderer-v2 type="RuleRenderer">'
            f'<rules key="root">{"".join(rule_xml)}</rules>'
            f'<symbols>{"".join(sym_xml)}</symbols></renderer-v2></qgis>')


def store_styles(gpkg_path: str, layer_names) -> int:
    """Add a default style for each result layer to the GeoPackage; returns how many."""
    rows = []
    for name in layer_names:
        for prefix, (kind, rules) in STYLE_RULES.items():
            if name.startswith(prefix):
                rows.append((name, "geom", f"gridflow {name}", style_xml(kind, rules), "", 1,
                             "gridflow default style: flagged features stand out"))
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
