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

from gridflow.errors import ConfigError, GridflowError, OutputError
from gridflow.report import CAUTIONS, hgl_profile, write_report
from tests.report.millbrook import SCENARIOS, build_layers

CHROMIUM = Path("/usr/bin/chromium")
FT = 0.3048  # international foot [m] (exact, by definition)
FT_PER_PSI = 2.3067  # feet of water per psi, about 2.31 (common practice; from memory)
CRITERIA = {"min_pressure": "35 psi", "max_pressure": "80 psi", "max_velocity": "5 ft/s",
            "fire_residual_pressure": "20 psi"}


@pytest.fixture(scope="module")
def run_us():
    layers, results, net = build_layers("US")
    return layers, results, net


@pytest.fixture(scope="module")
def report_us(run_us, tmp_path_factory):
    layers, _, _ = run_us
    path = tmp_path_factory.mktemp("rep") / "millbrook_results.html"
    info = [tuple(r) for r in layers["run_info"].itertuples(index=False)]
    out = write_report(path, layers, info, units="US", criteria=CRITERIA, worst_rows=10)
    assert out == path
    return path, path.read_text(encoding="utf-8")


def _worst_scenario(results, net):
    """Scenario whose lowest junction pressure is lowest, from the solver's own arrays."""
    junction = ~net.is_fixed
    mins = {s: r.pressure_m[junction & r.supplied].min() for s, r in results.items()}
    return min(mins, key=mins.get)


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
    assert not re.search(r"https?://", text, re.IGNORECASE)
    assert "//" not in re.sub(r"data:image/png;base64,[A-Za-z0-9+/=]+", "", text).replace(
        "<!DOCTYPE html>", "")
    p = _Collector()
    p.feed(text)
    assert "script" not in p.tags and "link" not in p.tags and "iframe" not in p.tags
    assert "@import" not in text and "url(" not in text and "@font-face" not in text
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


# ------------------------------------------------------------------ content against the solver
def test_summary_counts(run_us, report_us):
    layers, results, net = run_us
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


def test_worst_nodes_and_fastest_mains(run_us, report_us):
    _layers, results, net = run_us
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
    layers, _, _ = run_us
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
    layers, results, net = run_us
    worst = _worst_scenario(results, net)
    r = results[worst]
    prof = hgl_profile(layers[f"nodes_{worst}"], layers[f"pipes_{worst}"], None)
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
    # the path is a shortest one from the nearest source (scipy's Dijkstra, not networkx)
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
    layers, _results, _net = run_us
    pipes = layers["pipes_peak_hour"]
    prof = hgl_profile(layers["nodes_peak_hour"], pipes, ["SRC-1", "J-147"])
    rating = pipes.set_index("pipe_id")["pressure_rating_psi"]
    seg = rating.reindex(prof["pipe_id"].iloc[1:]).to_numpy()
    lowest = np.fmin(np.r_[np.nan, seg], np.r_[seg, np.nan])
    expected = prof["elevation_ft"] + lowest * FT_PER_PSI
    np.testing.assert_allclose(prof["rating_head_ft"], expected, rtol=2e-4)
    assert np.isfinite(prof["rating_head_ft"]).all()


def test_configured_path_and_report_table(run_us, tmp_path):
    layers, results, net = run_us
    info = [tuple(r) for r in layers["run_info"].itertuples(index=False)]
    path = write_report(tmp_path / "r.html", layers, info, hgl_path=["SRC-1", "J-120", "J-147"],
                        criteria=CRITERIA)
    root = ET.fromstring(path.read_text(encoding="utf-8"))
    rows = _table_rows(root, "hgl-profile")
    ids = [r["node_id"] for r in rows]
    assert ids[0] == "SRC-1" and ids[-1] == "J-147" and "J-120" in ids
    worst = _worst_scenario(results, net)
    heads = np.array([float(r["head_ft"].replace(",", "")) for r in rows])
    np.testing.assert_allclose(heads, results[worst].head_m[net.node_index(ids)] / FT,
                               atol=5e-4)  # printed to 3 decimals


def test_profile_bad_path(run_us, tmp_path):
    layers, _, _ = run_us
    with pytest.raises(ConfigError, match="HGL path node 'NOPE' is not a node of the network"):
        hgl_profile(layers["nodes_avg_day"], layers["pipes_avg_day"], ["SRC-1", "NOPE"])
    closed = layers["pipes_avg_day"].copy()
    closed.loc[closed["pipe_id"] == "M-2082", "status"] = "closed"  # the tank's only main
    with pytest.raises(ConfigError, match="'SRC-1' and 'TNK-1' are not connected"):
        hgl_profile(layers["nodes_avg_day"], closed, ["SRC-1", "TNK-1"])
    # in the report, a bad path is explained in the profile section; the rest is written
    info = [("name", "bad path")]
    text = write_report(tmp_path / "b.html", layers, info, hgl_path=["NOPE", "J-100"]
                        ).read_text(encoding="utf-8")
    root = ET.fromstring(text)
    hgl = "".join(root.find(".//section[@id='hgl']").itertext())
    assert "No profile could be drawn" in hgl and "NOPE" in hgl
    assert root.find(".//table[@id='worst-nodes']") is not None


