"""Draft a starter config from a GIS file (``gridflow init``).

:func:`gridflow.io.inspect.inspect_gis` reads every layer's name, geometry type, CRS, fields and
types with fiona, and a sample of values. :func:`draft_config`
matches gridflow's roles to the likeliest layer (geometry type, layer name, fields), each role's
fields to the likeliest column (its name, type and value range), guesses units (from the name;
failing that from the values, flagged), lists coded values for the user to map, and writes the
evidence beside every line. Lines the user must confirm end in ``# CHECK``.

The draft is plain TOML read by :func:`gridflow.config.load_config`; nothing in it is a
gridflow default the user cannot see.

Length (about 900 lines, above the usual 500): most of it is vocabulary, the words utilities
use in layer names, field names and coded values, and one small writer per config section; the
matching itself is about 150 lines. Split the vocabulary into its own module if it grows.
"""

from __future__ import annotations

import json
import logging
import os
import re
import tempfile
from collections import Counter
from pathlib import Path

import numpy as np

from gridflow.config.layers import NUMERIC_FIELDS, ROLE_FIELDS
from gridflow.errors import InputError, OutputError
from gridflow.io.inspect import MAX_CODES, FieldInfo, LayerInfo, inspect_gis
from gridflow.io.inspect import fmt_number as _g
from gridflow.io.inspect import name_tokens as _tokens
from gridflow.units import DIAMETER, FLOW, HEAD, PRESSURE

__all__ = ["draft_config", "init_job", "count_checks"]

log = logging.getLogger("gridflow")

# ---- names ---------------------------------------------------------------------------------


def _w(*words: str) -> frozenset[str]:
    return frozenset(words)


DIAM = _w("DIAM", "DIA", "DIAMETER", "DIAMETRE", "SIZE", "DN", "NOMDIA", "PIPESIZE", "NOMSIZE")
ELEV = _w("ELEV", "ELEVATION", "Z", "GROUND", "GRND", "ALT", "ALTITUDE", "GL")
LEVEL = _w("LEVEL", "LVL", "WL", "WATERLEVEL", "STAGE", "DEPTH")
MAXW = _w("MAX", "TOP", "OVERFLOW", "HIGH", "HWL")
LAT = _w("LAT", "LATERAL", "BRANCH", "LEAD")
LEN = _w("LEN", "LENGTH", "LGTH")
FLOWW = _w("FLOW", "Q", "GPM", "LPS", "CAPACITY", "RATE")
HEADW = _w("HEAD", "H", "TDH", "HD", "LIFT")
STATUS = _w("STATUS", "STAT", "LIFECYCLE", "STATE", "ACTIVE", "INSERVICE", "ENABLED", "OPSTATUS",
            "CONDITION")
POSITION = _w("POS", "POSITION", "NORMPOS", "NORMALPOS", "NORMAL", "OPEN", "OPENCLOSED")
ZONE = _w("ZONE", "PZ", "PZONE", "PRESSZONE", "PRESSUREZONE")
NAME = _w("NAME", "STREET", "STNAME", "ROAD", "LABEL", "DESC", "DESCRIPTION", "LOCATION")
DIRW = _w("DIR", "DIRECTION", "FLOWDIR", "BRG", "BEARING", "AZIMUTH", "AZ", "ROTATION", "ROT")
IDW = _w("ID", "NO", "NUM", "NUMBER", "FACILITYID", "GID", "KEY", "ASSETID", "TAG", "CODE")

