"""The bad-input corpus: every case gets the contract's answer, or a recorded repair.

Each case is a small function building a spoiled copy of the tiny district in
:mod:`tests.bad_input.town` and saying what it must get (:class:`Case`). The harness
(:func:`run_case`) checks for every case: the exit code (contract: 2 for unusable config or
input, 0 when the run repairs and goes on), the message naming file, layer, feature id and
field, the inputs byte-identical afterwards, no temporary file left, and when the run stops the
previous output at the target intact and nothing else written. ``CASES.md`` beside this file
lists the cases and what each gets.
"""

from __future__ import annotations

import os
import sqlite3
import struct

import numpy as np
import pyogrio
import pytest
from shapely.geometry import LineString, Point

from tests.bad_input.harness import Case, run_case
from tests.bad_input.town import CRS, X0, Y0, L, P, Town

CASES = []


def case(fn):
    CASES.append(fn)
    return fn


def mains_path(folder):
    return str(folder / "town.gpkg")


# ----------------------------------------------------------------- layers and fields
@case
def missing_layer():
    t = Town()
    t.config["layers"]["pipes"]["layer"] = "WaterMains"
    return Case(t, 2, ("town.gpkg", "'WaterMains'", "layers.pipes.layer", "mains"))


@case
def missing_optional_layer():
    t = Town()
    del t.layers["hydrants"]
    return Case(t, 2, ("town.gpkg", "'hydrants'", "layers.hydrants.layer"))


@case
def empty_pipe_layer():
    t = Town()
    t.layers["mains"] = t.layers["mains"][:1]  # written, then emptied in prepare

    def prepare(folder, gpkg, cfg):
        con = sqlite3.connect(gpkg)
        con.execute('DELETE FROM "mains"')
        con.commit()
        con.close()
    return Case(t, 2, ("town.gpkg", "'mains'", "no features"), prepare=prepare,
                summary="layer with no features")


@case
def empty_meter_layer():
    t = Town()

    def prepare(folder, gpkg, cfg):
        con = sqlite3.connect(gpkg)
        con.execute('DELETE FROM "meters"')
        con.commit()
        con.close()
    return Case(t, 0, findings=(("empty_layer", ""),), prepare=prepare,
                summary="an optional layer with no features: warning, run goes on")


@case
def missing_id_field():
    t = Town()
    t.config["layers"]["pipes"]["id"] = "FACILITYID"
    return Case(t, 2, ("town.gpkg", "'mains'", "'FACILITYID'", "layers.pipes.id", "MAIN_ID"))


@case
def misspelled_field():
    t = Town()
    t.config["layers"]["pipes"]["fields"]["diameter"] = "DIAM_INN"
    return Case(t, 2, ("town.gpkg", "'mains'", "'DIAM_INN'", "layers.pipes.fields.diameter",
                       "DIAM_IN"))


@case
def misspelled_field_role():
    t = Town()
    f = t.config["layers"]["pipes"]["fields"]
    f["diamter"] = f.pop("diameter")
    return Case(t, 2, ("layers.pipes.fields.diamter",))


@case
def text_where_number_belongs():
    t = Town()
    for r in t.layers["mains"]:
        r["DIAM_IN"] = str(r["DIAM_IN"])
    t.rows("mains", "M3")["DIAM_IN"] = "eight"
    return Case(t, 2, ("town.gpkg", "'mains'", "M3", "'DIAM_IN'", "'eight'"))


@case
def text_in_tank_level():
    t = Town()
    t.rows("tanks", "T1")["LEVEL_FT"] = "full"
    return Case(t, 2, ("town.gpkg", "'tanks'", "T1", "'LEVEL_FT'"))


@case
def where_filter_invalid():
    t = Town()
    t.config["layers"]["pipes"]["where"] = "STATUS = = 'ACT'"
    return Case(t, 2, ("town.gpkg", "'mains'", "layers.pipes.where"))


# ----------------------------------------------------------------- geometry
@case
def null_geometry_pipe():
    t = Town()
    t.rows("mains", "M5")["geometry"] = None
    return Case(t, 0, findings=(("no_geometry", "M5"),))