# ------------------------------------------------------------------ units, errors, output
def test_si_report(tmp_path):
    layers, results, net = build_layers("SI")
    layers.pop("changes")
    path = write_report(tmp_path / "si.html", layers, [("unit_system", "SI")], units="SI",
                        criteria={"min_pressure": "240 kPa"})
    text = path.read_text(encoding="utf-8")
    root = ET.fromstring(text)
    assert "pressure [kPa]" in text and "[psi]" not in text
    assert "No previous run was given" in text
    worst = _worst_scenario(results, net)
    prof = hgl_profile(layers[f"nodes_{worst}"], layers[f"pipes_{worst}"], None)
    np.testing.assert_allclose(prof["head_m"], results[worst].head_m[
        net.node_index(prof["node_id"].to_numpy())], atol=1e-12)
    rows = _table_rows(root, "hgl-profile")
    assert [r["node_id"] for r in rows] == list(prof["node_id"])


def test_missing_field_is_named(run_us, tmp_path):
    layers, _, _ = run_us
    bad = dict(layers)
    bad["nodes_avg_day"] = layers["nodes_avg_day"].drop(columns="pressure_psi")
    with pytest.raises(GridflowError, match="layer nodes_avg_day lacks field pressure_psi"):
        write_report(tmp_path / "x.html", bad, [])
    assert list(tmp_path.iterdir()) == []
    with pytest.raises(GridflowError, match="no pipes_solo"):
        write_report(tmp_path / "y.html", {"nodes_solo": layers["nodes_avg_day"]}, [])


def test_output_is_atomic(run_us, tmp_path):
    layers, _, _ = run_us
    with pytest.raises(OutputError, match="cannot write the report"):
        write_report(tmp_path / "missing" / "r.html", layers, [])
    target = tmp_path / "r.html"
    target.write_text("last night's report")
    write_report(target, layers, [])
    assert target.read_text(encoding="utf-8").startswith("<!DOCTYPE html>")
    assert [p.name for p in tmp_path.iterdir()] == ["r.html"]  # no temporary file left


# ------------------------------------------------------------------ a real browser
def test_browser_renders_report(report_us, tmp_path):
    if not CHROMIUM.exists():
        pytest.fail(f"{CHROMIUM} is missing: the report must be checked in a real headless "
                    "browser. Install Debian's package: apt-get install -y chromium")
    html_path, _ = report_us
    png = tmp_path / "shot.png"
    cmd = [str(CHROMIUM), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
           "--no-first-run", "--disable-background-networking", "--disable-component-update",
           "--disable-sync", f"--user-data-dir={tmp_path / 'profile'}", f"--screenshot={png}",
           "--window-size=1280,2000", f"file://{html_path}"]
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


def test_sparse_layers(run_us, tmp_path):
    """One scenario, unsupplied nodes, no hydrants or findings located, no changes layer."""
    layers, _, _ = run_us
    nodes = layers["nodes_avg_day"].copy()
    cut = nodes["node_id"].isin(["J-146", "J-147"])
    nodes.loc[cut, ["supplied", "head_ft", "pressure_psi"]] = [0, np.nan, np.nan]
    findings = layers["findings"].iloc[:0]
    hyd = layers["hydrants_fireflow"].iloc[:0]
    text = write_report(tmp_path / "s.html", {"nodes_only": nodes,
                                              "pipes_only": layers["pipes_avg_day"],
                                              "findings": findings, "hydrants_fireflow": hyd},
                        []).read_text(encoding="utf-8")
    root = ET.fromstring(text)
    assert "Not supplied in only (2): J-146, J-147" in text
    assert [r["scenario"] for r in _table_rows(root, "scenarios")] == ["only"]
    assert _table_rows(root, "failing-hydrants") == [{None: "none"}]
    ids = {r["node_id"] for r in _table_rows(root, "worst-nodes")}
    assert not ids & {"J-146", "J-147"}


def test_fire_tables_count_in_service_hydrants_and_limiting_nodes():
    from gridflow.report.document import _in_service, _limiting_nodes

    hyd = pd.DataFrame({
        "hydrant_id": ["H1", "H2", "H3", "H4", "H5"],
        "zone": ["N", "N", "N", "S", "N"],
        "in_service": [1, 1, 1, 1, 0],
        "limited_by": ["node_pressure", "node_pressure", "residual", "node_pressure",
                       "out_of_service"],
        "limiting_node_id": ["J7", "J7", "J1", "J9", ""],
    })
    ins = _in_service(hyd)
    assert ins["hydrant_id"].tolist() == ["H1", "H2", "H3", "H4"]
    table = _limiting_nodes(ins)
    assert table[["zone", "limiting_node_id", "hydrants"]].values.tolist() == [
        ["N", "J7", 2], ["S", "J9", 1]]
    assert table["hydrant_ids"].iloc[0] == "H1, H2"
