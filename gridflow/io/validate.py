"""Every mapped numeric field value checked before anything is built or solved.

:data:`FIELD_RANGES` gives, for each numeric field of each role, its valid range (values in SI
after the configured unit; pressures as metres of head) and, where one exists, a plausible range
with its source. :func:`check_layer` is called by the reader on each layer, once the fields are
renamed and converted:

- text in a numeric column stops the run (exit 2) naming file, layer, feature id and field,
  also where the file's column is declared numeric: SQLite keeps text in a REAL column and
  GDAL would read ``'12 in'`` as 12 (:func:`stored_text`); a blank text counts as empty;
- a value that is not finite or lies outside the valid range stops the run (exit 2) naming
  file, layer, feature id, field and the range;
- a value outside the plausible range is a warning finding naming feature and field, with the
  bound and its source ("common practice" where no publication gives one);
- a feature with a non-finite coordinate is left out with an error finding (GEOS cannot work
  with it).

Empty values are left to the stages that know what a missing value means (a missing diameter,
a tank without level ...). Values the topology already repairs with a finding (a zero or
negative diameter, a negative meter reading) have no lower bound here.
"""

from __future__ import annotations

import datetime as _dt
import math
import sqlite3
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from gridflow.errors import InputError
from gridflow.findings import Findings
from gridflow.units import FLOW, GPM, INCH, M_HEAD_PER_PSI

__all__ = ["FieldRange", "FIELD_RANGES", "check_layer", "stored_text", "bad_coordinates",
           "range_table_rows"]

_INF = math.inf


@dataclass(frozen=True)
class FieldRange:
    """Valid ``[lo, hi]`` (``lo_open``: ``lo < v``) and plausible ``[p_lo, p_hi]`` with source.

    ``unit``/``scale`` show SI values in messages (SI x scale)."""

    lo: float = -_INF
    hi: float = _INF
    lo_open: bool = False
    p_lo: float = -_INF
    p_hi: float = _INF
    source: str = ""
    unit: str = ""
    scale: float = 1.0
    p_text: str = ""  # the plausible range in words, where it moves (e.g. with the year)

    def valid_text(self) -> str:
        lo = "" if self.lo == -_INF else f"{'above' if self.lo_open else 'from'} " \
            f"{self.lo * self.scale:g}"
        hi = "" if self.hi == _INF else \
            f"{('to' if not self.lo_open else ', at most') if lo else 'at most'} " \
            f"{self.hi * self.scale:g}"
        u = f" {self.unit}" if self.unit else ""
        return f"{lo} {hi}".replace(" ,", ",").strip() + u

    def plausible_text(self) -> str:
        if self.p_text:
            return self.p_text
        if self.p_lo == -_INF and self.p_hi == _INF:
            return ""
        u = f" {self.unit}" if self.unit else ""
        if self.p_lo == -_INF:
            return f"at most {self.p_hi * self.scale:g}{u}"
        if self.p_hi == _INF:
            return f"at least {self.p_lo * self.scale:g}{u}"
        return f"{self.p_lo * self.scale:g} to {self.p_hi * self.scale:g}{u}"


_YEAR = _dt.date.today().year
_ELEV = FieldRange(-500.0, 9000.0, unit="m",
                   source="the lowest and highest ground on Earth, about -430 m and 8,849 m")
_PSI = M_HEAD_PER_PSI
_KM = 1000.0