@case
def empty_geometry_pipe():
    t = Town()
    t.rows("mains", "M5")["geometry"] = LineString()
    return Case(t, 0, findings=(("no_geometry", "M5"),))


@case
def null_geometry_points():
    t = Town()
    t.rows("hydrants", "H1")["geometry"] = None
    t.rows("meters", "MT2")["geometry"] = None
    t.rows("valves", "V1")["geometry"] = Point()
    return Case(t, 0, findings=(("no_geometry", "H1"), ("meter_unallocated", "MT2"),
                                ("no_geometry", "V1")))


def _wkb(type_code: int, pts) -> bytes:
    b = struct.pack("<BII", 1, type_code, len(pts))
    for p in pts:
        b += struct.pack("<" + "d" * len(p), *p)
    return b


def _set_geometry_blob(gpkg, layer, fid_field, fid, wkb):
    """Put raw WKB (e.g. a curve shapely cannot build) into one feature of a GeoPackage."""
    # GeoPackage binary header: magic, version 0, flags (little endian, no envelope), srs id
    con = sqlite3.connect(gpkg)
    # the layer's spatial-index triggers call these; the index itself is not used here
    for fn in ("ST_IsEmpty", "ST_MinX", "ST_MaxX", "ST_MinY", "ST_MaxY"):
        con.create_function(fn, 1, lambda b: 0)
    srs = con.execute("SELECT srs_id FROM gpkg_geometry_columns WHERE table_name=?",
                      (layer,)).fetchone()[0]
    blob = b"GP" + bytes([0, 0b00000001]) + struct.pack("<i", srs) + wkb
    con.execute(f'UPDATE "{layer}" SET geom=? WHERE "{fid_field}"=?', (blob, fid))
    con.execute("UPDATE gpkg_geometry_columns SET geometry_type_name='GEOMETRY' "
                "WHERE table_name=?", (layer,))
    con.commit()
    con.close()


@case
def curved_pipe():
    # M5 digitised as a circular arc from J4 to J5 bulging north
    arc = [(X0 + 200, Y0 + 200), (X0 + 300, Y0 + 260), (X0 + 400, Y0 + 200)]

    def prepare(folder, gpkg, cfg):
        _set_geometry_blob(gpkg, "mains", "MAIN_ID", "M5", _wkb(8, arc))

    def check(out):
        pipes = pyogrio.read_dataframe(out, layer="pipes_average_day")
        g = pipes.loc[pipes["pipe_id"] == "M5", "geometry"].item()
        assert len(g.coords) > 3  # approximated by straight segments through the arc
        assert abs(pipes.loc[pipes["pipe_id"] == "M5", "length_ft"].item() * 0.3048
                   - g.length) < 0.5
    return Case(None, 0, findings=(("curve_linearized", "M5"),), prepare=prepare, check=check)


@case
def compound_curve_pipe():
    arc = _wkb(8, [(X0 + 200, Y0), (X0 + 160, Y0 + 100), (X0 + 200, Y0 + 200)])
    comp = struct.pack("<BII", 1, 9, 1) + arc

    def prepare(folder, gpkg, cfg):
        _set_geometry_blob(gpkg, "mains", "MAIN_ID", "M3", comp)
    return Case(None, 0, findings=(("curve_linearized", "M3"),), prepare=prepare)


@case
def measured_3d_pipes():
    t = Town()

    def prepare(folder, gpkg, cfg):
        # M1 as LineString ZM (type 3002): z and m values are dropped for the plan geometry
        _set_geometry_blob(gpkg, "mains", "MAIN_ID", "M1",
                           _wkb(3002, [(X0, Y0, 258.0, 0.0), (X0 + 200, Y0, 259.0, 200.0)]))
        _set_geometry_blob(gpkg, "mains", "MAIN_ID", "M2",
                           _wkb(2002, [(X0 + 200, Y0, 0.0), (X0 + 400, Y0, 200.0)]))  # M only

    def check(out):
        nodes = pyogrio.read_dataframe(out, layer="nodes_average_day", read_geometry=False)
        assert (nodes["supplied"] == 1).all()
    return Case(t, 0, prepare=prepare, check=check)


@case
def points_where_lines_belong():
    t = Town()
    t.rows("mains", "M5")["geometry"] = P(300, 200)
    return Case(t, 0, findings=(("not_a_line", "M5"),))


