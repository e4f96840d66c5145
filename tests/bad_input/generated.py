"""The generated bad-input corpus: every mapped numeric field of every role and every numeric
config key, spoiled in every way, plus the file-system cases.

:func:`field_cases`, :func:`config_cases` and :func:`fs_cases` build :class:`GenCase` s on the
tiny district with every numeric field mapped (:func:`full_town`). What a case must get follows
from the documented rules (README "Valid values"): text in a numeric field, a value that is not
finite, or one outside the field's valid range stops the run (exit 2) with a message naming
file, layer, feature id and field (config: key and config file); an empty value is left to the
stage that knows what missing means; a value inside the valid range runs (exit 0), with an
``implausible_value`` finding on the feature when outside the plausible range.
"""

from __future__ import annotations

import math
import os
import random
import shutil
import sqlite3
import struct
from dataclasses import dataclass, field
from pathlib import Path

from gridflow.config.layers import unit_factor
from gridflow.config.ranges import CONFIG_RANGES
from gridflow.io.validate import _ROUGHNESS, FIELD_RANGES
from gridflow.units import FLOW
from tests.bad_input.town import P, Town

#: the spoilt values: (name, value written to SQLite)
FIELD_VALUES = [("nan", math.nan), ("pos_inf", math.inf), ("neg_inf", -math.inf),
                ("huge", 1e300), ("minus_one", -1.0), ("zero", 0.0), ("text", "abc"),
                ("text_with_unit", "12 in"), ("empty", "")]


def full_town() -> Town:
    """The district with every numeric field of every role mapped (a pump on M7 instead of
    valve V2, fire flow on)."""
    t = Town()
    for r in t.layers["mains"]:
        r.update(ROUGH=120.0, LEN_FT=None, PCLASS=150.0, KMIN=0.5)
    t.layers["mains"][0]["LEN_FT"] = 656.0  # M1 is 200 m long
    for r in t.layers["mains"][1:]:
        r["LEN_FT"] = 656.0
    t.layers["hydrants"][0].update(RFF_GPM=1500.0, ELEV_FT=850.0, LAT_FT=20.0, LAT_IN=6.0)
    t.layers["valves"] = [r for r in t.layers["valves"] if r["VALVE_ID"] != "V2"]
    t.layers["valves"][0].update(SET_PSI=0.0, DIAM_IN=8.0, ELEV_FT=852.0, KV=0.2)
    t.layers["tanks"][0].update(MAX_FT=30.0, DIAM_FT=40.0)
    t.layers["sources"][0].update(ELEV_FT=840.0)
    t.layers["pumps"] = [{"PUMP_ID": "PU1", "Q_GPM": 300.0, "H_FT": 60.0, "Q1": 0.0,
                          "H1": 80.0, "Q2": 300.0, "H2": 60.0, "Q3": 600.0, "H3": 20.0,
                          "SPEED": 1.0, "geometry": P(500, 0)}]
    L = t.config["layers"]
    L["pipes"]["fields"].update(roughness="ROUGH", length="LEN_FT", pressure_rating="PCLASS",
                                minor_loss_k="KMIN")
    L["pipes"]["units"].update(length="ft", pressure_rating="psi")
    L["hydrants"].update(fields={"required_fire_flow": "RFF_GPM", "elevation": "ELEV_FT",
                                 "lateral_length": "LAT_FT", "lateral_diameter": "LAT_IN"},
                         units={"required_fire_flow": "gpm", "elevation": "ft",
                                "lateral_length": "ft", "lateral_diameter": "in"})
    L["valves"]["fields"].update(diameter="DIAM_IN", elevation="ELEV_FT", minor_loss_k="KV")
    L["valves"]["units"].update(diameter="in", elevation="ft")
    L["tanks"]["fields"].update(max_level="MAX_FT", diameter="DIAM_FT")
    L["tanks"]["units"].update(max_level="ft", diameter="ft")
    L["sources"]["fields"]["elevation"] = "ELEV_FT"
    L["sources"]["units"]["elevation"] = "ft"
    L["pumps"] = {"input": "gis", "layer": "pumps", "id": "PUMP_ID",
                  "fields": {"design_flow": "Q_GPM", "design_head": "H_FT", "flow_1": "Q1",
                             "head_1": "H1", "flow_2": "Q2", "head_2": "H2", "flow_3": "Q3",
                             "head_3": "H3", "speed": "SPEED"},
                  "units": {"design_flow": "gpm", "design_head": "ft", "flow_1": "gpm",
                            "head_1": "ft", "flow_2": "gpm", "head_2": "ft", "flow_3": "gpm",
                            "head_3": "ft"}}
    t.config["fireflow"] = {"enabled": True, "scenario": "max_day", "batch_size": 10}
    return t