#: role -> field -> range (SI after the configured unit)
FIELD_RANGES: dict[str, dict[str, FieldRange]] = {
    "pipes": {
        "diameter": FieldRange(hi=10.0, p_hi=_INF, unit="m"),  # <= 0 and > 120 in: topology
        "install_year": FieldRange(-10000, 10000, p_lo=1800, p_hi=_YEAR + 1,
                                   p_text="1800 to next year",
                                   source="common practice: the oldest mains in service date "
                                          "from the 1800s; a year ahead of today is a typo"),
        "roughness": FieldRange(0.0, 1000.0, lo_open=True),  # per head-loss law: _roughness
        "length": FieldRange(0.0, 100 * _KM, unit="m", p_hi=10 * _KM,
                             source="common practice: GIS mains are split at junctions and "
                                    "rarely longer than a few km"),
        "pressure_rating": FieldRange(0.0, 2000.0, lo_open=True, p_lo=50 * _PSI,
                                      p_hi=500 * _PSI, unit="psi", scale=1 / _PSI,
                                      source="AWWA C900/C151 pressure classes, about "
                                             "100-350 psi (from memory)"),
        "minor_loss_k": FieldRange(0.0, 1000.0, p_hi=50.0,
                                   source="common practice: fittings and valves have K below "
                                          "about 10; a whole run of them below 50"),
    },
    "nodes": {"elevation": _ELEV},
    "hydrants": {
        "required_fire_flow": FieldRange(0.0, 50000 * GPM, p_lo=500 * GPM, p_hi=12000 * GPM,
                                         unit="gpm", scale=1 / GPM,
                                         source="International Fire Code Appendix B (B105: "
                                                "1000 gpm least for dwellings) and the ISO "
                                                "schedule's 12,000 gpm ceiling"),
        "elevation": _ELEV,
        "lateral_length": FieldRange(0.0, 1000.0, p_hi=50.0, unit="m",
                                     source="common practice: hydrant laterals are a few to "
                                            "tens of metres"),
        "lateral_diameter": FieldRange(0.0, 1.0, lo_open=True, p_lo=2 * INCH, p_hi=12 * INCH,
                                       unit="in", scale=1 / INCH,
                                       source="common practice: hydrant laterals are 4-8 in"),
    },
    "valves": {
        "setting": FieldRange(0.0, 1e6),  # raw: PRVs in the configured unit, throttles K
        "diameter": FieldRange(0.0, 10.0, lo_open=True, unit="m"),
        "elevation": _ELEV,
        "minor_loss_k": FieldRange(0.0, 1e6),
    },
    "tanks": {
        "bottom_elevation": _ELEV,
        "level": FieldRange(0.0, 200.0, unit="m", p_hi=60.0,
                            source="common practice: standpipes and elevated tanks hold "
                                   "water up to about 50 m deep"),
        "max_level": FieldRange(0.0, 200.0, lo_open=True, unit="m"),
        "diameter": FieldRange(0.0, 500.0, lo_open=True, unit="m"),
    },
    "pumps": {
        **{f: FieldRange(0.0, 100.0, unit="m3/s", p_hi=5.0,
                         source="common practice: municipal pumps deliver below about 5 m3/s "
                                "(80,000 gpm) each")
           for f in ("design_flow", "flow_1", "flow_2", "flow_3")},
        **{f: FieldRange(0.0, 3000.0, unit="m", p_hi=300.0,
                         source="common practice: distribution and booster pumps lift less "
                                "than about 300 m (1,000 ft)")
           for f in ("design_head", "head_1", "head_2", "head_3")},
        "speed": FieldRange(0.0, 10.0, p_hi=1.5,
                            source="common practice: relative pump speed 0-1.2"),
    },
    "sources": {"head": _ELEV, "elevation": _ELEV},
    "meters": {"consumption": FieldRange(hi=10.0, unit="m3/s", p_hi=0.5,
                                         source="common practice: the largest single "
                                                "customer meters pass well under 0.5 m3/s")},
}

#: Hazen-Williams C and Darcy-Weisbach absolute roughness [m]: valid and plausible
_ROUGHNESS = {
    "hazen-williams": FieldRange(0.0, 1000.0, lo_open=True, p_lo=40.0, p_hi=160.0,
                                 source="Hazen-Williams C tables (about 40 for badly "
                                        "tuberculated iron to 150 for plastic; from memory)"),
    "darcy-weisbach": FieldRange(0.0, 0.5, lo_open=True, p_hi=0.01, unit="m",
                                 source="Moody's absolute roughness table, 0.0015 mm (drawn "
                                        "tubing) to 3-9 mm (riveted steel)"),
}


def _range(cfg, role: str, field: str) -> FieldRange | None:
    if (role, field) == ("pipes", "roughness"):
        return _ROUGHNESS.get(cfg.run.headloss_model)
    return FIELD_RANGES.get(role, {}).get(field)


def range_table_rows():
    """(role, field, valid, plausible, source) rows for the documentation."""
    for role, fields in FIELD_RANGES.items():
        for f, r in fields.items():
            if (role, f) == ("pipes", "roughness"):
                for law, rr in _ROUGHNESS.items():
                    yield role, f"{f} ({law})", rr.valid_text(), rr.plausible_text(), rr.source
                continue
            yield role, f, r.valid_text(), r.plausible_text(), r.source