#: per role and field role: alternatives (each a tuple of word sets that must all appear),
#: words that rule a column out, and "num" or "text"
_SPECS: dict[str, dict[str, tuple[list[tuple[frozenset, ...]], frozenset, str]]] = {
    "pipes": {
        "diameter": ([(DIAM,)], LAT | _w("SVC", "SERVICE", "EXT", "OUTER", "OD"), "num"),
        "material": ([(_w("MATL", "MAT", "MATERIAL", "PIPEMAT", "MTRL"),)], _w(), "text"),
        "install_year": ([(_w("YR", "YEAR", "INSTALLED", "INSTYEAR", "YEARINST", "INSTALL"),)],
                         _w(), "num"),
        "roughness": ([(_w("HW", "HWC", "CFACTOR", "ROUGH", "ROUGHNESS", "C"),)], _w(), "num"),
        "status": ([(STATUS,)], _w(), "text"),
        "zone": ([(ZONE,)], _w(), "text"),
        "pressure_rating": ([(_w("CLASS", "RATING", "PN", "PRESSCLASS", "PCLASS"),
                              _w("PSI", "KPA", "BAR", "PRESS", "PRESSURE")),
                             (_w("PN", "PRESSCLASS", "PRESSURECLASS", "RATING"),)], _w(), "num"),
        "minor_loss_k": ([(_w("K", "MINORLOSS", "KMINOR"),)], _w(), "num"),
        "name": ([(NAME,)], _w(), "text"),
        "level": ([(_w("LVL", "LEVEL", "LAYER", "GRADESEP", "VLEVEL"),)], _w(), "text"),
    },
    "hydrants": {
        "required_fire_flow": ([(_w("REQ", "REQUIRED", "NFF", "RFF", "NEEDED"), FLOWW | _w("FF")),
                                (_w("FF", "FIREFLOW", "REQFF", "NFF"),)], _w("AVAIL"), "num"),
        "land_use": ([(_w("LAND", "LANDUSE", "LU", "ZONING", "OCC", "OCCUPANCY", "USE"),)],
                     _w(), "text"),
        "elevation": ([(ELEV,)], _w(), "num"),
        "lateral_length": ([(LAT, LEN)], _w(), "num"),
        "lateral_diameter": ([(LAT, DIAM)], _w(), "num"),
        "status": ([(STATUS,)], _w(), "text"),
        "zone": ([(ZONE,)], _w(), "text"),
    },
    "valves": {
        "type": ([(_w("TYPE", "VTYPE", "VALVETYPE", "KIND", "SUBTYPE"),)], _w(), "text"),
        "status": ([(POSITION,), (STATUS,)], _w(), "text"),
        "setting": ([(_w("SET", "SETTING", "SETPOINT", "PRVSET"),)], _w(), "num"),
        "diameter": ([(DIAM,)], _w(), "num"),
        "elevation": ([(ELEV,)], _w(), "num"),
        "minor_loss_k": ([(_w("K", "MINORLOSS", "KMINOR"),)], _w(), "num"),
        "direction": ([(DIRW,)], _w(), "any"),
    },
    "tanks": {
        "bottom_elevation": ([(_w("BASE", "BOTTOM", "BOT", "FLOOR", "BTM"),)], _w(), "num"),
        "level": ([(LEVEL,)], MAXW | _w("MIN", "LOW"), "num"),
        "max_level": ([(MAXW, LEVEL), (_w("TOP", "OVERFLOW", "HWL", "MAXLEVEL", "MAXLVL"),)],
                      _w("ELEV"), "num"),
        "diameter": ([(DIAM,)], _w(), "num"),
        "name": ([(NAME,)], _w(), "text"),
    },
    "pumps": {
        **{f"flow_{i}": ([(_w(f"Q{i}", f"FLOW{i}"),), (FLOWW, _w(str(i)))],
                         _w("DSGN", "DESIGN", "RATED"), "num") for i in (1, 2, 3)},
        **{f"head_{i}": ([(_w(f"H{i}", f"HEAD{i}", f"TDH{i}"),), (HEADW, _w(str(i)))],
                         _w("DSGN", "DESIGN", "RATED"), "num") for i in (1, 2, 3)},
        # a lone flow and head (no numbered curve points) are the design point
        "design_flow": ([(_w("DSGN", "DESIGN", "RATED"), FLOWW), (FLOWW,)], _w("1", "2", "3"),
                        "num"),
        "design_head": ([(_w("DSGN", "DESIGN", "RATED"), HEADW), (HEADW,)], _w("1", "2", "3"),
                        "num"),
        "speed": ([(_w("SPEED", "RELSPEED"),)], _w("RPM"), "num"),
        "status": ([(STATUS,)], _w(), "text"),
        "name": ([(NAME,)], _w(), "text"),
        "direction": ([(DIRW,)], _w(), "any"),
    },
    "sources": {
        "head": ([(_w("HGL", "HEAD", "GRADE", "HYDGRADE", "TOTALHEAD"),)], _w(), "num"),
        "elevation": ([(ELEV,)], _w(), "num"),
        "name": ([(NAME,)], _w(), "text"),
    },
    "meters": {
        "consumption": ([(_w("GPD", "CONS", "CONSUMPTION", "USAGE", "DEMAND", "AVG", "VOLUME",
                             "BILLED", "GALLONS", "KGAL", "M3"),)], _w("SVC", "SIZE"), "num"),
        "category": ([(_w("CLASS", "CATEGORY", "CAT", "TYPE", "RATE", "CUSTTYPE", "USECODE",
                          "ACCTCLASS", "SECTOR"),)], _w(), "text"),
        "zone": ([(ZONE,)], _w(), "text"),
    },
    "nodes": {
        "elevation": ([(ELEV,)], _w(), "num"),
        "zone": ([(ZONE,)], _w(), "text"),
    },
}

#: words in a layer's name per role
_LAYER_WORDS = {
    "pipes": _w("MAIN", "MAINS", "PIPE", "PIPES", "WATERMAIN", "WATERMAINS", "LINE", "LINES",
                "WMAIN", "DISTRIBUTION", "TRANSMISSION", "TRUNK"),
    "hydrants": _w("HYDRANT", "HYDRANTS", "HYD", "FH", "FIREHYDRANT", "FIREHYDRANTS"),
    "valves": _w("VALVE", "VALVES", "VLV", "SYSTEMVALVES", "PRV"),
    "tanks": _w("TANK", "TANKS", "STORAGE", "TOWER", "TOWERS"),
    "pumps": _w("PUMP", "PUMPS", "BOOSTER", "BOOSTERS", "BPS", "PUMPSTATION", "PUMPSTATIONS"),
    "sources": _w("SOURCE", "SOURCES", "SUPPLY", "PLANT", "PLANTS", "WTP", "WELL", "WELLS",
                  "INTAKE", "RESERVOIR", "RESERVOIRS", "SUPPLYSOURCES"),
    "meters": _w("METER", "METERS", "CUSTOMER", "CUSTOMERS", "ACCOUNT", "ACCOUNTS", "BILLING",
                 "CUSTOMERMETERS", "SERVICE", "SERVICES"),
    "nodes": _w("NODE", "NODES", "JUNCTION", "JUNCTIONS"),
}
_REQUIRED = {role: [r[:-1] for r in ROLE_FIELDS[role] if r.endswith("*")] for role in ROLE_FIELDS}


def _field_score(role: str, fr: str, f: FieldInfo) -> float:
    alts, exclude, kind = _SPECS[role][fr]
    if not f.values:
        return 0.0
    if kind == "num" and not f.numeric:
        return 0.0
    if kind == "any":
        kind = "num" if f.numeric else "text"
    toks = f.tokens
    if toks & exclude:
        return 0.0
    best = 0.0
    for alt in alts:
        if all(toks & words for words in alt):
            best = max(best, 1.0 + 0.5 * len(alt))
    if not best:
        return 0.0
    if kind == "text" and f.numeric and not f.coded:
        best -= 0.5
    if fr == "install_year" and not 1800 <= f.median <= 2100:
        return 0.0
    return best