#: which feature of each role gets the spoilt value: (layer, id field, feature id)
TARGET = {"pipes": ("mains", "MAIN_ID", "M5"), "nodes": ("junctions", "NODE_ID", "J4"),
          "hydrants": ("hydrants", "HYD_ID", "H1"), "valves": ("valves", "VALVE_ID", "V1"),
          "tanks": ("tanks", "TANK_ID", "T1"), "pumps": ("pumps", "PUMP_ID", "PU1"),
          "sources": ("sources", "SRC_ID", "S1"), "meters": ("meters", "METER_NO", "MT2")}


@dataclass
class GenCase:
    """One generated case: what to spoil and what it must get.

    ``expect``: "stop" (exit 2 naming ``names``), "run" (exit 0; ``finding`` names a
    (kind, feature id) that must be among the findings when set), or "either" (exit 0 with a
    finding on ``feature`` or exit 2 naming ``names``).
    """

    id: str
    category: str
    expect: str
    names: tuple[str, ...] = ()
    feature: str = ""
    finding: tuple[str, str] | None = None
    town: Town | None = None
    spoil: object = None  # callable(folder, gpkg, cfg) -> (config path, out path or None)
    args: tuple[str, ...] = ()
    extra: dict = field(default_factory=dict)


def _si(role: str, f: str, v: float, sec: dict) -> float:
    if (role, f) == ("meters", "consumption"):
        return v * {k.lower(): x for k, x in FLOW.items()}["gal/day"]
    unit = sec.get("units", {}).get(f)
    if (role, f) == ("valves", "setting"):
        return v  # an isolation valve: the raw range
    return v * unit_factor(role, f, unit) if unit else v


def _range(role, f, model="hazen-williams"):
    if (role, f) == ("pipes", "roughness"):
        return _ROUGHNESS[model]
    return FIELD_RANGES[role][f]


def field_cases() -> list[GenCase]:
    base = full_town()
    out = []
    for role, fields in FIELD_RANGES.items():
        sec = base.config["layers"].get(role)
        if sec is None:
            continue
        layer, id_field, fid = TARGET[role]
        for f in fields:
            col = sec["fields"].get(f)
            if col is None:
                continue
            r = _range(role, f)
            extra_values = []
            f_si = _si(role, f, 1.0, sec)  # field unit -> SI
            if r.p_hi < r.hi:  # possible but implausible, above
                hi = min(r.hi, r.p_hi * 4 if r.p_hi > 0 else r.hi)
                extra_values.append(("implausible_high", round((r.p_hi + hi) / 2 / f_si, 6)))
            if r.p_lo > max(r.lo, -1e9):  # possible but implausible, below
                extra_values.append(("implausible_low", round((r.p_lo + max(r.lo, 0.0))
                                                               / 2 / f_si, 6)))
            for vname, v in FIELD_VALUES + extra_values:
                if isinstance(v, str):
                    expect = "stop" if v.strip() else "missing"
                elif math.isnan(v):
                    expect = "missing"
                elif not math.isfinite(v):
                    expect = "stop"
                else:
                    si = _si(role, f, v, sec)
                    lo_ok = si > r.lo if r.lo_open else si >= r.lo
                    expect = "run" if lo_ok and si <= r.hi else "stop"
                    if expect == "run" and not (r.p_lo <= si <= r.p_hi):
                        expect = "implausible"
                out.append(GenCase(
                    id=f"{role}.{f}={vname}", category=f"field:{role}", expect=expect,
                    names=("town.gpkg", f"'{layer}'", fid, f"'{col}'"), feature=fid,
                    extra={"layer": layer, "id_field": id_field, "col": col, "value": v}))
    return out


def spoil_field(gpkg: Path, layer: str, id_field: str, fid: str, col: str, value) -> None:
    """Write ``value`` into one feature's field straight through SQLite (as an editor's tool
    might: SQLite keeps text in a REAL column)."""
    con = sqlite3.connect(gpkg)
    # the spatial-index triggers name these; with the fid unchanged they do not run
    for fn in ("ST_IsEmpty", "ST_MinX", "ST_MaxX", "ST_MinY", "ST_MaxY"):
        con.create_function(fn, 1, lambda b: 0)
    try:
        con.execute(f'UPDATE "{layer}" SET "{col}" = ? WHERE "{id_field}" = ?', (value, fid))
        con.commit()
    finally:
        con.close()


