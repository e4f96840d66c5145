"""The HTML report: well-formed, self-contained, rendered by a real browser, and its grade line
profile equal to the solver's heads.

Fixtures: the Millbrook test network of ``millbrook.py`` solved with gridflow's solver.
"""

from __future__ import annotations

import base64
import itertools
import re
import subprocess
import xml.etree.ElementTree as ET
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import dijkstra

import gridflow.report
from gridflow.errors import ConfigError, GridflowError, OutputError
from gridflow.report import CAUTIONS, ReportData, hgl_profile, write_report
from gridflow.report.geometry import extent, grid_min, raster_lines, skeleton
from gridflow.report.sections import UNNAMED_ZONE, display_zones, zone_codes
from tests.report.cdp import CHROMIUM, Browser
from tests.report.millbrook import SCENARIOS, report_data

FT = 0.3048  # international foot [m] (exact, by definition)
FT_PER_PSI = 2.3067  # feet of water per psi, about 2.31 (common practice; from memory)
LIBRARY = Path(gridflow.report.__file__).parent / "static" / "leaflet"


@pytest.fixture(scope="module")
def run_us():
    data, layers, net = report_data("US")
    results = {s.name: s.result for s in data.scenarios}
    return data, layers, results, net


@pytest.fixture(scope="module")
def report_us(run_us, tmp_path_factory):
    data = run_us[0]
    path = tmp_path_factory.mktemp("rep") / "millbrook_results.html"
    out = write_report(path, data)
    assert out == path
    return path, path.read_text(encoding="utf-8")


def _worst_scenario(results, net):
    """Scenario whose lowest junction pressure is lowest, from the solver's own arrays."""
    junction = ~net.is_fixed
    mins = {s: r.pressure_m[junction & r.supplied].min() for s, r in results.items()}
    return min(mins, key=mins.get)


def _without_scripts(text: str) -> str:
    return re.sub(r"<script[^>]*>.*?</script>", "", text, flags=re.S)


