"""GeoPackage writing: the file equals what pyogrio's own writer makes with GDAL's defaults
(the reference), the faster SQLite settings stay scoped to our writes, and the file reaches
the disk (fsync) before it is renamed into place."""

from __future__ import annotations

import os
import sqlite3

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pytest
import shapely

import gridflow.io.write as w
from gridflow.io.deferred import DeferredLayer, RowGeometry
from gridflow.io.write import GPKG_WRITE_OPTIONS, gdal_config, write_geopackage, write_layers

from ..gis_helpers import CRS


def _layers() -> dict[str, object]:
    """Layers with every column kind a run writes: text (pandas and object), floats with NaN,
    int32 / int64, nullable ints, missing geometries, Z, mixed types, no rows, no geometry."""
    rng = np.random.default_rng(3)  # seeded
    n = 57
    xy = rng.uniform(0, 1000, (n, 2))
    z = rng.uniform(10, 90, n)
    lines = shapely.linestrings(np.repeat(np.c_[xy, z], 3, axis=0) + rng.normal(size=(3 * n, 3)),
                                indices=np.repeat(np.arange(n), 3))
    flow = rng.normal(size=n)
    flow[::9] = np.nan
    pipes = gpd.GeoDataFrame({
        "pipe_id": pd.array([f"P{i}" for i in range(n)], dtype="str"),
        "kind": np.asarray(["pipe", "valve"], dtype=object)[np.arange(n) % 2],
        "roughness_model": "hazen-williams",
        "flow_gpm": flow, "count": np.arange(n, dtype=np.int64) * 10**10,
        "high_velocity": (np.arange(n) % 7 == 0).astype(np.int32),
        "meets": pd.array([1, None, 0] * (n // 3), dtype="Int32"),
        "zone": pd.array(["north", None, "south"] * (n // 3), dtype="str"),
    }, geometry=lines, crs=CRS)
    nodes = gpd.GeoDataFrame({"node_id": [f"N{i}" for i in range(n)],
                              "pressure_psi": rng.normal(60, 5, n)},
                             geometry=shapely.points(xy), crs=CRS)
    nodes.loc[[3, 11], "geometry"] = None  # rows without geometry
    mixed = gpd.GeoDataFrame({"kind": ["a", "b", "c"], "note": [None, "x", None]},
                             geometry=[shapely.Point(1, 2), None, lines[0]], crs=CRS)
    empty = gpd.GeoDataFrame({"segment_id": pd.Series([], dtype=object),
                              "length_ft": pd.Series([], dtype=float)},
                             geometry=gpd.GeoSeries([], crs=CRS), crs=CRS)
    info = pd.DataFrame({"key": ["a", "b"], "value": ["1", "two"]})
    return {"pipes_x": pipes, "nodes_x": nodes, "findings": mixed, "segments": empty,
            "run_info": info}


def _reference(path, layers) -> None:
    """The same layers through pyogrio.write_dataframe with GDAL's default settings."""
    for name, df in layers.items():
        if isinstance(df, gpd.GeoDataFrame):
            kw = {"geometry_type": "Unknown"} if name == "findings" else {}
            pyogrio.write_dataframe(df, path, layer=name, driver="GPKG", use_arrow=True,
                                    promote_to_multi=False, **kw)
        else:
            pyogrio.write_dataframe(df, path, layer=name, driver="GPKG")


def _catalogue(path) -> dict:
    """What a GeoPackage reader relies on: tables and their SQL, the GeoPackage catalogue,
    spatial index row counts, and SQLite's own integrity check."""
    con = sqlite3.connect(path)
    try:
        out = {
            "sql": sorted(con.execute("SELECT type, name, sql FROM sqlite_master").fetchall()),
            "contents": sorted(con.execute(
                "SELECT table_name, data_type, identifier, min_x, min_y, max_x, max_y, srs_id "
                "FROM gpkg_contents").fetchall()),
            "geometry_columns": sorted(con.execute(
                "SELECT * FROM gpkg_geometry_columns").fetchall()),
            "extensions": sorted(con.execute("SELECT * FROM gpkg_extensions").fetchall()),
            "application_id": con.execute("PRAGMA application_id").fetchone()[0],
            "user_version": con.execute("PRAGMA user_version").fetchone()[0],
            "integrity": con.execute("PRAGMA integrity_check").fetchone()[0],
            "journal_mode": con.execute("PRAGMA journal_mode").fetchone()[0],
        }
        out["rtree_rows"] = {t: con.execute(f'SELECT count(*) FROM "{t}"').fetchone()[0]
                             for (t,) in con.execute(
                                 "SELECT name FROM sqlite_master WHERE type = 'table' AND "
                                 "name LIKE 'rtree_%' AND sql LIKE '%VIRTUAL%'")}
        return out
    finally:
        con.close()


def _assert_same_file(a, b) -> None:
    assert pyogrio.list_layers(a).tolist() == pyogrio.list_layers(b).tolist()
    assert _catalogue(a) == _catalogue(b)
    for name, _ in pyogrio.list_layers(a):
        x = pyogrio.read_dataframe(a, layer=name)
        y = pyogrio.read_dataframe(b, layer=name)
        assert list(x.columns) == list(y.columns), name
        if "geometry" in x:
            gx, gy = x.pop("geometry").values, y.pop("geometry").values
            assert (shapely.equals_exact(gx, gy, tolerance=0) |
                    (shapely.is_missing(gx) & shapely.is_missing(gy))).all(), name
            assert (shapely.has_z(gx) == shapely.has_z(gy)).all(), name
        pd.testing.assert_frame_equal(x, y, check_exact=True, obj=name)


@pytest.mark.parametrize("batch_rows", [5, 262_144])
def test_written_file_equals_pyogrio_default_write(tmp_path, monkeypatch, batch_rows):
    """Reference: pyogrio.write_dataframe(use_arrow=True) with GDAL's defaults, layer by
    layer. Small batches make every large layer go to GDAL in several parts."""
    monkeypatch.setattr(w, "BATCH_ROWS", batch_rows)
    layers = _layers()
    write_layers(tmp_path / "ours.gpkg", layers)
    _reference(tmp_path / "ref.gpkg", layers)
    _assert_same_file(tmp_path / "ours.gpkg", tmp_path / "ref.gpkg")
    assert _catalogue(tmp_path / "ours.gpkg")["integrity"] == "ok"
    assert _catalogue(tmp_path / "ours.gpkg")["rtree_rows"]["rtree_pipes_x_geom"] == 57
    assert not [p for p in tmp_path.iterdir() if p.name.endswith(("-journal", "-wal"))]


def test_deferred_layer_with_row_geometry_writes_the_built_layer(tmp_path, monkeypatch):
    """A layer streamed from its attributes and geometry made per batch is the same layer as
    its frame built whole; each batch asks only for its own rows."""
    monkeypatch.setattr(w, "BATCH_ROWS", 10)
    pipes = _layers()["pipes_x"]
    geoms = np.asarray(pipes.geometry.values)
    asked = []

    def make(rows):
        asked.append(rows)
        return geoms[rows]

    attrs = pd.DataFrame(pipes.drop(columns="geometry"))
    lazy = DeferredLayer(lambda: pipes, len(pipes), attributes=attrs,
                         geometry=RowGeometry(make, np.ones(len(pipes), bool)), crs=pipes.crs,
                         geometry_type="LineString Z")
    write_layers(tmp_path / "lazy.gpkg", {"pipes_x": lazy})
    write_layers(tmp_path / "whole.gpkg", {"pipes_x": pipes})
    _assert_same_file(tmp_path / "lazy.gpkg", tmp_path / "whole.gpkg")
    assert asked == [slice(a, min(a + 10, 57)) for a in range(0, 57, 10)]


@pytest.mark.parametrize("budget", [0, 4000, 2**28])
def test_layers_sharing_a_geometry_array_write_as_each_alone(tmp_path, monkeypatch, budget):
    """Layers written in parts whose geometry is one array (a run's scenario layers): each
    equals pyogrio's default write of it (the reference), whether its WKB is encoded again or
    reused (the byte budget for reuse: none, a few batches, all); reused batches are not
    encoded again."""
    import pyarrow as pa

    from gridflow.io import wkb

    monkeypatch.setattr(w, "BATCH_ROWS", 10)
    monkeypatch.setattr(w, "SHARED_WKB_BYTES", budget)
    encoded = []
    real = wkb.wkb_array
    monkeypatch.setattr(wkb, "wkb_array", lambda g: (encoded.append(len(g)), real(g))[1])
    pipes = _layers()["pipes_x"]
    geoms = np.asarray(pipes.geometry.values)
    frames = {f"pipes_{k}": pipes.assign(flow_gpm=pipes["flow_gpm"] * k) for k in (1, 2, 3)}
    layers = {name: DeferredLayer(lambda df=df: df, len(df), parts=lambda df=df: (
        pa.Table.from_pandas(pd.DataFrame(df.drop(columns="geometry")), preserve_index=False),
        geoms, "LineString Z"), crs=CRS) for name, df in frames.items()}
    write_layers(tmp_path / "ours.gpkg", layers)
    _reference(tmp_path / "ref.gpkg", frames)
    _assert_same_file(tmp_path / "ours.gpkg", tmp_path / "ref.gpkg")
    kept = {0: 0, 4000: None, 2**28: 57}[budget]
    if kept is not None:
        assert sum(encoded) == 3 * 57 - 2 * kept
    else:
        assert 57 < sum(encoded) < 3 * 57


def _config_now() -> dict:
    return {k: pyogrio.get_gdal_config_option(k) for k in GPKG_WRITE_OPTIONS}


def test_settings_hold_during_our_writes_and_are_put_back(tmp_path, monkeypatch):
    seen = []
    real = w._write_layer

    def spy(*a, **k):
        seen.append(_config_now())
        return real(*a, **k)

    monkeypatch.setattr(w, "_write_layer", spy)
    before = _config_now()
    pyogrio.set_gdal_config_options({"OGR_SQLITE_CACHE": "64"})  # a caller's own value
    try:
        write_layers(tmp_path / "a.gpkg", _layers())
        assert pyogrio.get_gdal_config_option("OGR_SQLITE_CACHE") in ("64", 64)
    finally:
        pyogrio.set_gdal_config_options({"OGR_SQLITE_CACHE": before["OGR_SQLITE_CACHE"]})
    assert _config_now() == before  # unset options are unset again
    # pyogrio reports ON/OFF as True/False
    want = {k: (False if v == "OFF" else v) for k, v in GPKG_WRITE_OPTIONS.items()}
    assert seen and all({k: (str(v) if not isinstance(v, bool) else v)
                         for k, v in s.items()} == want for s in seen)


def test_settings_are_put_back_when_a_write_fails(tmp_path, monkeypatch):
    before = _config_now()

    def boom(*a, **k):
        raise OSError(28, "No space left on device (injected)")

    monkeypatch.setattr(w, "_write_layer", boom)
    with pytest.raises(OSError):
        write_layers(tmp_path / "a.gpkg", _layers())
    assert _config_now() == before
    with gdal_config({"OGR_SQLITE_SYNCHRONOUS": "OFF"}):
        assert pyogrio.get_gdal_config_option("OGR_SQLITE_SYNCHRONOUS") is False
    assert _config_now() == before


def test_file_is_synced_before_it_is_renamed_into_place(tmp_path, monkeypatch):
    """The order of events on the temporary: written, fsync'd, renamed; an earlier output is
    replaced only then, and a failure before the rename leaves it byte-identical."""
    import gridflow.io.atomic as atomic

    events = []
    real_fsync, real_replace = os.fsync, atomic.os.replace

    def fsync(fd):
        events.append(("fsync", os.readlink(f"/proc/self/fd/{fd}")))
        return real_fsync(fd)

    def replace(src, dst):
        events.append(("replace", str(src), str(dst)))
        return real_replace(src, dst)

    if not os.path.exists("/proc/self/fd"):
        pytest.skip("needs /proc to name an open file")
    monkeypatch.setattr(os, "fsync", fsync)
    monkeypatch.setattr(atomic.os, "replace", replace)
    out = tmp_path / "res.gpkg"
    layers = _layers()
    write_geopackage(out, layers)
    synced = [e for e in events if e[0] == "fsync"]
    renamed = [e for e in events if e[0] == "replace" and e[2] == str(out)]
    assert len(synced) == 1 and len(renamed) == 1
    assert synced[0][1] == renamed[0][1]  # the temporary that was renamed was synced
    assert events.index(synced[0]) < events.index(renamed[0])
    before = out.read_bytes()
    _reference(tmp_path / "ref.gpkg", layers)
    _assert_same_file(out, tmp_path / "ref.gpkg")

    real = w._write_layer

    def fail_on_third(pyogrio_, tmp, name, layer, *rest):
        if name == "findings":
            raise OSError(28, "No space left on device (injected)")
        return real(pyogrio_, tmp, name, layer, *rest)

    monkeypatch.setattr(w, "_write_layer", fail_on_third)
    events.clear()
    with pytest.raises(OSError, match="No space left"):
        write_geopackage(out, layers)
    assert out.read_bytes() == before
    assert not [e for e in events if e[0] == "replace"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["ref.gpkg", "res.gpkg"]