def _match_fields(role: str, layer: LayerInfo) -> dict[str, tuple[FieldInfo, bool]]:
    """Field role -> (column, ambiguous), each column used once, best scores first.

    ``ambiguous``: another column also looked like this field role (the user should confirm).
    """
    cand = [(_field_score(role, fr, f), i, fr, f) for i, fr in enumerate(_SPECS[role])
            for f in layer.fields.values()]
    cand.sort(key=lambda c: (-c[0], c[1]))
    hits = Counter(fr for score, _, fr, _f in cand if score > 0)
    out: dict[str, tuple[FieldInfo, bool]] = {}
    used: set[str] = set()
    for score, _, fr, f in cand:
        if score <= 0 or fr in out or f.name in used:
            continue
        out[fr] = (f, hits[fr] > 1)
        used.add(f.name)
    return out


def _id_field(role: str, layer: LayerInfo, used: set[str]) -> tuple[FieldInfo | None, bool]:
    """The feature-id column and whether the evidence is strong (name says id, unique)."""
    best, best_score = None, -1.0
    own = _LAYER_WORDS[role]
    others = set().union(*(w for r, w in _LAYER_WORDS.items() if r != role)) - own
    for f in layer.fields.values():
        if f.name in used or not f.values or f.type.startswith("float"):
            continue
        toks = f.tokens
        score = 2.0 * f.unique_ratio
        if toks & IDW or f.name.upper().endswith("ID"):
            score += 1.5
        if toks & (others - {"MAIN"}) or (role != "pipes" and "MAIN" in toks):
            score -= 2.0  # a reference to another layer (MAIN_ID on valves)
        if score > best_score:
            best, best_score = f, score
    strong = best is not None and best.unique_ratio > 0.98 and best_score >= 3.4
    return best, strong


def _layer_score(role: str, layer: LayerInfo) -> float:
    want = "line" if role == "pipes" else "point"
    if layer.kind != want:
        return 0.0
    score = 0.0
    if role == "pipes" and _tokens(layer.name) & _w("SERVICE", "SERVICES", "SVC", "LATERAL",
                                                     "LATERALS", "ABANDONED", "PROPOSED"):
        score -= 2.0  # service lines and laterals are not mains
    if _tokens(layer.name) & _LAYER_WORDS[role] or any(
            w in layer.name.upper() for w in _LAYER_WORDS[role] if len(w) >= 5):
        score += 3.0
    matched = _match_fields(role, layer)
    score += 0.5 * len(matched)
    if all(r in matched for r in _REQUIRED[role]):
        score += 1.0 if _REQUIRED[role] else 0.0
    elif role != "pipes":
        score -= 2.0
    if role == "nodes" and score < 3.0:
        return 0.0  # junction points are optional: only a layer that says so
    return max(score, 0.0)


def _assign_roles(layers: list[LayerInfo]) -> dict[str, list[LayerInfo]]:
    """Role -> its layers: the likeliest first; more layers join a role when their name says
    it and they carry its required fields (valves and PRV stations, mains in two layers)."""
    cand = [(_layer_score(role, lay), role, lay) for role in _SPECS for lay in layers]
    cand.sort(key=lambda c: -c[0])
    out: dict[str, list[LayerInfo]] = {}
    taken: set[str] = set()
    for score, role, lay in cand:
        if score < 1.0 or role in out or lay.name in taken:
            continue
        out[role] = [lay]
        taken.add(lay.name)
    for score, role, lay in cand:
        if lay.name in taken or role not in out or score < 3.5 or not _named_as(role, lay):
            continue
        out[role].append(lay)
        taken.add(lay.name)
    order = {lay.name: i for i, lay in enumerate(layers)}
    return {role: sorted(lays, key=lambda x: order[x.name]) for role, lays in out.items()}


def _named_as(role: str, lay: LayerInfo) -> bool:
    return bool(_tokens(lay.name) & _LAYER_WORDS[role])


# ---- units ---------------------------------------------------------------------------------

_UNIT_WORDS = {"IN": "in", "INCH": "in", "INCHES": "in", "MM": "mm", "CM": "cm", "M": "m",
               "METER": "m", "METRE": "m", "METERS": "m", "METRES": "m", "FT": "ft",
               "FEET": "ft", "FOOT": "ft", "PSI": "psi", "KPA": "kpa", "BAR": "bar",
               "GPM": "gpm", "LPS": "l/s", "MGD": "mgd", "GPD": "gal/day", "KM": "km",
               "MI": "mi", "M3H": "m3/h", "CMH": "m3/h", "CMD": "m3/day"}
_US = {"in", "ft", "psi", "gpm", "mgd", "gal/day", "mi", "gal/month", "kgal/month"}


def _unit_from_name(f: FieldInfo, table: dict) -> str | None:
    toks = f.tokens
    name = f.name.upper()
    if re.search(r"M3.?(PER)?.?(MO|MONTH)", name):
        return "m3/month" if "m3/month" in table else None
    if re.search(r"M3.?(PER)?.?(D|DAY)$", name):
        return "m3/day" if "m3/day" in table else None
    if re.search(r"KGAL", name):
        return "kgal/month" if "kgal/month" in table else None
    if re.search(r"GAL.?(PER)?.?(MO|MONTH)", name):
        return "gal/month" if "gal/month" in table else None
    if re.search(r"(GAL.?(PER)?.?DAY|GPD)", name):
        return "gal/day" if "gal/day" in table else None
    if "L" in toks and "S" in toks:
        return "l/s" if "l/s" in table else None
    for t in toks:
        u = _UNIT_WORDS.get(t)
        if u is not None and u.lower() in {k.lower() for k in table}:
            return u
    return None