class _Collector(HTMLParser):
    """Collects tags and attributes, and checks open/close nesting of non-void elements."""

    VOID = frozenset({"meta", "img", "br", "hr", "input", "link", "source", "col", "area",
                      "base", "wbr"})

    def __init__(self):
        super().__init__()
        self.stack, self.tags, self.attrs, self.errors = [], [], [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.attrs.extend((tag, k, v or "") for k, v in attrs)
        if tag not in self.VOID:
            self.stack.append(tag)

    def handle_startendtag(self, tag, attrs):
        self.tags.append(tag)
        self.attrs.extend((tag, k, v or "") for k, v in attrs)

    def handle_endtag(self, tag):
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes {self.stack[-1:]}")
        else:
            self.stack.pop()


def _table_rows(root: ET.Element, table_id: str) -> list[dict[str, str]]:
    table = root.find(f".//table[@id='{table_id}']")
    assert table is not None, f"table {table_id} missing"
    rows = []
    for tr in table.find("tbody"):
        rows.append({td.get("data-field"): "".join(td.itertext()) for td in tr})
    return rows


# ------------------------------------------------------------------ structure
def test_html_is_well_formed(report_us):
    _, text = report_us
    root = ET.fromstring(text)  # a strict XML parser: any unclosed or stray tag fails here
    assert root.tag == "html"
    p = _Collector()
    p.feed(text)
    p.close()
    assert p.errors == [] and p.stack == []
    for section in ("summary", "maps", "hgl", "tables", "distribution"):
        assert root.find(f".//section[@id='{section}']") is not None, section


def test_html_is_self_contained(report_us):
    _, text = report_us
    page = _without_scripts(text)
    assert not re.search(r"https?://", page, re.IGNORECASE)
    assert "//" not in re.sub(r"data:image/png;base64,[A-Za-z0-9+/=]+", "", page).replace(
        "<!DOCTYPE html>", "")
    p = _Collector()
    p.feed(text)
    assert "link" not in p.tags and "iframe" not in p.tags
    assert "@import" not in page and "url(" not in page and "@font-face" not in page
    scripts = [(k, v) for tag, k, v in p.attrs if tag == "script"]
    assert not any(k == "src" for k, _ in scripts)  # every script is inline
    # the three scripts: the map data, the vendored library as shipped, the map script
    bodies = re.findall(r"<script[^>]*>(.*?)</script>", text, flags=re.S)
    assert len(bodies) == 3
    assert (LIBRARY / "leaflet.js").read_text(encoding="utf-8").strip() in bodies[1]
    assert "Redistribution and use in source and binary forms" in text  # its licence
    srcs = [v for tag, k, v in p.attrs if k == "src"]
    hrefs = [v for tag, k, v in p.attrs if k == "href"]
    assert len(srcs) == 6  # pressure, flagged pipes, findings, hydrants, profile, histograms
    for s in srcs:
        assert s.startswith("data:image/png;base64,")
        assert base64.b64decode(s.split(",", 1)[1])[:8] == b"\x89PNG\r\n\x1a\n"
    assert hrefs and all(h.startswith("#") for h in hrefs)


def test_cautions_come_first(report_us):
    _, text = report_us
    root = ET.fromstring(text)
    main = root.find(".//main")
    children = [c.tag for c in main]
    assert children[:3] == ["header", "aside", "section"]  # cautions before any result
    caution = "".join(main.find("aside").itertext())
    for c in CAUTIONS:
        assert c in caution
    assert "field flow tests" in caution and "licensed engineers" in caution
    assert "fire authority" in caution


def test_text_is_escaped(report_us):
    _, text = report_us
    assert "Millbrook nightly &amp; test &lt;run&gt;" in text
    assert "<run>" not in text
    assert "closed valve &lt;V-12&gt; isolates" in text  # a finding's message, autoescaped


# ------------------------------------------------------------------ content against the solver
def test_summary_counts(run_us, report_us):
    data, layers, results, net = run_us
    root = ET.fromstring(report_us[1])
    rows = _table_rows(root, "scenarios")
    assert [r["scenario"] for r in rows] == list(SCENARIOS)
    for r in rows:
        res = results[r["scenario"]]
        assert r["iterations"] == str(res.iterations)
        n = layers[f"nodes_{r['scenario']}"]
        assert int(r["low_pressure"]) == int(n["low_pressure"].sum())
        lowest_psi = res.pressure_m[~net.is_fixed].min() / 0.70307  # m of water per psi
        assert float(r["min_p"]) == pytest.approx(lowest_psi, abs=0.06)
    zone_rows = _table_rows(root, "flags-by-zone")
    for s in SCENARIOS:
        total = sum(int(z["high_headloss"]) for z in zone_rows if z["scenario"] == s)
        assert total == int(layers[f"pipes_{s}"]["high_headloss"].sum())
    changes = _table_rows(root, "changes")
    assert sum(int(c["new"]) for c in changes) == 2
    assert sum(int(c["resolved"]) for c in changes) == 1
    crit = {r["criterion"]: float(r["value"]) for r in _table_rows(root, "criteria")}
    assert crit["minimum pressure (low pressure flag)"] == pytest.approx(35.0)  # typed SI in
    routine = {r["kind"]: int(r["count"]) for r in _table_rows(root, "routine")}
    assert routine == data.routine
    kinds = {r["kind"] for r in _table_rows(root, "findings-count")}
    assert kinds == set(layers["findings"]["kind"])


def test_unnamed_zones_grouped(run_us, tmp_path):
    """Parts the GIS names in no zone (automatic zone_<n> names) share one labelled row."""
    data, _, _, net = run_us
    zone = net.zone.astype(object).copy()
    zone[net.node_index(["J-146"])] = "zone_1"
    zone[net.node_index(["J-147"])] = "zone_2"
    scen = [type(s)(s.name, s.network.replace(zone=zone), s.result, s.node_flags, s.pipe_flags)
            for s in data.scenarios]
    d = ReportData(**{**data.__dict__, "scenarios": scen})
    root = ET.fromstring(write_report(tmp_path / "z.html", d).read_text(encoding="utf-8"))
    rows = [r for r in _table_rows(root, "flags-by-zone") if r["scenario"] == "avg_day"]
    assert [r["zone"] for r in rows] == ["east", "west", UNNAMED_ZONE]  # named first
    assert int(rows[-1]["nodes"]) == 2
    assert sum(int(r["nodes"]) for r in rows) == net.n_nodes
    assert "automatic name" in "".join(root.find(".//section[@id='summary']").itertext())


def test_worst_nodes_and_fastest_mains(run_us, report_us):
    _data, _layers, results, net = run_us
    root = ET.fromstring(report_us[1])
    junction = ~net.is_fixed
    p = np.vstack([np.where(junction, r.pressure_m, np.inf) for r in results.values()])
    per_node = p.min(axis=0)
    order = np.argsort(per_node, kind="stable")[:10]
    worst = _table_rows(root, "worst-nodes")
    assert len(worst) == 10
    assert [w["node_id"] for w in worst] == list(net.node_id[order])
    assert worst[0]["scenario"] == list(results)[int(np.argmin(p[:, order[0]]))]

    v = np.vstack([np.abs(r.velocity_ms) for r in results.values()]).max(axis=0)
    fast = _table_rows(root, "fastest-mains")
    assert fast[0]["pipe_id"] == net.link_id[int(np.argmax(v))]
    assert float(fast[0]["_speed"]) == pytest.approx(v.max() / FT, abs=0.006)
    speeds = [float(f["_speed"]) for f in fast]
    assert speeds == sorted(speeds, reverse=True)


def test_failing_hydrants_table(run_us, report_us):
    _, layers, _, _ = run_us
    root = ET.fromstring(report_us[1])
    hyd = layers["hydrants_fireflow"]
    failing = set(hyd.loc[hyd["available_flow_gpm"] < hyd["required_flow_gpm"], "hydrant_id"])
    rows = _table_rows(root, "failing-hydrants")
    assert {r["hydrant_id"] for r in rows} == failing and len(failing) > 0
    ratio = [float(r["available_flow_gpm"].replace(",", ""))
             / float(r["required_flow_gpm"].replace(",", "")) for r in rows]
    assert ratio == sorted(ratio)


# ------------------------------------------------------------------ the grade line profile
def test_default_profile_equals_solver_heads(run_us):
    data, _, results, net = run_us
    worst = _worst_scenario(results, net)
    r = results[worst]
    prof = hgl_profile(net, r, "US")
    idx = net.node_index(prof["node_id"].to_numpy())
    # ends: a fixed-head node, and the lowest-pressure supplied junction
    assert net.is_fixed[idx[0]]
    junction = ~net.is_fixed & r.supplied
    assert idx[-1] == np.flatnonzero(junction)[np.argmin(r.pressure_m[junction])]
    # values: the solver's heads and elevations, converted to feet
    np.testing.assert_allclose(prof["head_ft"], r.head_m[idx] / FT, rtol=0, atol=1e-9)
    np.testing.assert_allclose(prof["elevation_ft"], net.elevation_m[idx] / FT, atol=1e-9)
    np.testing.assert_allclose(prof["head_ft"] - prof["elevation_ft"],
                               prof["pressure_psi"] * FT_PER_PSI, atol=0.01)
    # the path is a shortest one from the nearest source (a separate Dijkstra run)
    g = coo_matrix((net.length_m, (net.from_idx, net.to_idx)),
                   shape=(net.n_nodes, net.n_nodes)).tocsr()
    dist = dijkstra(g, directed=False, indices=np.flatnonzero(net.is_fixed)).min(axis=0)
    assert prof["distance_ft"].iloc[-1] == pytest.approx(dist[idx[-1]] / FT, rel=1e-12)
    # consecutive path nodes are joined by the pipe named in the row
    lk = net.link_index(prof["pipe_id"].iloc[1:].to_numpy())
    ends = {frozenset(e) for e in zip(net.from_idx[lk], net.to_idx[lk])}
    assert ends == {frozenset(e) for e in itertools.pairwise(idx)}
    np.testing.assert_allclose(np.diff(prof["distance_ft"]), net.length_m[lk] / FT)


def test_profile_rating_limit(run_us):
    data, layers, results, net = run_us
    pipes = layers["pipes_peak_hour"]
    prof = hgl_profile(net, results["peak_hour"], "US", ["SRC-1", "J-147"],
                       pressure_rating_m=data.pressure_rating_m)
    rating = pipes.set_index("pipe_id")["pressure_rating_psi"]
    seg = rating.reindex(prof["pipe_id"].iloc[1:]).to_numpy()
    lowest = np.fmin(np.r_[np.nan, seg], np.r_[seg, np.nan])
    expected = prof["elevation_ft"] + lowest * FT_PER_PSI
    np.testing.assert_allclose(prof["rating_head_ft"], expected, rtol=2e-4)
    assert np.isfinite(prof["rating_head_ft"]).all()


def test_configured_path_and_report_table(run_us, tmp_path):
    data, _, results, net = run_us
    d = ReportData(**{**data.__dict__, "hgl_path": ["SRC-1", "J-120", "J-147"]})
    path = write_report(tmp_path / "r.html", d)
    root = ET.fromstring(path.read_text(encoding="utf-8"))
    rows = _table_rows(root, "hgl-profile")
    ids = [r["node_id"] for r in rows]
    assert ids[0] == "SRC-1" and ids[-1] == "J-147" and "J-120" in ids
    worst = _worst_scenario(results, net)
    heads = np.array([float(r["head_ft"].replace(",", "")) for r in rows])
    np.testing.assert_allclose(heads, results[worst].head_m[net.node_index(ids)] / FT,
                               atol=5e-4)  # printed to 3 decimals


def test_profile_bad_path(run_us, tmp_path):
    data, _, results, net = run_us
    r = results["avg_day"]
    with pytest.raises(ConfigError, match="HGL path node 'NOPE' is not a node of the network"):
        hgl_profile(net, r, "US", ["SRC-1", "NOPE"])
    closed = r.link_state.copy()
    closed[net.link_index(["M-2082"])] = 1  # the tank's only main
    from dataclasses import replace

    with pytest.raises(ConfigError, match="'SRC-1' and 'TNK-1' are not connected"):
        hgl_profile(net, replace(r, link_state=closed), "US", ["SRC-1", "TNK-1"])
    # in the report, a bad path is explained in the profile section; the rest is written
    d = ReportData(**{**data.__dict__, "hgl_path": ["NOPE", "J-100"]})
    text = write_report(tmp_path / "b.html", d).read_text(encoding="utf-8")
    root = ET.fromstring(text)
    hgl = "".join(root.find(".//section[@id='hgl']").itertext())
    assert "No profile could be drawn" in hgl and "NOPE" in hgl
    assert root.find(".//table[@id='worst-nodes']") is not None


# ------------------------------------------------------------------ units, errors, output
def test_si_report(tmp_path):
    data, _, net = report_data("SI", changes=None)
    results = {s.name: s.result for s in data.scenarios}
    path = write_report(tmp_path / "si.html", data)
    text = path.read_text(encoding="utf-8")
    root = ET.fromstring(text)
    assert "pressure [kPa]" in text and "[psi]" not in text
    assert "No previous run was given" in text
    crit = {r["criterion"]: float(r["value"]) for r in _table_rows(root, "criteria")}
    # 35 psi = 241.3 kPa (1 psi = 6.894757 kPa, NIST SP 811)
    assert crit["minimum pressure (low pressure flag)"] == pytest.approx(241.32, abs=0.01)
    worst = _worst_scenario(results, net)
    prof = hgl_profile(net, results[worst], "SI")
    np.testing.assert_allclose(prof["head_m"], results[worst].head_m[
        net.node_index(prof["node_id"].to_numpy())], atol=1e-12)
    rows = _table_rows(root, "hgl-profile")
    assert [r["node_id"] for r in rows] == list(prof["node_id"])


def test_layout_mismatch_is_named(run_us):
    data, _, _, net = run_us
    s0, s1 = data.scenarios[:2]
    short = net.replace(zone=net.zone)  # same layout: accepted
    ReportData(scenarios=[s0, type(s1)(s1.name, short, s1.result, s1.node_flags,
                                       s1.pipe_flags)], criteria=data.criteria)
    with pytest.raises(GridflowError, match="node coordinates have shape"):
        ReportData(scenarios=[s0], criteria=data.criteria, node_xy=np.zeros((3, 2)))
    with pytest.raises(GridflowError, match="at least one solved scenario"):
        ReportData(scenarios=[], criteria=data.criteria)


def test_output_is_atomic(run_us, tmp_path):
    data = run_us[0]
    with pytest.raises(OutputError, match="cannot write the report"):
        write_report(tmp_path / "missing" / "r.html", data)
    target = tmp_path / "r.html"
    target.write_text("last night's report")
    write_report(target, data)
    assert target.read_text(encoding="utf-8").startswith("<!DOCTYPE html>")
    assert [p.name for p in tmp_path.iterdir()] == ["r.html"]  # no temporary file left


def test_sparse_layers(run_us, tmp_path):
    """One scenario, unsupplied nodes, no hydrants or findings, no changes, no coordinates."""
    data, _, _, net = run_us
    s = data.scenarios[0]
    from dataclasses import replace

    cut = net.node_index(["J-146", "J-147"])
    sup = s.result.supplied.copy()
    sup[cut] = False
    pres = s.result.pressure_m.copy()
    pres[cut] = np.nan
    r = replace(s.result, supplied=sup, pressure_m=pres)
    one = type(s).solved("only", s.network, r, data.criteria)
    d = ReportData(scenarios=[one], criteria=data.criteria, findings=data.findings.iloc[:0],
                   hydrants=data.hydrants.iloc[:0])
    text = write_report(tmp_path / "s.html", d).read_text(encoding="utf-8")
    root = ET.fromstring(text)
    assert "Not supplied in only (2): J-146, J-147" in text
    assert [r["scenario"] for r in _table_rows(root, "scenarios")] == ["only"]
    assert _table_rows(root, "failing-hydrants") == [{None: "none"}]
    ids = {r["node_id"] for r in _table_rows(root, "worst-nodes")}
    assert not ids & {"J-146", "J-147"}
    assert "no maps" in text and 'id="gf-map"' not in text


# ------------------------------------------------------------------ map geometry at scale
def test_grid_aggregation_matches_pandas():
    """Cells' counts and lowest values equal a pandas group-by of the same cells."""
    rng = np.random.default_rng(7)
    xy = rng.uniform([0, 0], [5000, 3000], size=(20_000, 2))
    v = rng.normal(60, 10, size=20_000)
    v[::97] = np.nan
    g = grid_min(xy, v, (0.0, 0.0, 5000.0, 3000.0), cells=50)
    size = 5000 / 50
    ref = pd.DataFrame({"i": np.floor(xy[:, 0] / size).astype(int),
                        "j": np.floor(xy[:, 1] / size).astype(int),
                        "v": np.where(np.isnan(v), np.inf, v)}).groupby(["i", "j"])["v"]
    got = pd.DataFrame({"i": np.round(g.x0 / size).astype(int),
                        "j": np.round(g.y0 / size).astype(int),
                        "n": g.count, "v": g.worst}).set_index(["i", "j"]).sort_index()
    np.testing.assert_array_equal(got["n"].to_numpy(), ref.size().sort_index().to_numpy())
    np.testing.assert_allclose(got["v"].to_numpy(), ref.min().sort_index().to_numpy())
    assert g.count.sum() == len(xy)


def test_grid_aggregation_outside_the_extent_matches_pandas():
    """Points beyond the extent (keys out of the dense grid) are aggregated the same way as a
    pandas group-by of their cells; the extent's far edge falls in the last cell."""
    rng = np.random.default_rng(11)
    xy = rng.uniform([-900, -300], [5600, 3400], size=(5_000, 2))
    xy[:4] = [[5000.0, 3000.0], [0.0, 0.0], [5000.0, 0.0], [0.0, 3000.0]]
    v = rng.normal(60, 10, size=len(xy))
    v[::13] = np.nan
    size = 5000 / 40
    for pts in (xy, xy[(xy >= 0).all(axis=1) & (xy <= [5000, 3000]).all(axis=1)]):
        vals = v[:len(pts)]
        g = grid_min(pts, vals, (0.0, 0.0, 5000.0, 3000.0), cells=40)
        ref = pd.DataFrame({"i": np.floor(pts[:, 0] / size).astype(int),
                            "j": np.floor(pts[:, 1] / size).astype(int),
                            "v": np.where(np.isnan(vals), np.inf, vals)}).groupby(["i", "j"])
        got = pd.DataFrame({"i": np.round(g.x0 / size).astype(int),
                            "j": np.round(g.y0 / size).astype(int),
                            "n": g.count, "v": g.worst})
        # cells listed column by column, rows ascending within a column
        assert got.set_index(["i", "j"]).index.is_monotonic_increasing
        got = got.set_index(["i", "j"])
        np.testing.assert_array_equal(got["n"].to_numpy(), ref["v"].size().to_numpy())
        np.testing.assert_array_equal(got["v"].to_numpy(), ref["v"].min().to_numpy())


def test_zone_codes_match_per_node_names():
    """Zone codes worked out per distinct zone equal the per-node names sorted and numbered
    (``np.unique`` of :func:`display_zones` over every node)."""
    rng = np.random.default_rng(3)
    pool = np.array(["North", "zone_4", "", None, float("nan"), "zone_12", "South",
                     "zone_x", "Hill zone_2"], dtype=object)
    zone = pool[rng.integers(0, len(pool), size=2_000)]
    names, code = zone_codes(zone)
    ref_names, ref_code = np.unique(display_zones(zone).astype(str), return_inverse=True)
    np.testing.assert_array_equal(names, ref_names)
    np.testing.assert_array_equal(code, ref_code)
    assert UNNAMED_ZONE in names and "zone_4" not in names and "zone_x" in names


def test_shortest_link_per_node_pair_matches_a_full_sort():
    """One link per node pair, the shortest and the first of equally short ones, in pair
    order: the same positions as a stable sort by pair and length (``np.lexsort``)."""
    from gridflow.report.profile import _shortest_per_pair

    rng = np.random.default_rng(5)
    for n_links, n_pairs in ((3_000, 400), (500, 10_000), (0, 1)):
        pair = rng.integers(0, n_pairs, size=n_links)
        w = rng.choice([10.0, 12.5, 30.0, 0.0], size=n_links)  # many ties
        order = np.lexsort((w, pair))
        first = np.r_[True, pair[order][1:] != pair[order][:-1]] if n_links else []
        np.testing.assert_array_equal(_shortest_per_pair(pair, w), order[first])


def test_extent_of_the_finite_points():
    """The extent is the bounds of the rows whose coordinates are both finite (a plain
    row filter and column minimum/maximum); no such row: the unit square."""
    rng = np.random.default_rng(9)
    xy = rng.uniform(-50, 900, size=(1_000, 2))
    xy[::7, 0] = np.nan
    xy[::11, 1] = np.inf
    xy[3] = [-1e6, np.nan]  # outside, but not a finite point
    ok = np.isfinite(xy).all(axis=1)
    ref = (*xy[ok].min(axis=0), *xy[ok].max(axis=0))
    assert extent(xy) == tuple(float(v) for v in ref)
    assert extent(xy[ok]) == extent(xy)
    assert extent(np.full((4, 2), np.nan)) == (0.0, 0.0, 1.0, 1.0)
    assert extent(np.zeros((0, 2))) == (0.0, 0.0, 1.0, 1.0)


def test_skeleton_keeps_the_widest_mains():
    d = np.r_[np.full(50, 0.15), np.full(10, 0.6), np.full(40, 0.2)]
    idx = skeleton(d, budget=30)
    assert len(idx) == 30 and set(range(50, 60)) <= set(idx)
    assert np.all(d[idx] >= 0.2)
    assert list(skeleton(d, budget=200)) == list(range(100))
    assert 3 in skeleton(d, keep=np.arange(100) == 3, budget=30)


def test_raster_lines_follow_the_segments():
    """Every burnt pixel lies on its segment (distance by shapely), and each segment burns at
    least one pixel per pixel of its longer extent."""
    import shapely

    rng = np.random.default_rng(11)
    a = rng.uniform(0, 1000, size=(40, 2))
    b = a + rng.normal(0, 150, size=(40, 2))
    ext = (min(a[:, 0].min(), b[:, 0].min()), min(a[:, 1].min(), b[:, 1].min()),
           max(a[:, 0].max(), b[:, 0].max()), max(a[:, 1].max(), b[:, 1].max()))
    for k in range(len(a)):
        img, size = raster_lines(a[k:k + 1], b[k:k + 1], ext, width=300)
        j, i = np.nonzero(img)
        centres = shapely.points(ext[0] + (i + 0.5) * size, ext[1] + (j + 0.5) * size)
        line = shapely.LineString([a[k], b[k]])
        assert shapely.distance(centres, line).max() <= size * np.sqrt(0.5) + 1e-9
        assert len(i) >= np.abs((b[k] - a[k]) / size).max() - 1


# ------------------------------------------------------------------ a real browser
def _browser(tmp_path) -> Browser:
    if not CHROMIUM.exists():
        pytest.fail(f"{CHROMIUM} is missing: the report must be checked in a real headless "
                    "browser. Install Debian's package: apt-get install -y chromium")
    return Browser(tmp_path / "profile", width=1280, height=1000)


def test_browser_renders_report(report_us, tmp_path):
    html_path, _ = report_us
    png = tmp_path / "shot.png"
    cmd = [str(CHROMIUM), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
           "--no-first-run", "--disable-background-networking", "--disable-component-update",
           "--disable-sync", f"--user-data-dir={tmp_path / 'profile'}", f"--screenshot={png}",
           "--window-size=1280,2000", f"file://{html_path}"]
    if not CHROMIUM.exists():
        pytest.fail(f"{CHROMIUM} is missing")
    proc = subprocess.run(cmd, check=False, capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0 and png.exists(), proc.stderr[-2000:]
    import matplotlib.image as mpimg

    rgb = np.round(mpimg.imread(png)[..., :3] * 255).astype(np.uint8)
    assert rgb.shape[:2] == (2000, 1280)
    non_white = (rgb < 245).any(axis=-1).mean()
    distinct = len(np.unique(rgb.reshape(-1, 3), axis=0))
    assert non_white > 0.05, f"screenshot is nearly blank ({non_white:.1%} non-white)"
    assert distinct > 200, f"screenshot has only {distinct} colours"
    # the caution box's border colour (#b8323f) is drawn: the inline CSS was applied
    border = (np.abs(rgb.astype(int) - [0xB8, 0x32, 0x3F]).sum(axis=-1) < 12).sum()
    assert border > 500


def test_browser_interactive_map(run_us, report_us, tmp_path):
    """Open the map, switch to the peak-hour pressure layer, click a low-pressure node, read
    its popup against the solver, and check that the page fetched nothing."""
    _data, _, results, net = run_us
    html_path, _ = report_us
    b = _browser(tmp_path)
    try:
        for domain in ("Network", "Page", "Runtime"):
            b.page(f"{domain}.enable")
        b.page("Page.navigate", url=html_path.as_uri())
        b.wait_event("Page.loadEventFired")
        assert b.js("typeof window.gridflowMap") == "object"
        b.js("document.getElementById('gf-map').scrollIntoView({block: 'start'})")
        # switch layers with real clicks on the layer control's labels
        for label in ("Pressure: peak_hour", "Fire-flow classes"):
            box = b.js(f"""(() => {{
                const l = [...document.querySelectorAll('.leaflet-control-layers label')]
                  .find(e => e.textContent.trim() === {label!r});
                const r = l.querySelector('input').getBoundingClientRect();
                return [r.x + r.width / 2, r.y + r.height / 2]; }})()""")
            b.click(*box)
        checked = b.js("""[...document.querySelectorAll('.leaflet-control-layers label')]
            .filter(e => e.querySelector('input').checked).map(e => e.textContent.trim())""")
        assert "Pressure: peak_hour" in checked and "Fire-flow classes" in checked
        assert "Pressure: avg_day" not in checked
        # a node flagged for low pressure at peak hour, brought into view, then clicked
        node = b.js("gridflowMap.flaggedNode('peak_hour')")
        r = results["peak_hour"]
        i = int(net.node_index([node])[0])
        assert r.pressure_m[i] < 35 * 0.70307  # below 35 psi (m of water per psi)
        xy = b.js(f"""(() => {{
            const m = gridflowMap.nodeMarker('peak_hour', {node!r});
            gridflowMap.map.setView(m.getLatLng(), 2, {{animate: false}});
            const p = gridflowMap.map.latLngToContainerPoint(m.getLatLng());
            const r = document.getElementById('gf-map').getBoundingClientRect();
            return [r.x + p.x, r.y + p.y]; }})()""")
        b.click(*xy)
        pop = b.js("""(() => {
            const p = document.querySelector('.leaflet-popup-content .gf-pop');
            if (!p) return null;
            const v = {};
            p.querySelectorAll('td[data-scenario]').forEach(
              td => { v[td.dataset.field + ':' + td.dataset.scenario] = td.textContent; });
            return {id: p.dataset.id, kind: p.dataset.kind, values: v}; })()""")
        assert pop is not None, "no popup opened by the click"
        assert pop["kind"] == "node" and pop["id"] == node
        for s, res in results.items():
            psi = res.pressure_m[i] / 0.70307
            assert float(pop["values"][f"pressure:{s}"]) == pytest.approx(psi, abs=0.051)
            assert float(pop["values"][f"head:{s}"]) == pytest.approx(res.head_m[i] / FT,
                                                                      abs=0.051)
        assert "low pressure" in pop["values"]["flags:peak_hour"]
        errors = [e for e in b.log if e.get("method") == "Runtime.exceptionThrown"]
        assert errors == []
        urls = [e["params"]["request"]["url"] for e in b.log
                if e.get("method") == "Network.requestWillBeSent"]
        assert urls and urls[0] == html_path.as_uri()
        others = [u for u in urls[1:] if not u.startswith("data:image/png;base64,")]
        assert others == [], f"the page fetched {others}"
    finally:
        b.close()


def _segments_frame(data, net):
    """Two invented valve segments over the test town's mains: one whose closure cuts off
    others, one oversized; geometry from the network's node coordinates."""
    import geopandas as gpd
    import shapely

    xy = np.asarray(data.node_xy)
    parts = [shapely.linestrings(xy[[net.from_idx[k], net.to_idx[k]]]) for k in range(4)]
    geoms = [shapely.multilinestrings(parts[:2]), shapely.multilinestrings(parts[2:])]
    return gpd.GeoDataFrame({
        "segment_id": ["SEG-1", "SEG-2"], "valve_ids": ["V1, V2", "V3"], "valves": [2, 1],
        "length_ft": [500.0, 2400.0], "meters": [3, 140], "cut_off_segments": [2, 0],
        "cut_off_meters": [9, 0], "oversized": [0, 1], "cannot_isolate": [0, 0],
        "meters_out_of_water": [12.0, 140.0], "meters_low_pressure": [0.0, 4.0],
        "criticality_rank": [2.0, 1.0]}, geometry=geoms, crs="EPSG:26918"), parts


def test_map_payload_carries_segments_to_look_at(run_us):
    """The map's segment layer: each segment's lines are its geometry shifted to the map's
    origin (simplified by at most 2 m), and its kind says why it is shown."""
    from dataclasses import replace

    from gridflow.report.interactive import map_payload

    data, _, _, net = run_us
    frame, parts = _segments_frame(data, net)
    payload = map_payload(replace(data, segments=frame))
    seg = payload["segments"]
    assert seg["id"] == ["SEG-1", "SEG-2"] and seg["kind"] == ["cuts_off", "oversized"]
    x0, y0 = np.asarray(data.node_xy).min(axis=0)
    for k, lines in enumerate(seg["lines"]):
        want = np.vstack([np.asarray(p.coords) for p in parts[2 * k:2 * k + 2]]) - [x0, y0]
        got = np.vstack([np.reshape(line, (-1, 2)) for line in lines])
        assert np.abs(got - want).max() <= 2.05
    assert payload["flowTests"] is None  # none mapped: no layer


def test_map_payload_same_with_only_the_drawn_segments_geometry(run_us):
    """A large run hands the report the segments' fields with geometry for the segments the
    map draws only (None elsewhere): the map's segment layer is the same as with all of it."""
    from dataclasses import replace

    from gridflow.report.interactive import MAX_MAP_SEGMENTS, map_payload, segments_to_draw

    data, _, _, net = run_us
    frame, _ = _segments_frame(data, net)
    n = MAX_MAP_SEGMENTS + 40  # more segments than the map draws
    many = frame.iloc[np.arange(n) % 2].reset_index(drop=True)
    many["segment_id"] = [f"SEG-{k}" for k in range(n)]
    many["criticality_rank"] = np.arange(n, 0, -1, dtype=float)
    many["cut_off_segments"] = np.where(np.arange(n) % 5 == 0, 1, 0)
    many["oversized"] = 0
    whole = map_payload(replace(data, segments=many))["segments"]
    drawn = segments_to_draw(many, np.ones(n, bool))
    assert len(drawn) == MAX_MAP_SEGMENTS and whole["id"] == many["segment_id"][drawn].tolist()
    sparse = many.copy()
    keep = np.zeros(n, bool)
    keep[drawn] = True
    sparse.loc[~keep, "geometry"] = None
    assert map_payload(replace(data, segments=sparse))["segments"] == whole


def test_browser_map_draws_the_segment_layer(run_us, tmp_path):
    """With segments, the map offers their layer; turning it on and opening a segment's
    popup works without a script error."""
    from dataclasses import replace

    data, _, _, net = run_us
    frame, _ = _segments_frame(data, net)
    html_path = write_report(tmp_path / "seg.html", replace(data, segments=frame))
    b = _browser(tmp_path)
    try:
        for domain in ("Page", "Runtime"):
            b.page(f"{domain}.enable")
        b.page("Page.navigate", url=html_path.as_uri())
        b.wait_event("Page.loadEventFired")
        labels = b.js("""[...document.querySelectorAll('.leaflet-control-layers label')]
            .map(e => e.textContent.trim())""")
        assert "Valve segments to look at" in labels
        pop = b.js("""(() => {
            const g = gridflowMap.layers.overlays['Valve segments to look at'];
            g.addTo(gridflowMap.map);
            const line = g.getLayers()[0];
            line.openPopup();
            const p = document.querySelector('.leaflet-popup-content .gf-pop');
            return p ? [p.dataset.kind, p.dataset.id, p.textContent] : null; })()""")
        assert pop is not None and pop[0] == "segment" and pop[1] == "SEG-1"
        assert "cuts off other customers" in pop[2]
        errors = [e for e in b.log if e.get("method") == "Runtime.exceptionThrown"]
        assert errors == []
    finally:
        b.close()


def test_fire_tables_count_in_service_hydrants_and_limiting_nodes():
    import pandas as pd

    from gridflow.report.fireflow import in_service, limiting_nodes_table

    hyd = pd.DataFrame({
        "hydrant_id": ["H1", "H2", "H3", "H4", "H5"],
        "zone": ["N", "N", "N", "S", "N"],
        "in_service": [1, 1, 1, 1, 0],
        "limited_by": ["node_pressure", "node_pressure", "residual", "node_pressure",
                       "out_of_service"],
        "limiting_node_id": ["J7", "J7", "J1", "J9", ""],
    })
    ins = in_service(hyd)
    assert ins is not None and ins["hydrant_id"].tolist() == ["H1", "H2", "H3", "H4"]

    class D:
        hydrants = ins

    table = limiting_nodes_table(D())  # type: ignore[arg-type]
    assert table is not None
    assert table.frame[["zone", "limiting_node_id", "hydrants"]].values.tolist() == [
        ["N", "J7", 2], ["S", "J9", 1]]
    assert table.frame["hydrant_ids"].iloc[0] == "H1, H2"