#: concrete config keys for the range patterns, with what the key needs beside it
_CONCRETE = {
    "layers.*.search_distance": "layers.hydrants.search_distance",
    "layers.*.default_diameter": "layers.pipes.default_diameter",
    "roughness.table.*.value": "roughness.table.0.value",
    "roughness.table.*.installed_before": "roughness.table.0.installed_before",
    "demand.zones.*.production": "demand.zones.LOW.production",
    "demand.points.*.flow": "demand.points.0.flow",
    "scenarios.*.factor": "scenarios.average_day.factor",
    "scenarios.*.category_factors.*": "scenarios.average_day.category_factors.residential",
    "scenarios.*.tank_levels.*": "scenarios.average_day.tank_levels.T1",
    "fireflow.required_by_land_use.*": "fireflow.required_by_land_use.SFR",
    "fireflow.required_by_zone.*": "fireflow.required_by_zone.LOW",
}
_INTS = {"solver.max_iter", "fireflow.batch_size", "fireflow.progress_every",
         "report.worst_rows", "roughness.table.*.installed_before"}
_UNIT_TEXT = {"m": "m", "psi": "psi", "m/s": "m/s", "gpm": "gpm", "in": "in", "m3/s": "m**3/s",
              "m/m": "m/m"}


def _set(table: dict, key: str, value) -> None:
    parts = key.split(".")
    cur = table
    for i, p in enumerate(parts[:-1]):
        nxt = parts[i + 1]
        if isinstance(cur, list):
            cur = cur[int(p)]
            continue
        if p not in cur:
            cur[p] = [] if nxt.isdigit() else {}
        cur = cur[p]
    last = parts[-1]
    if isinstance(cur, list):
        cur[int(last)] = value
    else:
        cur[last] = value


def _config_town(key: str) -> Town:
    t = Town()
    if key.startswith("roughness.table"):
        t.config["roughness"] = {"table": [{"material": "ductile_iron", "value": 130.0}]}
    if key.startswith("demand.points"):
        t.config["demand"]["points"] = [{"node": "J4", "flow": "10 gpm"}]
    if key.startswith("scenarios."):
        t.config["scenarios"] = {"average_day": {"factor": 1.0}}
    if key.startswith("fireflow."):
        t.config["fireflow"] = {"enabled": True, "scenario": "max_day"}
    if key.startswith("report."):
        t.config["report"] = {"enabled": True}
    if key.startswith("solver.pdd"):
        t.config["solver"] = {"pressure_driven": True, "pdd_min_pressure": "0 psi",
                              "pdd_required_pressure": "20 psi"}
    return t


def config_cases() -> list[GenCase]:
    out = []
    for pat, r in CONFIG_RANGES.items():
        key = _CONCRETE.get(pat, pat)
        is_int = pat in _INTS
        unit = _UNIT_TEXT.get(r.unit) if r.unit else None
        if pat == "criteria.max_unit_headloss":
            unit = "m/m"
        shown = {"negative": -1.0, "zero": 0.0,
                 "out_of_range": (r.hi * r.scale) * 10 + 1}
        values: list[tuple[str, object, str]] = [
            ("wrong_type", ("abc" if unit is None else 5.0), "stop")]
        for vname, num in (("nan", math.nan), ("inf", math.inf)):
            values.append((vname, f"{num} {unit}" if unit else (num if not is_int else num),
                           "stop"))
        for vname, num in shown.items():
            si = num / r.scale
            ok = (si > r.lo if r.lo_open else si >= r.lo) and si <= r.hi
            v: object = num
            if is_int:
                v = int(num)
            elif unit:
                v = f"{num:g} {unit}"
            values.append((vname, v, "run" if ok else "stop"))
        for vname, v, expect in values:
            out.append(GenCase(id=f"{key}={vname}", category=f"config:{key.split('.')[0]}",
                               expect=expect, names=("town.toml", key.replace(".0.", "[0].")),
                               extra={"key": key, "value": v}))
    return out


def spoil_config(t: Town, key: str, value) -> Town:
    _set(t.config, key, value)
    return t


# ------------------------------------------------------------------ file system
def _fifo(folder: Path, name: str) -> Path:
    p = folder / name
    if p.exists():
        p.unlink()
    os.mkfifo(p)
    return p