@case
def only_points_in_pipe_layer():
    t = Town()
    for r in t.layers["mains"]:
        r["geometry"] = r["geometry"].centroid
    return Case(t, 2, ("town.gpkg", "'mains'", "not lines", "M1"))


@case
def lines_where_points_belong():
    t = Town()
    t.rows("hydrants", "H1")["geometry"] = L((100, 5), (100, 30))
    return Case(t, 0, findings=(("not_a_point", "H1"),))


@case
def coordinates_far_outside_crs():
    t = Town()
    # a main digitised with a slipped decimal: 1000 km east of the zone's area
    t.rows("mains", "M8")["geometry"] = LineString([(X0 + 600, Y0), (X0 + 6e6, Y0 - 200)])
    return Case(t, 0, findings=(("outside_crs_area", "M8"),))


@case
def geographic_point_outside_world():
    t = Town()
    t.crs["hydrants"] = "EPSG:4326"
    t.rows("hydrants", "H1")["geometry"] = Point(-287.0, 41.5)
    return Case(t, 0, findings=(("outside_crs_area", "H1"),))


@case
def layer_without_crs():
    t = Town()
    t.crs["valves"] = None
    return Case(t, 2, ("town.gpkg", "'valves'", "coordinate reference system"))


@case
def layers_in_different_crs():
    t = Town()
    t.crs["hydrants"] = "EPSG:4326"
    from pyproj import Transformer
    tr = Transformer.from_crs(CRS, "EPSG:4326", always_xy=True)
    t.rows("hydrants", "H1")["geometry"] = Point(*tr.transform(X0 + 100, Y0 + 5))

    def check(out):
        # attached (a routine fact, counted), not reported as unattached
        _all_hydrants_attached(out, t)
    return Case(t, 0, check=check, summary="reprojected to the working CRS")


def _all_hydrants_attached(out, town):
    f = pyogrio.read_dataframe(out, layer="findings", read_geometry=False)
    assert not f["kind"].str.startswith("hydrant_").any(), f
    info = pyogrio.read_dataframe(out, layer="run_info").set_index("key")["value"]
    assert int(info["routine:hydrant_attached"]) == len(town.layers["hydrants"])


@case
def geographic_pipes_without_run_crs():
    t = Town()
    from pyproj import Transformer
    tr = Transformer.from_crs(CRS, "EPSG:4326", always_xy=True)
    t.crs["mains"] = "EPSG:4326"
    for r in t.layers["mains"]:
        r["geometry"] = LineString([tr.transform(x, y) for x, y in r["geometry"].coords])
    def check(out):
        info = pyogrio.read_dataframe(out, layer="run_info").set_index("key")["value"]
        assert info["routine:crs_chosen"] == "1"
    return Case(t, 0, check=check,
                summary="lon/lat mains: worked in the local UTM zone (counted in run_info)")


@case
def run_crs_geographic():
    t = Town()
    t.config["run"]["crs"] = "EPSG:4326"
    return Case(t, 2, ("run.crs", "not a projected CRS"))


# ----------------------------------------------------------------- ids
@case
def duplicate_pipe_ids():
    t = Town()
    t.rows("mains", "M5")["MAIN_ID"] = "M4"
    return Case(t, 0, findings=(("duplicate_id", "M4"),))


@case
def duplicate_meter_ids():
    t = Town()
    t.rows("meters", "MT3")["METER_NO"] = "MT2"
    return Case(t, 0, findings=(("duplicate_id", "MT2"),))


@case
def missing_ids():
    t = Town()
    t.rows("mains", "M5")["MAIN_ID"] = None
    t.rows("meters", "MT3")["METER_NO"] = ""
    return Case(t, 0, findings=(("missing_id", "mains:4"), ("missing_id", "meters:2")))


@case
def non_ascii_ids():
    t = Town()
    t.rows("mains", "M5")["MAIN_ID"] = "Hauptstraße-Ø200-ü"
    t.rows("hydrants", "H1")["HYD_ID"] = "消火栓-1"

    def check(out):
        pipes = pyogrio.read_dataframe(out, layer="pipes_average_day", read_geometry=False)
        assert "Hauptstraße-Ø200-ü" in set(pipes["pipe_id"])
        _all_hydrants_attached(out, t)
    return Case(t, 0, check=check)