def _unit_from_values(role: str, fr: str, f: FieldInfo, system: str) -> tuple[str, str]:
    """A unit guessed from the value range, with the reason (always to be confirmed)."""
    med, hi = f.median, f.hi
    table = NUMERIC_FIELDS[role].get(fr)
    if table is DIAMETER:
        if hi <= 3.0:
            return "m", f"median {_g(med)}: looks like metres"
        if med >= 40.0:
            return "mm", f"median {_g(med)}: looks like millimetres"
        return "in", f"median {_g(med)}: looks like inches"
    if table is PRESSURE:
        lo_psi, hi_psi = (20, 200) if fr == "setting" else (60, 400)
        if lo_psi <= med <= hi_psi:
            return "psi", f"median {_g(med)}: looks like psi"
        if med > hi_psi:
            return "kpa", f"median {_g(med)}: looks like kPa"
        return "bar", f"median {_g(med)}: looks like bar"
    if table is FLOW:
        if med >= 250.0:
            return "gpm", f"median {_g(med)}: looks like gpm"
        return "l/s", f"median {_g(med)}: looks like L/s"
    if table is None and fr == "consumption":
        if med >= 40.0:
            return "gal/day", f"median {_g(med)}: looks like gallons a day"
        if med >= 3.0:
            return "m3/month", f"median {_g(med)}: looks like m3 a month"
        return "m3/day", f"median {_g(med)}: looks like m3 a day"
    unit = "ft" if system == "US" else "m"
    return unit, f"no unit in the name; {unit} as the rest of the file"


# ---- codes ---------------------------------------------------------------------------------

_OPENISH = {"ACT", "ACTIVE", "A", "INS", "INSERVICE", "IS", "IN", "OPEN", "O", "NO", "OP",
            "EXISTING", "EX", "EXIST", "Y", "YES", "INUSE", "AUTO", "ON", "RUN", "RUNNING",
            "ENABLED", "E", "INSVC", "NORMALLYOPEN", "1"}
_CLOSEDISH = {"NC", "CLOSED", "C", "CL", "SHUT", "CLOSE", "NORMALLYCLOSED"}
_ABANDONED = {"ABD", "ABAN", "ABANDONED", "AB", "ABN", "RET", "RETIRED", "REMOVED", "REM",
              "DEMO", "DEMOLISHED", "ABANDON"}
_INACTIVE = {"PRO", "PROP", "PROPOSED", "PLANNED", "PLN", "FUT", "FUTURE", "OOS", "OUT",
             "OUTOFSERVICE", "INACTIVE", "INA", "DISABLED", "DESIGN", "UC", "N", "0", "NO_"}
_OFF = {"OFF", "STANDBY", "STBY", "SB"}
_VALVE_TYPES = {
    "isolation": {"GATE", "GV", "BFV", "BUTTERFLY", "BV", "PLUG", "BALL", "ISO", "ISOLATION",
                  "SYSTEM", "LINE", "MAINLINE", "GATEVALVE", "BUTTERFLYVALVE"},
    "prv": {"PRV", "PRESSUREREDUCING", "PRESSUREREDUCINGVALVE", "PR", "REDUCING", "PRS"},
    "check": {"CHK", "CHECK", "CV", "NRV", "NONRETURN", "CHECKVALVE"},
    "throttle": {"TCV", "THROTTLE", "THROTTLING", "TV"},
}
_DIRECTIONS = {
    "with": {"W", "WITH", "F", "FWD", "FORWARD", "DIG", "DIGITIZED", "DIGITISED", "SAME", "D"},
    "against": {"A", "AGAINST", "R", "REV", "REVERSE", "OPP", "OPPOSITE", "REVERSED"},
}
_MATERIALS = {
    "cast_iron": {"CI", "CAST", "CASTIRON", "CIP", "GRAYIRON", "GREYIRON"},
    "ductile_iron": {"DI", "DIP", "DUCTILE", "DUCTILEIRON"},
    "asbestos_cement": {"AC", "ACP", "ASBESTOS", "ASBESTOSCEMENT", "TRANSITE"},
    "pvc": {"PVC", "C900", "C905", "POLYVINYLCHLORIDE"},
    "hdpe": {"HDPE", "PE", "POLY", "POLYETHYLENE"},
    "steel": {"STL", "ST", "STEEL", "WS", "WELDEDSTEEL"},
    "copper": {"COP", "CU", "COPPER"},
    "concrete": {"CONC", "RCP", "PCCP", "CONCRETE", "CCP"},
    "galvanized": {"GALV", "GI", "GALVANIZED", "GALVANISED"},
}
#: Hazen-Williams C for the draft's roughness table: typical values for pipes in service
#: (from memory of handbook tables; common practice lowers them with age)
_C_TYPICAL = {"cast_iron": 100.0, "ductile_iron": 130.0, "asbestos_cement": 130.0,
              "pvc": 140.0, "hdpe": 140.0, "steel": 110.0, "copper": 130.0, "concrete": 120.0,
              "galvanized": 100.0}
_CATEGORIES = {
    "residential": {"SFR", "MFR", "RES", "R", "RESIDENTIAL", "DOM", "DOMESTIC", "SF", "MF",
                    "APT", "SINGLEFAMILY", "MULTIFAMILY"},
    "commercial": {"COM", "COMM", "C", "COMMERCIAL", "BUS", "BUSINESS"},
    "industrial": {"IND", "INDUSTRIAL", "I", "MFG"},
    "institutional": {"INST", "INS", "GOV", "INSTITUTIONAL", "SCH", "SCHOOL", "PUB", "MUNI",
                      "PUBLIC"},
    "irrigation": {"IRR", "IRRIGATION", "LAWN", "IRRIG"},
}
_LOW_DENSITY_LAND_USE = {"R1", "R2", "SFR", "SF", "RS", "RES", "RESIDENTIAL", "SINGLEFAMILY"}