def fs_cases() -> list[GenCase]:
    """(id, spoil, expect, names): each spoil(folder, gpkg, cfg, town) -> (config, out)."""
    def inputs(name):
        def f(folder, gpkg, cfg, t):
            t.config["inputs"]["gis"] = name
            return None
        return f

    def missing(folder, gpkg, cfg, t):
        t.config["inputs"]["gis"] = "nowhere.gpkg"

    def as_folder(folder, gpkg, cfg, t):
        (folder / "dir.gpkg").mkdir()
        t.config["inputs"]["gis"] = "dir.gpkg"

    def fifo(folder, gpkg, cfg, t):
        _fifo(folder, "pipe.gpkg")
        t.config["inputs"]["gis"] = "pipe.gpkg"

    def device(folder, gpkg, cfg, t):
        t.config["inputs"]["gis"] = "/dev/zero"

    def zero_bytes(folder, gpkg, cfg, t):
        (folder / "empty.gpkg").write_bytes(b"")
        t.config["inputs"]["gis"] = "empty.gpkg"

    def truncated(folder, gpkg, cfg, t):
        data = gpkg.read_bytes()
        (folder / "cut.gpkg").write_bytes(data[: len(data) // 3])
        t.config["inputs"]["gis"] = "cut.gpkg"

    def not_gpkg(folder, gpkg, cfg, t):
        (folder / "notes.gpkg").write_text("mains: see the paper map\n")
        t.config["inputs"]["gis"] = "notes.gpkg"

    def unreadable(folder, gpkg, cfg, t):
        shutil.copy(gpkg, folder / "locked.gpkg")
        os.chmod(folder / "locked.gpkg", 0)
        t.config["inputs"]["gis"] = "locked.gpkg"

    def config_fifo(folder, gpkg, cfg, t):
        return "fifo-config", None

    def config_folder(folder, gpkg, cfg, t):
        return "folder-config", None

    def out_is_folder(folder, gpkg, cfg, t):
        (folder / "out" / "result.gpkg").mkdir()
        return None, folder / "out" / "result.gpkg"

    def out_folder_readonly(folder, gpkg, cfg, t):
        return "readonly-out", folder / "out" / "result.gpkg"

    def out_equals_input(folder, gpkg, cfg, t):
        return None, gpkg

    def out_symlink_to_input(folder, gpkg, cfg, t):
        (folder / "out" / "link.gpkg").symlink_to(gpkg)
        return None, folder / "out" / "link.gpkg"

    def out_hardlink_of_input(folder, gpkg, cfg, t):
        os.link(gpkg, folder / "out" / "twin.gpkg")
        return None, folder / "out" / "twin.gpkg"

    def log_equals_input(folder, gpkg, cfg, t):
        shutil.copy(gpkg, folder / "night.log")
        t.config["inputs"]["gis"] = "night.log"
        return None, folder / "night.gpkg"

    def report_equals_input(folder, gpkg, cfg, t):
        shutil.copy(gpkg, folder / "night.html")
        t.config["inputs"]["gis"] = "night.html"
        t.config["report"] = {"enabled": True}
        return None, folder / "night.gpkg"

    def diagnostics_equals_input(folder, gpkg, cfg, t):
        shutil.copy(gpkg, folder / "night.diagnostics.gpkg")
        t.config["inputs"]["gis"] = "night.diagnostics.gpkg"
        return None, folder / "night.gpkg"

    def out_equals_config(folder, gpkg, cfg, t):
        return None, cfg

    def out_named_like_log(folder, gpkg, cfg, t):
        return None, folder / "out" / "night.log"

    def previous_is_fifo(folder, gpkg, cfg, t):
        return "previous-fifo", None

    def report_is_folder(folder, gpkg, cfg, t):
        t.config["report"] = {"enabled": True}
        (folder / "out" / "result.html").mkdir()
        return None, None

    def run_output_is_folder(folder, gpkg, cfg, t):
        (folder / "out" / "result.gpkg").mkdir()
        return "no-out", None

    rows = [
        ("report_path_is_folder", report_is_folder, ("result.html", "folder")),
        ("run_output_is_folder", run_output_is_folder, ("result.gpkg", "folder")),
        ("input_missing", missing, ("nowhere.gpkg", "inputs.gis", "does not exist")),
        ("input_is_folder", as_folder, ("dir.gpkg", "inputs.gis", "folder")),
        ("input_is_fifo", fifo, ("pipe.gpkg", "inputs.gis", "FIFO")),
        ("input_is_device", device, ("/dev/zero", "inputs.gis", "device")),
        ("input_zero_bytes", zero_bytes, ("empty.gpkg",)),
        ("input_truncated", truncated, ("cut.gpkg",)),
        ("input_not_a_geopackage", not_gpkg, ("notes.gpkg",)),
        ("input_unreadable", unreadable, ("locked.gpkg",)),
        ("config_is_fifo", config_fifo, ("cfg.toml", "FIFO")),
        ("config_is_folder", config_folder, ("cfgdir.toml",)),
        ("output_is_folder", out_is_folder, ("result.gpkg",)),
        ("output_folder_readonly", out_folder_readonly, ("out",)),
        ("output_equals_input", out_equals_input, ("town.gpkg", "input")),
        ("output_symlink_to_input", out_symlink_to_input, ("link.gpkg", "town.gpkg")),
        ("output_hardlink_of_input", out_hardlink_of_input, ("twin.gpkg", "town.gpkg")),
        ("log_path_equals_input", log_equals_input, ("night.log", "log file", "input")),
        ("report_path_equals_input", report_equals_input, ("night.html", "report", "input")),
        ("diagnostics_path_equals_input", diagnostics_equals_input,
         ("night.diagnostics.gpkg", "diagnostics", "input")),
        ("output_equals_config", out_equals_config, ("town.toml", "config")),
        ("output_named_like_its_log", out_named_like_log, ("night.log", "log file")),
        ("previous_output_is_fifo", previous_is_fifo, ("prev.gpkg", "FIFO")),
    ]
    cases = [GenCase(id=i, category="files", expect="stop", names=n, spoil=s)
             for i, s, n in rows]

    def nan_vertex(folder, gpkg, cfg, t):
        set_wkb(gpkg, "mains", "MAIN_ID", "M5", _line_wkb([(200, 200), (math.nan, 200),
                                                             (400, 200)]))

    def inf_vertex_hydrant(folder, gpkg, cfg, t):
        set_wkb(gpkg, "hydrants", "HYD_ID", "H1", struct.pack("<BIdd", 1, 1, math.inf, 5.0))

    def srs_id_zero(folder, gpkg, cfg, t):
        con = sqlite3.connect(gpkg)
        con.execute("UPDATE gpkg_geometry_columns SET srs_id=0 WHERE table_name='mains'")
        con.commit()
        con.close()

    cases += [
        GenCase(id="pipe_with_nan_vertex", category="geometry", expect="run", feature="M5",
                finding=("bad_coordinates", "M5"), spoil=nan_vertex),
        GenCase(id="hydrant_at_infinity", category="geometry", expect="run", feature="H1",
                finding=("bad_coordinates", "H1"), spoil=inf_vertex_hydrant),
        GenCase(id="pipes_srs_id_0", category="geometry", expect="stop",
                names=("town.gpkg", "'mains'", "coordinate reference system"),
                spoil=srs_id_zero),
    ]
    return cases


def _line_wkb(pts) -> bytes:
    from tests.bad_input.town import X0, Y0

    b = struct.pack("<BII", 1, 2, len(pts))
    for x, y in pts:
        b += struct.pack("<dd", X0 + x, Y0 + y)
    return b


def set_wkb(gpkg: Path, layer: str, id_field: str, fid: str, wkb: bytes) -> None:
    """Put raw WKB into one feature (GeoPackage binary header, no envelope)."""
    con = sqlite3.connect(gpkg)
    for fn in ("ST_IsEmpty", "ST_MinX", "ST_MaxX", "ST_MinY", "ST_MaxY"):
        con.create_function(fn, 1, lambda b: 0)
    srs = con.execute("SELECT srs_id FROM gpkg_geometry_columns WHERE table_name=?",
                      (layer,)).fetchone()[0]
    blob = b"GP" + bytes([0, 0b00000001]) + struct.pack("<i", srs) + wkb
    con.execute(f'UPDATE "{layer}" SET geom=? WHERE "{id_field}"=?', (blob, fid))
    con.commit()
    con.close()


def all_cases() -> list[GenCase]:
    return field_cases() + config_cases() + fs_cases()


def ci_sample(cases: list[GenCase], k_fields: int = 45, k_config: int = 45,
              seed: int = 20261202) -> list[GenCase]:
    """The CI profile: every file-system case, and a fixed-seed sample of the others that
    still covers every spoilt value and every role."""
    rnd = random.Random(seed)
    fields_ = [c for c in cases if c.category.startswith("field:")]
    conf = [c for c in cases if c.category.startswith("config:")]
    fs = [c for c in cases if c.category in ("files", "geometry")]
    return rnd.sample(fields_, min(k_fields, len(fields_))) + \
        rnd.sample(conf, min(k_config, len(conf))) + fs