@case
def very_long_ids():
    t = Town()
    long_id = "M5-" + "x" * 2000
    t.rows("mains", "M5")["MAIN_ID"] = long_id

    def check(out):
        pipes = pyogrio.read_dataframe(out, layer="pipes_average_day", read_geometry=False)
        assert long_id in set(pipes["pipe_id"])
    return Case(t, 0, check=check)


@case
def very_long_id_in_error():
    t = Town()
    long_id = "M3-" + "y" * 2000
    for r in t.layers["mains"]:
        r["DIAM_IN"] = str(r["DIAM_IN"])
    t.rows("mains", "M3").update(MAIN_ID=long_id, DIAM_IN="8 inch")
    return Case(t, 2, ("town.gpkg", "'mains'", long_id, "'DIAM_IN'"))


# ----------------------------------------------------------------- diameters
@case
def zero_diameter():
    t = Town()
    t.rows("mains", "M5")["DIAM_IN"] = 0.0
    return Case(t, 0, findings=(("diameter_missing", "M5"),))


@case
def negative_diameter():
    t = Town()
    t.rows("mains", "M5")["DIAM_IN"] = -8.0
    return Case(t, 0, findings=(("diameter_missing", "M5"),))


@case
def nan_diameter():
    t = Town()
    t.rows("mains", "M5")["DIAM_IN"] = float("nan")
    return Case(t, 0, findings=(("diameter_missing", "M5"),))


@case
def diameter_default_used():
    t = Town()
    t.rows("mains", "M5")["DIAM_IN"] = None
    t.config["layers"]["pipes"]["default_diameter"] = "6 in"
    return Case(t, 0, findings=(("diameter_missing", "M5"),))


@case
def implausibly_small_diameter():
    t = Town()
    t.rows("mains", "M5")["DIAM_IN"] = 0.05
    return Case(t, 0, findings=(("diameter_implausible", "M5"),))


@case
def inches_mapped_as_millimetres():
    t = Town()
    t.config["layers"]["pipes"]["units"]["diameter"] = "mm"
    return Case(t, 2, ("town.gpkg", "'mains'", "'DIAM_IN'", "layers.pipes.units.diameter"))


@case
def millimetres_mapped_as_inches():
    t = Town()
    for r in t.layers["mains"]:
        r["DIAM_IN"] = r["DIAM_IN"] * 25.4
    return Case(t, 2, ("town.gpkg", "'mains'", "'DIAM_IN'", "layers.pipes.units.diameter"))


@case
def diameter_unit_unknown():
    t = Town()
    t.config["layers"]["pipes"]["units"]["diameter"] = "zoll"
    return Case(t, 2, ("layers.pipes.units.diameter", "'zoll'"))


# ----------------------------------------------------------------- elevations and supply
@case
def missing_elevation():
    t = Town()
    t.rows("junctions", "J4")["ELEV_FT"] = None
    return Case(t, 0, findings=(("elevation_missing", "J4"),))


@case
def no_elevation_anywhere():
    t = Town()
    for r in t.layers["junctions"]:
        r["ELEV_FT"] = None
    return Case(t, 2, ("town.gpkg", "'junctions'", "'ELEV_FT'", "elevation"))


@case
def no_source_at_all():
    t = Town()
    t.config["layers"].pop("sources")
    t.config["layers"].pop("tanks")
    return Case(t, 2, ("no source or tank", "layers.sources"))


@case
def source_without_head_and_no_tank():
    t = Town()
    t.rows("sources", "S1")["HGL_FT"] = None
    t.config["layers"].pop("tanks")
    return Case(t, 2, ("no source or tank",))


@case
def source_far_from_mains():
    t = Town()
    t.rows("sources", "S1")["geometry"] = P(-5000, 0)
    return Case(t, 0, findings=(("source_unattached", "S1"),))