def _key(code: str) -> str:
    return re.sub(r"[^A-Z0-9]", "", code.upper())


def _status_target(role: str, code: str) -> str | None:
    k = _key(code)
    if k in _ABANDONED:
        return "abandoned" if role in ("pipes", "hydrants") else "closed"
    if role == "pumps" and k in _OFF:
        return "off"
    if k in _CLOSEDISH and role == "valves":
        return "closed"
    if k in _INACTIVE or k.startswith(("PROPOS", "ABANDON", "OUTOF")):
        if k.startswith("ABANDON"):
            return "abandoned" if role in ("pipes", "hydrants") else "closed"
        return "off" if role == "pumps" else "inactive"
    if k in _OPENISH or k.startswith(("INSERV", "ACTIV", "EXIST")):
        return "active" if role in ("hydrants", "pumps") else "open"
    return None


def _lookup(table: dict[str, set[str]], code: str) -> str | None:
    k = _key(code)
    for target, words in table.items():
        if k in words:
            return target
    return None


# ---- the draft -----------------------------------------------------------------------------

def _q(s: str) -> str:
    return json.dumps(str(s), ensure_ascii=False)


def _k(s: str) -> str:
    return s if re.fullmatch(r"[A-Za-z0-9_-]+", s) else _q(s)


class _Writer:
    def __init__(self) -> None:
        self.lines: list[str] = []
        self.checks = 0

    def raw(self, text: str = "") -> None:
        self.lines.append(text)

    def kv(self, key: str, value: str, note: str = "", check: bool = False) -> None:
        line = f"{key} = {value}"
        comment = note + (" CHECK" if check and note else "CHECK" if check else "")
        if comment:
            line = f"{line:<42} # {comment}"
        self.checks += check
        self.lines.append(line)

    def text(self) -> str:
        return "\n".join(self.lines).rstrip() + "\n"


def draft_config(gis: str | Path, *, config_dir: str | Path | None = None) -> str:
    """A commented starter config (TOML text) for a GIS file.

    Parameters
    ----------
    gis : str or path
        Any file fiona reads (GeoPackage, shapefile folder, ...).
    config_dir : str or path, optional
        Where the config will live (paths in it are relative to it); default the GIS file's
        folder.

    Returns
    -------
    str
        TOML that :func:`gridflow.config.load_config` reads. Every guess the user should
        confirm ends in ``# CHECK``; each mapped field has its evidence in a comment.

    Raises
    ------
    InputError
        The file cannot be read, or it has no line layer to take as the mains.

    Examples
    --------
    >>> import gridflow
    >>> text = gridflow.draft_config("sample_gis/millbrook.gpkg")
    >>> line = next(ln for ln in text.splitlines() if ln.startswith("fields.diameter"))
    >>> print(line.replace("  ", ""))
    fields.diameter = "DIAM_IN"# DIAM_IN: float, 4-24, 1 of 2817 empty, unit in from the name
    >>> "[layers.hydrants]" in text and 'layer = "Hydrants"' in text
    True
    """
    gis = Path(gis)
    layers = inspect_gis(gis)
    groups = _assign_roles(layers)
    if "pipes" not in groups:
        raise InputError(f"{gis}: no line layer to take as the water mains (layers: "
                         f"{', '.join(f'{x.name} ({x.geometry})' for x in layers) or 'none'})",
                         file=str(gis))
    base = Path(config_dir) if config_dir is not None else gis.parent
    rel = os.path.relpath(gis.resolve(), base.resolve())
    entries = [(role, lay, _match_fields(role, lay)) for role, lays in groups.items()
               for lay in lays]
    roles = {role: lays[0] for role, lays in groups.items()}  # a role's first layer
    matched = {role: _match_fields(role, lay) for role, lay in roles.items()}
    system = _unit_system(entries, roles["pipes"])
    w = _Writer()
    _header(w, gis, layers, entries, system)
    _run_section(w, gis, roles["pipes"], system)
    w.raw("[inputs]")
    w.kv("gis", _q(Path(rel).as_posix()))
    w.raw()
    w.raw("# ---- layers: each role matched to the likeliest layer; evidence beside each line --")
    for role in ("pipes", "nodes", "hydrants", "valves", "tanks", "pumps", "sources", "meters"):
        for lay in groups.get(role, []):
            _layer_section(w, role, lay, _match_fields(role, lay), system,
                           many=len(groups[role]) > 1)
    _elevation_section(w, roles, entries, matched, system)
    _roughness_section(w, roles["pipes"], matched["pipes"])
    _demand_section(w, roles, matched, system)
    _scenario_and_fire_sections(w, roles, matched, system)
    text = w.text()
    return text.replace("@@CHECKS@@", str(count_checks(text)))


def count_checks(text: str) -> int:
    """Lines of a draft the user should confirm (ending in CHECK, or a ``# CHECK:`` note)."""
    return sum(1 for line in text.splitlines()
               if not line.startswith("# Every") and (line.rstrip().endswith("CHECK")
                                                      or line.startswith("# CHECK:")))


def _unit_system(entries: list, pipes: LayerInfo) -> str:
    votes: Counter[str] = Counter()
    for role, _lay, fields in entries:
        for fr, (f, _) in fields.items():
            if fr not in NUMERIC_FIELDS[role]:
                continue
            table = NUMERIC_FIELDS[role].get(fr)
            if table is None and fr != "consumption":
                continue
            u = _unit_from_name(f, table if table is not None else FLOW)
            if u is not None and u not in ("m3/month",):
                votes["US" if u in _US else "SI"] += 1
            elif u == "m3/month":
                votes["SI"] += 1
    if votes:
        return votes.most_common(1)[0][0]
    crs = pipes.crs
    try:
        import pyproj

        unit = pyproj.CRS.from_user_input(crs).axis_info[0].unit_name if crs else ""
    except Exception:
        unit = ""
    return "US" if "foot" in unit or "feet" in unit else "SI"