def _quote(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def stored_text(file: Path, layer: str, id_field: str, fields: list[str],
                where: str | None = None) -> dict[str, list[tuple[str, str]]]:
    """Text values SQLite holds in the given columns of a GeoPackage table.

    Returns field -> [(feature id, text)]: what GDAL would read as a number (``'12 in'`` -> 12,
    ``''`` -> 0) although it is not one. Other formats (and unreadable files) give ``{}``.
    """
    out: dict[str, list[tuple[str, str]]] = {}
    if not fields or not isinstance(file, (str, Path)) or Path(file).suffix.lower() != ".gpkg":
        return out  # a database column has one type: the reader's conversion says so
    try:
        con = sqlite3.connect(f"{Path(file).resolve().as_uri()}?mode=ro", uri=True)
    except sqlite3.Error:
        return out
    try:
        rows = _text_rows(con, layer, id_field, fields, where)
        if rows is not None:  # one scan of the table for every field
            for j, f in enumerate(fields):
                hits = [(r[0], r[2 + 2 * j]) for r in rows if r[1 + 2 * j] == "text"]
                if hits:
                    out[f] = [("" if i is None else _id_text(i), str(v)) for i, v in hits]
            return out
        for f in fields:  # a field SQLite cannot select: the others one by one
            rows = _text_rows(con, layer, id_field, [f], where)
            if rows:
                out[f] = [("" if r[0] is None else _id_text(r[0]), str(r[2])) for r in rows]
    finally:
        con.close()
    return out


def _text_rows(con, layer: str, id_field: str, fields: list[str], where: str | None):
    """Rows ``(id, typeof(f1), f1, typeof(f2), f2 ...)`` of the table where any of the
    fields holds text (with the ``where`` filter when SQLite can apply it); None when
    SQLite cannot run the query."""
    cols = ", ".join(f"typeof({_quote(f)}), {_quote(f)}" for f in fields)
    any_text = " OR ".join(f"typeof({_quote(f)}) = 'text'" for f in fields)
    base = f"SELECT {_quote(id_field)}, {cols} FROM {_quote(layer)} WHERE ({any_text})"
    for sql in ([f"{base} AND ({where})"] if where else []) + [base]:
        try:
            return con.execute(sql).fetchall()
        except sqlite3.Error:
            continue
    return None


def _id_text(v) -> str:
    if isinstance(v, float) and v.is_integer():
        return str(int(v))
    return str(v).strip()


def bad_coordinates(geoms: np.ndarray) -> np.ndarray:
    """True where a geometry has a non-finite coordinate (NaN or inf in any vertex)."""
    import shapely

    n = len(geoms)
    bad = np.zeros(n, bool)
    if n == 0:
        return bad
    coords = shapely.get_coordinates(geoms, include_z=False)
    if len(coords) and not np.isfinite(coords).all():  # the rare case: which geometries
        coords, index = shapely.get_coordinates(geoms, include_z=False, return_index=True)
        nonfinite = ~np.isfinite(coords).all(axis=1)
        bad = np.bincount(index[nonfinite], minlength=n).astype(bool)
    return bad


def check_layer(cfg, role: str, sec, info, data: dict, ids: np.ndarray, geoms: np.ndarray,
                findings: Findings) -> np.ndarray:
    """Check a role's converted numeric fields in ``data`` (changed in place: blank text ->
    NaN); returns the rows to leave out (non-finite coordinates, each with an error finding).

    Raises
    ------
    InputError
        Naming file, layer, feature id and field: text where a number belongs, a value that
        is not finite or is outside its valid range.
    """
    numeric = {r: f for r, f in sec.fields.items() if r in FIELD_RANGES.get(role, {})}
    where = f"{info.file}: layer {info.layer!r}"

    texts = stored_text(info.file, info.layer, sec.id, list(dict.fromkeys(numeric.values())),
                        sec.where or None)
    for role_name, fname in numeric.items():
        for fid, txt in texts.get(fname, []):
            if txt.strip():
                raise InputError(f"{where}, feature {fid}: field {fname!r} holds {txt!r} where "
                                 "a number belongs (write the number alone; its unit is "
                                 f"{getattr(info, 'key', 'layers.' + role)}.units.{role_name})",
                                 file=str(info.file),
                                 layer=info.layer, feature_id=fid, field=fname)
        blank = [fid for fid, txt in texts.get(fname, []) if not txt.strip()]
        if blank and role_name in data:
            vals = np.asarray(data[role_name], dtype=float).copy()
            vals[np.isin(ids.astype(str), blank)] = np.nan
            data[role_name] = vals

    for role_name, fname in numeric.items():
        r = _range(cfg, role, role_name)
        if r is None or role_name not in data:
            continue
        vals = np.asarray(data[role_name], dtype=float)
        if (role, role_name) == ("meters", "consumption"):
            vals = vals * _flow_factor(cfg.demand.consumption_unit)
        groups = [(np.ones(len(vals), bool), vals, r)]
        if (role, role_name) == ("valves", "setting"):
            groups = _setting_groups(data, vals, r)
        for mask, v, rr in groups:
            _check_values(v, mask, rr, fname, ids, geoms, info, where, findings)

    if role == "tanks" and "level" in data and "max_level" in data:
        lv = np.asarray(data["level"], float)
        mx = np.asarray(data["max_level"], float)
        over = np.isfinite(lv) & np.isfinite(mx) & (lv > mx)
        if over.any():
            rows = np.flatnonzero(over)
            findings.add_many("implausible_value", "warning", info.layer, ids[rows],
                              [f"field {sec.fields['level']!r} = {lv[i]:.4g} m is above the "
                               f"tank's maximum level {mx[i]:.4g} m "
                               f"({sec.fields['max_level']!r}; a tank cannot hold more)"
                               for i in rows], list(geoms[rows]))

    bad_xy = bad_coordinates(geoms)
    if bad_xy.any():
        findings.add_many("bad_coordinates", "error", info.layer, ids[bad_xy],
                          f"a vertex has a non-finite coordinate (NaN or infinity); "
                          f"{role[:-1]} left out")
    return bad_xy


def _flow_factor(unit: str) -> float:
    low = {k.lower(): v for k, v in FLOW.items()}
    return float(low.get(str(unit).strip().lower(), 1.0))


#: PRV settings (metres of head): valid and plausible
_PRV = FieldRange(0.0, 1000 * M_HEAD_PER_PSI, p_hi=200 * M_HEAD_PER_PSI, unit="psi",
                  scale=1 / M_HEAD_PER_PSI,
                  source="common practice: PRVs on distribution mains hold 30-150 psi")


def _setting_groups(data, vals, r):
    """PRV settings (already metres of head) checked as pressures (:data:`_PRV`), other
    settings (throttle K) as plain numbers."""
    types = data.get("type")
    if types is None:
        return [(np.ones(len(vals), bool), vals, r)]
    prv = np.asarray([str(t).lower() == "prv" for t in types], dtype=bool)
    return [(prv, vals, _PRV), (~prv, vals, r)]


def _check_values(vals, mask, r: FieldRange, fname, ids, geoms, info, where,
                  findings: Findings) -> None:
    present = mask & ~np.isnan(vals)
    lo_bad = (vals <= r.lo) if r.lo_open else (vals < r.lo)
    bad = present & (~np.isfinite(vals) | lo_bad | (vals > r.hi))
    unit = f" {r.unit}" if r.unit else ""
    if bad.any():
        k = int(np.argmax(bad))
        v = vals[k] * r.scale
        what = "is not a finite number" if not np.isfinite(vals[k]) else \
            f"is out of range (valid: {r.valid_text()})"
        raise InputError(f"{where}, feature {ids[k]}: field {fname!r} = {v:g}{unit} {what}",
                         file=str(info.file), layer=info.layer, feature_id=str(ids[k]),
                         field=fname)
    odd = present & ((vals < r.p_lo) | (vals > r.p_hi))
    if odd.any():
        rows = np.flatnonzero(odd)
        findings.add_many(
            "implausible_value", "warning", info.layer, ids[rows],
            [f"field {fname!r} = {vals[i] * r.scale:.6g}{unit} is outside the plausible "
             f"{r.plausible_text()} ({r.source}); check the value and its unit" for i in rows],
            list(geoms[rows]))