@case
def boundary_valve_closed():
    t = Town()
    t.rows("valves", "V2")["POS"] = "NC"

    def check(out):
        nodes = pyogrio.read_dataframe(out, layer="nodes_average_day", read_geometry=False)
        assert nodes.set_index("node_id").loc["J7", "supplied"] == 0
        assert nodes.set_index("node_id").loc["J2", "supplied"] == 1
    return Case(t, 0, findings=(("unsupplied_part", "M7.2"),), check=check,
                summary="zone cut off: unsupplied finding; its nodes written supplied = 0")


@case
def all_pipes_abandoned():
    t = Town()
    for r in t.layers["mains"]:
        r["STATUS"] = "ABD"
    return Case(t, 2, ("no pipes",))


# ----------------------------------------------------------------- devices
def _pump_town(**pump):
    t = Town()
    t.layers["valves"] = [r for r in t.layers["valves"] if r["VALVE_ID"] != "V2"]
    row = {"PUMP_ID": "PU1", "Q_GPM": 300.0, "H_FT": 60.0, "Q1": None, "H1": None, "Q2": None,
           "H2": None, "Q3": None, "H3": None, "geometry": P(500, 0)}
    row.update(pump)
    t.layers["pumps"] = [row]
    t.config["layers"]["pumps"] = {
        "input": "gis", "layer": "pumps", "id": "PUMP_ID",
        "fields": {"design_flow": "Q_GPM", "design_head": "H_FT", "flow_1": "Q1",
                   "head_1": "H1", "flow_2": "Q2", "head_2": "H2", "flow_3": "Q3",
                   "head_3": "H3"},
        "units": {"design_flow": "gpm", "design_head": "ft", "flow_1": "gpm", "head_1": "ft",
                  "flow_2": "gpm", "head_2": "ft", "flow_3": "gpm", "head_3": "ft"}}
    return t


@case
def pump_works():
    def check(out):
        pipes = pyogrio.read_dataframe(out, layer="pipes_average_day", read_geometry=False)
        assert pipes.loc[pipes["pipe_id"] == "PU1", "kind"].item() == "pump"
    return Case(_pump_town(), 0, check=check, summary="control: a pump with a design point")


@case
def pump_without_curve():
    return Case(_pump_town(Q_GPM=None, H_FT=None), 0,
                findings=(("pump_curve_missing", "PU1"), ("unsupplied_part", "M7.2")))


@case
def pump_with_rising_curve():
    t = _pump_town(Q_GPM=None, H_FT=None, Q1=0.0, H1=40.0, Q2=300.0, H2=60.0, Q3=600.0,
                   H3=80.0)
    return Case(t, 0, findings=(("pump_curve_missing", "PU1"),))


def _prv_town(psi):
    t = Town()
    t.rows("valves", "V2").update(VTYPE="PRV", SET_PSI=psi)
    return t


@case
def prv_works():
    def check(out):
        nodes = pyogrio.read_dataframe(out, layer="nodes_average_day", read_geometry=False)
        p = nodes.set_index("node_id")["pressure_psi"]
        pipes = pyogrio.read_dataframe(out, layer="pipes_average_day", read_geometry=False)
        v = pipes.set_index("pipe_id")
        down = v.loc["V2", "to_node"]
        assert abs(p[down] - 40.0) < 0.1  # the PRV holds its 40 psi setting downstream
    return Case(_prv_town(40.0), 0, check=check, summary="control: a PRV holding 40 psi")


@case
def prv_above_upstream_grade():
    return Case(_prv_town(200.0), 0, findings=(("prv_setting_unreachable", "V2"),))


@case
def prv_without_setting():
    return Case(_prv_town(None), 0, findings=(("valve_setting_missing", "V2"),))


@case
def tank_without_level():
    t = Town()
    t.rows("tanks", "T1")["LEVEL_FT"] = None
    return Case(t, 0, findings=(("tank_head_missing", "T1"),))


# ----------------------------------------------------------------- meters
@case
def meter_negative_use():
    t = Town()
    t.rows("meters", "MT2")["GPD"] = -250.0
    return Case(t, 0, findings=(("meter_bad_consumption", "MT2"),))


@case
def meter_non_numeric_use():
    t = Town()
    for r in t.layers["meters"]:
        r["GPD"] = str(r["GPD"])
    t.rows("meters", "MT4")["GPD"] = "n/a"
    return Case(t, 2, ("town.gpkg", "'meters'", "MT4", "'GPD'", "'n/a'"))