def _header(w: _Writer, gis: Path, layers: list[LayerInfo], entries: list,
            system: str) -> None:
    w.raw(f"# gridflow config drafted by `gridflow init` from {gis.name}.")
    w.raw("#")
    w.raw("# Every mapping below is a guess from layer names, geometry types, field names and a")
    w.raw("# sample of values; the evidence is in the comment beside each line. Lines ending in")
    w.raw("# CHECK are the guesses to confirm (@@CHECKS@@ of them). Then run:")
    w.raw("#   gridflow check THIS_FILE    (reads and cleans only; lists what looks wrong)")
    w.raw("# Results are model estimates of the GIS as mapped; field flow tests, local codes and")
    w.raw("# licensed engineers decide.")
    w.raw("#")
    w.raw("# Layers found:")
    by_layer = {lay.name: role for role, lay, _ in entries}
    for lay in layers:
        role = by_layer.get(lay.name)
        what = f"-> {role}" if role else "(not used)"
        w.raw(f"#   {lay.name}: {lay.geometry}, {lay.count} feature(s), "
              f"{lay.crs or 'no CRS'} {what}")
    w.raw()


def _run_section(w: _Writer, gis: Path, pipes: LayerInfo, system: str) -> None:
    w.raw("[run]")
    w.kv("name", _q(f"{gis.stem} nightly run"))
    w.kv("units", _q(system), "US: psi, gpm, ft, in; SI: kPa, L/s, m, mm (from the units "
         "the fields carry)", check=True)
    if pipes.crs and pipes.projected:
        w.kv("crs", _q(pipes.crs), f"the mains' own CRS ({pipes.name})")
    elif pipes.crs:
        w.kv("crs", '""', f"the mains' CRS {pipes.crs} is geographic: a local UTM zone is used")
    else:
        w.kv("crs", '""', f"layer {pipes.name} has no CRS: set it here or in the file",
             check=True)
    w.kv("headloss_model", '"hazen-williams"')
    w.kv("output", _q(f"{gis.stem}_results.gpkg"), "relative to this file")
    w.kv("snap_tolerance", '"0.5 m"', "pipe ends closer than this are joined")
    w.raw()


def _layer_section(w: _Writer, role: str, lay: LayerInfo,
                   fields: dict[str, tuple[FieldInfo, bool]], system: str, *,
                   many: bool = False) -> None:
    w.raw()
    w.raw(f"[[layers.{role}]]" if many else f"[layers.{role}]")
    w.kv("input", '"gis"')
    strong_layer = bool(_tokens(lay.name) & _LAYER_WORDS[role])
    w.kv("layer", _q(lay.name), f"{lay.geometry}, {lay.count} feature(s)"
         + ("" if strong_layer else f"; taken as {role} by its fields"), check=not strong_layer)
    used = {f.name for f, _ in fields.values()}
    idf, strong = _id_field(role, lay, used)
    if idf is None:
        w.kv("id", '"fid"', "no field looks like a feature id", check=True)
    else:
        n_dup = len(idf.values) - len(set(map(str, idf.values)))
        note = f"{idf.name}: {idf.type}" + (f", {n_dup} repeated in the sample" if n_dup else
                                             ", unique in the sample")
        w.kv("id", _q(idf.name), note, check=not strong)
        used.add(idf.name)
    codes: list[tuple[str, FieldInfo]] = []
    for fr in [r.rstrip("*") for r in ROLE_FIELDS[role]]:
        if fr not in fields:
            continue
        f, check = fields[fr]
        if fr == "length":
            continue
        table = NUMERIC_FIELDS[role].get(fr)
        note = f.describe()
        unit_line = None
        if fr in NUMERIC_FIELDS[role] and table is not None:
            u = _unit_from_name(f, table)
            if u is not None:
                note += f", unit {u} from the name"
                unit_line = (u, "", False)
            else:
                u, why = _unit_from_values(role, fr, f, system)
                note += f", {why}"
                unit_line = (u, "unit guessed from the values", True)
        if fr == "direction" and f.numeric:
            note += ", a bearing in degrees?"
            unit_line = ("deg", "clockwise from grid north, towards which water goes", True)
        w.kv(f"fields.{fr}", _q(f.name), note, check=check)
        if unit_line is not None:
            w.kv(f"units.{fr}", _q(unit_line[0]), unit_line[1], check=unit_line[2])
        if fr in ("status", "type", "material") or (fr == "direction" and not f.numeric):
            codes.append((fr, f))
        if fr == "level" and role == "pipes":
            odd = [c for c in f.counts if not re.fullmatch(r"-?\d+", c)]
            w.raw(f"# {f.name} values: {_list_counts(f)} (grade-separation levels: whole "
                  "numbers)")
            if odd:
                w.raw(f"# CHECK: not whole numbers, map them, e.g. codes.level.{_k(odd[0])} = "
                      '"-1"')
                w.checks += 1
    if role == "tanks" and "level" in fields and "bottom_elevation" in fields:
        lv, bt = fields["level"][0], fields["bottom_elevation"][0]
        if lv.median > bt.median:
            w.kv("levels", '"elevation"', f"{lv.name} (median {_g(lv.median)}) is above "
                 f"{bt.name} (median {_g(bt.median)}): absolute levels", check=True)
    for fr, f in codes:
        _codes(w, role, fr, f)
    if "zone" in fields:
        zf = fields["zone"][0]
        w.raw(f"# {zf.name} values: {_list_counts(zf)}")
    rest = [f for f in lay.fields.values() if f.name not in used]
    if rest:
        w.raw("# not mapped (map any of them under fields.<role> if it means one):")
        for f in rest:
            extra = ""
            if f.tokens & LEN and role == "pipes":
                extra = " (lengths come from the geometry; map fields.length to use this one)"
            elif f.coded and not f.numeric:
                extra = f": {_list_counts(f)}"
            w.raw(f"#   {f.describe()}{extra}")
    missing = [r for r in _REQUIRED[role] if r not in fields]
    for r in missing:
        w.kv(f"fields.{r}", '""', f"required: no field looks like the {r}; name it", check=True)


