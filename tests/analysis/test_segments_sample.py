"""Segments of the Millbrook sample, end to end through `gridflow run` (fire flow and report
off to keep it short): the layer, its bookkeeping against the other layers, the planted cases."""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest

ROOT = Path(__file__).resolve().parents[2]
SAMPLE = ROOT / "sample_gis"


@pytest.fixture(scope="module")
def out(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("segments")
    text = (SAMPLE / "millbrook.toml").read_text()
    text = re.sub(r'(\w+)\s*=\s*"millbrook\.gpkg"',
                  lambda m: f'{m.group(1)} = "{(SAMPLE / "millbrook.gpkg").as_posix()}"', text)
    text = text.replace("[fireflow]\n", "[fireflow]\nenabled = false\n", 1)
    text = re.sub(r"(\[fireflow\]\nenabled = false\n(?:.*\n)*?)enabled = true\n", r"\1", text)
    text = re.sub(r"\[report\]\n", "[report]\nenabled = false\n", text, count=1) \
        if "[report]" in text else text + "\n[report]\nenabled = false\n"
    text = re.sub(r"(\[report\]\nenabled = false\n(?:.*\n)*?)enabled = true\n", r"\1", text)
    cfg = tmp / "town.toml"
    cfg.write_text(text)
    gpkg = tmp / "town.gpkg"
    proc = subprocess.run([sys.executable, "-m", "gridflow", "-q", "run", str(cfg), "--out",
                           str(gpkg), "--workers", "2"], capture_output=True, text=True,
                          check=False, timeout=900)
    assert proc.returncode == 0, proc.stderr[-3000:]
    return gpkg, proc.stdout


def test_segments_layer_adds_up_with_the_other_layers(out):
    gpkg, _ = out
    seg = gpd.read_file(gpkg, layer="segments")
    pipes = gpd.read_file(gpkg, layer="pipes_average_day")
    nodes = gpd.read_file(gpkg, layer="nodes_average_day")
    assert seg["segment_id"].is_unique and len(seg) > 1
    # every main is in exactly one segment: lengths add up to the pipes layer's
    mains = pipes["kind"] == "pipe"
    assert seg["length_ft"].sum() == pytest.approx(pipes.loc[mains, "length_ft"].sum(), rel=1e-9)
    # demand adds up to the scenario's required demand
    assert seg["demand_gpm"].sum() == pytest.approx(nodes["required_demand_gpm"].sum(), rel=1e-9)
    # a segment's isolating valves are valves of the pipes layer
    valves = set(pipes.loc[pipes["kind"] == "valve", "pipe_id"])
    listed = {v for ids in seg["valve_ids"] if ids for v in ids.split(", ")}
    assert listed and listed <= valves
    # geometry: a multi-line per segment with mains; its length is the mains' length
    has = seg.geometry.notna()
    assert (seg.geometry[has].geom_type == "MultiLineString").all()
    np.testing.assert_allclose(seg.geometry[has].length / 0.3048, seg.loc[has, "length_ft"],
                               rtol=1e-6)


def test_the_sample_shows_an_oversized_segment_and_an_unintended_isolation(out):
    gpkg, stdout = out
    seg = gpd.read_file(gpkg, layer="segments")
    findings = gpd.read_file(gpkg, layer="findings")
    assert (seg["oversized"] == 1).any()
    cut = seg[seg["cut_off_meters"] > 0]
    assert len(cut)
    kinds = set(findings.loc[findings["layer"] == "segments", "kind"])
    assert {"segment_oversized", "segment_closure_cuts_off"} <= kinds
    assert "valve segments:" in stdout


def test_criticality_counts_are_consistent(out):
    gpkg, _ = out
    seg = gpd.read_file(gpkg, layer="segments")
    solved = seg[seg["closure_solved"] == 1]
    assert len(solved) == (seg["valves"] > 0).sum()
    # a closure puts at least the segment's own meters and what it cuts off out of water
    # (segments without supply before the closure have nothing to lose)
    live = solved[solved["supplied"] == 1]
    assert (live["meters_out_of_water"] >= live["meters"] + live["cut_off_meters"]).all()
    assert (solved.loc[solved["supplied"] == 0, "meters_out_of_water"] == 0).all()
    assert (solved["customers_affected"]
            == solved["meters_out_of_water"] + solved["meters_low_pressure"]).all()
    ranks = solved["criticality_rank"].sort_values().to_numpy()
    assert np.array_equal(ranks, np.arange(1, len(solved) + 1))
    top = solved.sort_values("criticality_rank").iloc[0]
    assert top["customers_affected"] == solved["customers_affected"].max()
    assert (solved["worst_pressure_drop_psi"] >= 0).all()
    info = pd.DataFrame(gpd.read_file(gpkg, layer="run_info"))
    kv = dict(zip(info["key"], info["value"]))
    assert kv["segments:closures_not_converged"] == "0"
    assert int(kv["segments:count"]) == len(seg)


def test_ids_are_joined_per_segment_in_their_order():
    """The text fields list each segment's ids in network order, ', '-separated, at most the
    listed number and then how many more (hand-made cases)."""
    from gridflow.jobs.segments import _joined

    groups = np.array([2, 0, 2, 2, 0, 4])
    values = np.array(["V7", "V1", "V3", "V9", "V2", "V5"])
    got = _joined(groups, values, 5, most=None)
    assert list(got) == ["V1, V2", "", "V7, V3, V9", "", "V5"]
    got = _joined(groups, values, 5, most=2)
    assert list(got) == ["V1, V2", "", "V7, V3 and 1 more", "", "V5"]
    assert list(_joined(groups[:0], values[:0], 3)) == ["", "", ""]


def test_segment_geometry_made_by_rows_equals_whole():
    """Each segment's mains as one multi-line, in link order, made for any rows asked (a
    batch, a few positions, a mask) the same as for all of them (hand-made case: segment 3
    has no main; link 2 belongs to no segment; link 6 is not drawn)."""
    import shapely

    from gridflow.jobs.segments import _segment_geometry

    lines = shapely.linestrings([[(k, 0, 5.0), (k, 1, 6.0)] for k in range(7)])
    link_segment = np.array([0, 2, -1, 0, 2, 1, 1])
    drawn = np.array([True] * 6 + [False])
    g = _segment_geometry(lines, drawn, link_segment, 4)
    want = [shapely.multilinestrings([lines[0], lines[3]]), shapely.multilinestrings([lines[5]]),
            shapely.multilinestrings([lines[1], lines[4]]), None]
    assert g.present.tolist() == [True, True, True, False]
    assert g.has_z()

    def same(got, exp):
        return all((a is None and b is None) or (a is not None and b is not None and
                                                 shapely.equals_exact(a, b, tolerance=0))
                   for a, b in zip(got, exp, strict=True))

    assert same(g[0:4], want)
    assert same(g[1:3], want[1:3]) and same(g[3:4], [None]) and same(g[2:2], [])
    assert same(g[np.array([3, 0, 2])], [want[3], want[0], want[2]])
    assert same(g.masked(np.array([False, True, False, True])), [None, want[1], None, None])
    assert same(g.masked(), want)