@case
def meter_far_from_mains():
    t = Town()
    t.rows("meters", "MT5")["geometry"] = P(500, 900)
    return Case(t, 0, findings=(("meter_unallocated", "MT5"),))


# ----------------------------------------------------------------- config
@case
def unknown_config_key():
    t = Town()
    t.config["run"]["colour"] = "blue"
    return Case(t, 2, ("town.toml", "run.colour"))


@case
def misspelled_config_key():
    t = Town()
    t.config["run"]["snap_tolerence"] = t.config["run"].pop("snap_tolerance")
    return Case(t, 2, ("town.toml", "run.snap_tolerence", "snap_tolerance"))


@case
def wrongly_typed_config_key():
    t = Town()
    t.config["run"]["snap_tolerance"] = 0.5
    return Case(t, 2, ("town.toml", "run.snap_tolerance", "unit"))


@case
def wrongly_typed_int():
    t = Town()
    t.config["solver"] = {"max_iter": "100"}
    return Case(t, 2, ("town.toml", "solver.max_iter", "whole number"))


@case
def wrong_unit_dimension():
    t = Town()
    t.config["criteria"] = {"min_pressure": "35 ft/s"}
    return Case(t, 2, ("town.toml", "criteria.min_pressure"))


@case
def invalid_toml():
    t = Town()
    t.config_text = '[run\nname = "x"\n'
    return Case(t, 2, ("town.toml", "not valid TOML"))


@case
def missing_required_section():
    t = Town()
    del t.config["layers"]
    return Case(t, 2, ("town.toml", "layers", "required"))


@case
def input_file_missing():
    t = Town()
    t.config["inputs"]["gis"] = "nowhere.gpkg"
    return Case(t, 2, ("nowhere.gpkg", "inputs.gis", "does not exist"))


@case
def config_file_missing():
    def prepare(folder, gpkg, cfg):
        cfg.rename(folder / "elsewhere.toml")
    return Case(None, 2, ("town.toml",), prepare=prepare)


# ----------------------------------------------------------------- output paths
@case
def output_equals_input():
    return Case(None, 2, ("town.gpkg", "input"), out="{folder}/town.gpkg")


@case
def output_equals_config():
    return Case(None, 2, ("town.toml", "config"), out="{folder}/town.toml")


@case
def output_folder_missing():
    return Case(None, 2, ("does not exist",), out="{folder}/nowhere/result.gpkg")


@case
def output_folder_unwritable():
    def prepare(folder, gpkg, cfg):
        os.chmod(folder / "out", 0o555)
        return lambda: os.chmod(folder / "out", 0o755)
    if os.geteuid() == 0:
        # root writes anywhere: a folder that is a file stands for an unusable folder
        def prepare(folder, gpkg, cfg):  # noqa: F811
            (folder / "ro").write_text("a file where a folder belongs")
        return Case(None, 2, ("ro",), out="{folder}/ro/result.gpkg", prepare=prepare)
    return Case(None, 2, ("not writable",), prepare=prepare)


@case
def output_folder_readonly_mount():
    """The folder is writable by permission bits but a write fails (as on a read-only mount)."""
    def prepare(folder, gpkg, cfg):
        import gridflow.io.write as w
        orig = w._write_layer

        def fail(*a, **k):
            raise OSError(30, "Read-only file system")
        w._write_layer = fail
        return lambda: setattr(w, "_write_layer", orig)
    return Case(None, 2, ("Read-only file system", "result.gpkg"), prepare=prepare)