def _list_counts(f: FieldInfo, limit: int = MAX_CODES) -> str:
    items = sorted(f.counts.items(), key=lambda kv: (-kv[1], kv[0]))[:limit]
    return ", ".join(f"{k} ({n})" for k, n in items)


def _codes(w: _Writer, role: str, fr: str, f: FieldInfo) -> None:
    counts = f.counts
    w.raw(f"# {f.name} codes in the sample: {_list_counts(f)}")
    unknown = []
    for code in sorted(counts, key=lambda c: (-counts[c], c)):
        if fr == "status":
            target = _status_target(role, code)
        elif fr == "type":
            target = _lookup(_VALVE_TYPES, code)
        elif fr == "direction":
            target = _lookup(_DIRECTIONS, code)
        else:
            target = _lookup(_MATERIALS, code)
        if target is None:
            unknown.append(code)
            continue
        full_word = len(_key(code)) > 3 or target == _key(code).lower()
        if fr == "material":  # free names, used by the roughness table (itself to confirm)
            w.kv(f"codes.{fr}.{_k(code)}", _q(target))
            continue
        w.kv(f"codes.{fr}.{_k(code)}", _q(target), "" if full_word else f"{code}: {target}?",
             check=not full_word)
    if unknown:
        w.raw(f"# CHECK: not recognised, map them or they count as missing: "
              f"{', '.join(unknown)}")
        w.checks += 1


def _elevation_section(w: _Writer, roles: dict[str, LayerInfo], entries: list,
                       matched: dict, system: str) -> None:
    w.raw()
    w.raw("# ---- elevations, roughness ------------------------------------------------------")
    w.raw("[elevation]")
    pipes = roles["pipes"]
    if pipes.has_z and pipes.z and np.nanmax(np.abs(pipes.z)) > 0:
        z = np.asarray(pipes.z, dtype=float)
        zlo, zhi, zmed = float(np.min(z)), float(np.max(z)), float(np.median(z))
        w.kv("source", '"z"', f"{pipes.name} carries Z: {_g(zlo)}-{_g(zhi)}")
        unit, why, check = _z_unit(zmed, entries, system)
        w.kv("unit", _q(unit), why, check=check)
    elif "nodes" in roles and "elevation" in matched.get("nodes", {}):
        w.kv("source", '"attribute"', f"{roles['nodes'].name} has elevations")
    else:
        w.kv("source", '"attribute"', "no Z on the mains and no junction layer: elevations "
             "come from the point layers' elevation fields; a DEM is better (source = 'dem')",
             check=True)
        w.kv("unit", _q("ft" if system == "US" else "m"), "unit of Z and of a DEM", check=True)


def _z_unit(zmed: float, entries: list, system: str) -> tuple[str, str, bool]:
    """Z unit: that of a point layer's named-unit elevation field with a similar median."""
    for _role, lay, fields in entries:
        if "elevation" not in fields:
            continue
        f = fields["elevation"][0]
        u = _unit_from_name(f, HEAD)
        if u is not None and abs(f.median - zmed) <= 0.25 * max(abs(zmed), 1.0):
            return u, f"median Z {_g(zmed)} matches {lay.name}.{f.name} " \
                      f"(median {_g(f.median)}, {u})", False
    u = "ft" if system == "US" else "m"
    return u, f"median Z {_g(zmed)}; unit guessed from the rest of the file", True


def _roughness_section(w: _Writer, pipes: LayerInfo, fields: dict) -> None:
    w.raw()
    w.raw("[roughness]")
    if "roughness" in fields:
        f = fields["roughness"][0]
        w.kv("source", '"attribute"', f"{f.name} looks like Hazen-Williams C", check=True)
        w.kv("default", "120.0", "where the field is empty (common practice)", check=True)
        return
    w.kv("source", '"table"', "Hazen-Williams C by material; first matching rule wins")
    w.kv("default", "120.0", "material unknown (common practice)", check=True)
    mats = set()
    if "material" in fields:
        for code in fields["material"][0].counts:
            t = _lookup(_MATERIALS, code)
            if t is not None:
                mats.add(t)
    if not mats:
        w.raw("table = []")
        return
    w.raw("# typical C of pipes in service (from memory of handbook tables); lower them for old")
    w.raw("# unlined iron with rules such as { material = 'cast_iron', installed_before = 1930,")
    w.raw("# value = 75.0 } placed first")
    w.raw("table = [                                  # CHECK")
    w.checks += 1
    for m in sorted(mats):
        w.raw(f"  {{ material = {_q(m)}, value = {_C_TYPICAL[m]:.1f} }},")
    w.raw("]")


def _demand_section(w: _Writer, roles: dict[str, LayerInfo], matched: dict,
                    system: str) -> None:
    w.raw()
    w.raw("# ---- demand: customer meters to mains ----------------------------------------------")
    w.raw("[demand]")
    meters = matched.get("meters", {})
    if "consumption" not in meters:
        w.kv("method", '"none"', "no meter layer with consumption found: no demand",
             check=True)
        return
    f = meters["consumption"][0]
    w.kv("method", '"meters"')
    u = _unit_from_name(f, FLOW)
    if u is not None:
        w.kv("consumption_unit", _q(u), f"{f.describe()}, unit from the name")
    else:
        u, why = _unit_from_values("meters", "consumption", f, "US")
        w.kv("consumption_unit", _q(u), f"{f.describe()}, {why}", check=True)
    w.kv("search_distance", '"150 ft"' if system == "US" else '"45 m"',
         "meters farther from every main are findings")
    pipe_d = matched["pipes"].get("diameter")
    if pipe_d is not None:
        w.kv("max_main_diameter", '"0 in"', f"no limit; transmission mains (largest "
             f"{_g(pipe_d[0].hi)}) usually take no taps", check=True)
    if "category" in meters:
        cf = meters["category"][0]
        cats: dict[str, list[str]] = {}
        unknown: list[str] = []
        for code in sorted(cf.counts):
            t = _lookup(_CATEGORIES, code)
            (cats.setdefault(t, []) if t else unknown).append(code)
        w.raw(f"# {cf.name} codes in the sample: {_list_counts(cf)}")
        if unknown:
            w.raw(f"# CHECK: categories not recognised (they count as default_category): "
                  f"{', '.join(unknown)}")
            w.checks += 1
        for cat, codes in cats.items():
            w.raw()
            w.raw(f"[demand.categories.{cat}]")
            w.kv("codes", "[" + ", ".join(_q(c) for c in codes) + "]",
                 "" if all(len(c) > 3 for c in codes) else "from the codes' names",
                 check=not all(len(c) > 3 for c in codes))
    zone = matched["pipes"].get("zone") or meters.get("zone")
    if zone is not None:
        w.raw()
        w.raw("# Zone production totals give non-revenue water (the part not metered); add yours:")
        for z in sorted(zone[0].counts):
            w.raw(f"# [demand.zones.{_k(z)}]")
            w.raw('# production = "1.0 mgd"')


def _scenario_and_fire_sections(w: _Writer, roles: dict[str, LayerInfo], matched: dict,
                                system: str) -> None:
    w.raw()
    w.raw("# ---- scenarios (common practice: max day 1.5-2.0 x, peak hour 2.5-4 x average day) -")
    for name, factor in (("average_day", 1.0), ("max_day", 1.8), ("peak_hour", 3.0)):
        w.raw(f"[scenarios.{name}]")
        w.kv("factor", f"{factor}", "" if factor == 1.0 else "your utility's peaking factor",
             check=factor != 1.0)
    w.raw()
    w.raw("# ---- fire flow (NFPA 291 residual; International Fire Code Appendix B defaults) ----")
    w.raw("[fireflow]")
    if "hydrants" not in roles:
        w.kv("enabled", "false", "no hydrant layer found")
        return
    w.kv("enabled", "true")
    w.kv("scenario", '"max_day"')
    w.kv("residual_pressure", '"20 psi"' if system == "US" else '"140 kPa"')
    w.kv("default_required", '"1500 gpm"' if system == "US" else '"95 l/s"',
         "where no attribute or land-use value applies (IFC B105)", check=True)
    w.kv("lateral_diameter", '"6 in"' if system == "US" else '"150 mm"',
         "hydrant laterals where not mapped (common practice)", check=True)
    lu = matched["hydrants"].get("land_use")
    if lu is not None:
        f = lu[0]
        low = [c for c in sorted(f.counts) if _key(c) in _LOW_DENSITY_LAND_USE]
        w.raw(f"# {f.name} codes in the sample: {_list_counts(f)}")
        if low:
            w.raw("[fireflow.required_by_land_use]")
            for c in low:
                w.kv(_k(c), '"1000 gpm"' if system == "US" else '"63 l/s"',
                     "one- and two-family dwellings (IFC B105)?", check=True)
        w.raw("# other codes take default_required; add a line per code to differ")
    w.raw()
    w.raw("[report]")
    w.kv("enabled", "true")


def _write_new(path: Path, text: str) -> None:
    """Write ``text`` to a new file ``path`` atomically; never replaces an existing file."""
    folder = path.parent if str(path.parent) else Path(".")
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=f".{os.getpid()}.tmp",
                               dir=folder)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
        os.link(tmp, path)  # fails if the file exists: never overwritten
    except FileExistsError:
        raise OutputError(f"{path} exists; gridflow init never writes over a file: choose "
                          "another --out or move it away", file=str(path)) from None
    finally:
        try:
            os.unlink(tmp)
        except OSError:
            pass


def init_job(gis: str | Path, *, out: str | Path | None = None) -> int:
    """``gridflow init``: draft a config for ``gis`` and write it to ``out`` (new file).

    Raises
    ------
    OutputError
        ``out`` exists (never overwritten) or its folder cannot be written (exit code 2).
    InputError
        The GIS file cannot be read or has no line layer (exit code 2); nothing is written.
    """
    gis = Path(gis)
    target = Path(out) if out else gis.with_suffix(".toml")
    if target.exists():
        raise OutputError(f"{target} exists; gridflow init never writes over a file: choose "
                          "another --out or move it away", file=str(target))
    if not target.parent.resolve().is_dir():
        raise OutputError(f"output folder {target.parent} does not exist", file=str(target))
    text = draft_config(gis, config_dir=target.parent)
    try:
        _write_new(target, text)
    except PermissionError:
        raise OutputError(f"output folder {target.parent} is not writable",
                          file=str(target)) from None
    n_check = count_checks(text)
    roles = sorted({m.group(1) for m in re.finditer(r"^\[layers\.(\w+)\]", text, re.M)})
    print(f"gridflow init: mapped {', '.join(roles)} from {gis.name}")
    print(f"{n_check} line(s) marked CHECK are guesses to confirm")
    print(f"written: {target}")
    print(f"next: gridflow check {target}")
    return 0