# ----------------------------------------------------------------- broken files
@case
def truncated_geopackage():
    def prepare(folder, gpkg, cfg):
        data = gpkg.read_bytes()
        gpkg.write_bytes(data[: len(data) // 3])
    return Case(None, 2, ("town.gpkg",), prepare=prepare)


@case
def corrupt_geopackage():
    def prepare(folder, gpkg, cfg):
        data = bytearray(gpkg.read_bytes())
        rng = np.random.default_rng(7)
        data[1024:] = rng.integers(0, 256, len(data) - 1024, dtype=np.uint8).tobytes()
        gpkg.write_bytes(bytes(data))
    return Case(None, 2, ("town.gpkg",), prepare=prepare)


@case
def text_file_named_gpkg():
    def prepare(folder, gpkg, cfg):
        gpkg.write_text("MAIN_ID,DIAM_IN\nM1,12\n")
    return Case(None, 2, ("town.gpkg", "cannot open"), prepare=prepare)


@case
def empty_file_named_gpkg():
    def prepare(folder, gpkg, cfg):
        gpkg.write_bytes(b"")
    return Case(None, 2, ("town.gpkg",), prepare=prepare)


@case
def plain_sqlite_named_gpkg():
    def prepare(folder, gpkg, cfg):
        gpkg.unlink()
        con = sqlite3.connect(gpkg)
        con.execute("CREATE TABLE mains (MAIN_ID TEXT, DIAM_IN REAL)")
        con.commit()
        con.close()
    return Case(None, 2, ("town.gpkg",), prepare=prepare)


@case
def geopackage_locked_by_writer():
    def prepare(folder, gpkg, cfg):
        import gridflow.io.read as rd
        wait, rd.LOCK_WAIT_S = rd.LOCK_WAIT_S, 0.3
        con = sqlite3.connect(gpkg, isolation_level=None, timeout=0)
        con.execute("BEGIN EXCLUSIVE")  # an editor in the middle of saving
        con.execute("CREATE TABLE edit_in_progress (x)")

        def cleanup():
            con.execute("ROLLBACK")
            con.close()
            rd.LOCK_WAIT_S = wait
        return cleanup
    return Case(None, 2, ("town.gpkg", "locked by another program"), prepare=prepare)


@case
def geopackage_being_read_by_another_program():
    """A reader (a desktop GIS with the file open) does not stop the run."""
    def prepare(folder, gpkg, cfg):
        con = sqlite3.connect(gpkg, isolation_level=None)
        con.execute("BEGIN")
        con.execute("SELECT count(*) FROM mains").fetchall()
        return con.close
    return Case(None, 0, prepare=prepare)


@case
def previous_output_locked_by_reader():
    """Last night's output open in a desktop GIS: the new output replaces it atomically."""
    def prepare(folder, gpkg, cfg):
        from tests.bad_input.harness import previous_output
        target = folder / "out" / "result.gpkg"
        previous_output(target)
        con = sqlite3.connect(target, isolation_level=None)
        con.execute("BEGIN")
        con.execute("SELECT count(*) FROM run_info").fetchall()
        return con.close

    def check(out):
        keys = set(pyogrio.read_dataframe(out, layer="run_info")["key"])
        assert "config_sha256" in keys
    return Case(None, 0, prepare=prepare, check=check)


@case
def check_command_on_corrupt_input():
    def prepare(folder, gpkg, cfg):
        gpkg.write_text("not a database")
    return Case(None, 2, ("town.gpkg",), command="check", prepare=prepare)


@case
def check_command_with_no_source():
    t = Town()
    t.config["layers"].pop("sources")
    t.config["layers"].pop("tanks")
    return Case(t, 0, findings=(("no_fixed_head", ""),), command="check",
                summary="check only reports: no source is an error finding")


# ----------------------------------------------------------------- the corpus
@pytest.mark.parametrize("build", CASES, ids=[f.__name__ for f in CASES])
def test_bad_input(build, tmp_path):
    c = build()
    o = run_case(c, tmp_path)
    assert o.code == c.code, f"exit {o.code}, expected {c.code}: {o.stderr}"
    msg = " ".join(o.stderr.split())
    for word in c.match:
        assert word in msg, f"{word!r} not in message: {o.stderr}"
    if c.code == 2:
        assert o.stderr.startswith("error: ") and len(o.stderr.strip().splitlines()) == 1 or \
            "error: " in o.stderr, o.stderr
    if c.code == 0:
        assert o.out_path.exists()
        got = set(zip(o.findings["kind"], o.findings["feature_id"].fillna("")))
        for kind, fid in c.findings:
            assert (kind, fid) in got, f"finding {(kind, fid)} missing; got {sorted(got)}"
        if c.check:
            c.check(o.out_path)


def test_corpus_size():
    assert len(CASES) >= 50
