"""The Python interface on the Millbrook sample: the same numbers as ``gridflow run``, changes
that do exactly what the config's keys do, a graph with one edge per cleaned link, typed errors.
"""

from __future__ import annotations

import re
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pytest
from click.testing import CliRunner

import gridflow
from gridflow.cli.main import cli

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_gis"


def _config(tmp: Path, extra: str = "", *, fireflow: bool = True) -> Path:
    """The sample config with absolute input paths, optionally with text appended."""
    text = (SAMPLE / "millbrook.toml").read_text()
    text = text.replace('gis = "millbrook.gpkg"',
                        f'gis = "{(SAMPLE / "millbrook.gpkg").as_posix()}"')
    if not fireflow:
        text = re.sub(r"(\[fireflow\]\n)enabled = true", r"\1enabled = false", text)
    path = tmp / "town.toml"
    path.write_text(text + extra)
    return path


@pytest.fixture(scope="module")
def model():
    return gridflow.open_model(SAMPLE / "millbrook.toml")


@pytest.fixture(scope="module")
def run_out(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("api_run")
    cfg = _config(tmp)
    out = tmp / "run.gpkg"
    res = CliRunner().invoke(cli, ["-q", "run", str(cfg), "--out", str(out), "--workers", "1"])
    assert res.exit_code == 0, res.output
    return out


def _same_layer(api: gpd.GeoDataFrame, written: gpd.GeoDataFrame, rtol: float = 1e-12) -> None:
    assert list(api.columns) == list(written.columns)
    assert len(api) == len(written)
    for col in api.columns:
        if col == "geometry":
            assert api.geometry.geom_equals_exact(written.geometry, 1e-6).all()
        elif pd.api.types.is_numeric_dtype(api[col]):
            np.testing.assert_allclose(api[col].to_numpy(float), written[col].to_numpy(float),
                                       rtol=rtol, atol=1e-12, equal_nan=True, err_msg=col)
        else:
            a, b = api[col].astype(str).to_numpy(), written[col].astype(str).to_numpy()
            assert (a == b).all(), col


@pytest.mark.parametrize("scenario", ["average_day", "max_day", "peak_hour"])
def test_solves_equal_the_run(model, run_out, scenario):
    res = model.solve(scenario)
    for kind, api in (("nodes", res.nodes), ("pipes", res.pipes)):
        written = gpd.read_file(run_out, layer=f"{kind}_{scenario}", engine="pyogrio")
        _same_layer(api, written)
    # the solution itself holds: mass balance and head loss to the config's tolerances
    assert res.mass_residual_m3s <= 1e-5 and res.head_residual_m <= 1e-3


def test_fire_flow_equals_the_run(model, run_out):
    written = gpd.read_file(run_out, layer="hydrants_fireflow", engine="pyogrio")
    ids = written.hydrant_id.iloc[[0, 57, 200]].tolist()
    api = model.fire_flow(ids)
    assert api.hydrant_id.tolist() == ids
    # the hydrant search stops at its own tolerance, and its starting point depends on the
    # hydrants batched with it: the same flows to about 1e-7, not to the last bit
    _same_layer(api.reset_index(drop=True),
                written.set_index("hydrant_id", drop=False).loc[ids].reset_index(drop=True),
                rtol=1e-6)


def test_closing_a_valve_is_the_config_change(model, tmp_path):
    # V-20367 isolates a branch of 13 nodes in the sample (an open gate valve)
    through_api = model.solve("max_day", closed_valves=["V-20367"])
    cfg = _config(tmp_path, fireflow=False)
    text = cfg.read_text().replace("[scenarios.max_day]\nfactor = 1.8\n",
                        '[scenarios.max_day]\nfactor = 1.8\nclosed_valves = ["V-20367"]\n')
    assert 'closed_valves = ["V-20367"]' in text
    cfg.write_text(text)
    through_config = gridflow.open_model(cfg).solve("max_day")
    _same_layer(through_api.nodes, through_config.nodes)
    _same_layer(through_api.pipes, through_config.pipes)
    base = model.solve("max_day")
    changed = base.pipes.status != through_api.pipes.status
    assert through_api.pipes.pipe_id[changed].tolist() == ["V-20367"]
    cut = (base.nodes.supplied == 1) & (through_api.nodes.supplied == 0)
    assert cut.sum() == 13  # the branch behind the valve, and nothing else
    assert (base.nodes.supplied[~cut] == through_api.nodes.supplied[~cut]).all()


def test_other_changes(model):
    base = model.solve("max_day")
    hyd = model.hydrants.set_index("hydrant_id")
    node = hyd.node_id["HYD-1001"]
    drawn = model.solve("max_day", demands={"HYD-1001": "500 gpm"})
    add = drawn.nodes.set_index("node_id")
    old = base.nodes.set_index("node_id")
    # the demand lands at the hydrant's node and nowhere else
    d = add.demand_gpm - old.demand_gpm
    assert d[node] == pytest.approx(500.0, rel=1e-9)
    assert (d.drop(node).abs() < 1e-9).all()
    # the network's supply rises by exactly the added demand (mass balance)
    net_b, net_d = base.network, drawn.network
    supply_b = -base.result.node_inflow_m3s[net_b.is_fixed].sum()
    supply_d = -drawn.result.node_inflow_m3s[net_d.is_fixed].sum()
    # 500 gpm = 0.0315451 m3/s (US gallon 3.785411784 L, exact by definition), to the mass
    # tolerance of the two solves (flow_tolerance 1e-6 m3/s a node)
    assert supply_d - supply_b == pytest.approx(500 * 3.785411784e-3 / 60, abs=1e-5)
    # a tank level: the tank's head is its bottom plus the level (950 ft + 20 ft)
    low = model.solve("max_day", tank_levels={"T-1": "20 ft"})
    assert low.nodes.set_index("node_id").head_ft["T-1"] == pytest.approx(970.0, abs=1e-6)
    # a diameter: every piece of the main takes it
    wide = model.solve("max_day", diameters={"WM-10002": "30 in"})
    pieces = wide.pipes[wide.pipes.pipe_id.str.startswith("WM-10002.")]
    assert len(pieces) >= 2 and np.allclose(pieces.diameter_in, 30.0)
    # base untouched by the what-ifs (scenarios copy arrays)
    again = model.solve("max_day")
    np.testing.assert_array_equal(again.nodes.head_ft.to_numpy(), base.nodes.head_ft.to_numpy())


def test_graph_has_one_edge_per_cleaned_link(model):
    net = model.network
    g = model.graph()
    assert g.number_of_edges() == net.n_links
    assert g.number_of_nodes() == net.n_nodes
    keys = sorted(k for _, _, k in g.edges(keys=True))
    assert keys == sorted(net.link_id.astype(str).tolist())
    for _, _, k, d in g.edges(keys=True, data=True):
        assert d["link_id"] == k
    dg = model.graph(directed=True)
    frm = dict(zip(net.link_id.astype(str), net.node_id[net.from_idx].astype(str)))
    assert all(frm[k] == u for u, _, k in dg.edges(keys=True))
    assert g.nodes["T-1"]["kind"] == "tank"


def test_errors_are_the_typed_errors_the_cli_maps(model, tmp_path):
    with pytest.raises(gridflow.ConfigError, match="no scenario named 'night'"):
        model.solve("night")
    with pytest.raises(gridflow.ConfigError, match=r"no valve or pipe with id 'V-99999'") as e:
        model.solve("max_day", closed_valves=["V-99999"])
    assert e.value.exit_code == 2
    with pytest.raises(gridflow.ConfigError, match="tank_levels.T-1.*not a length"):
        model.solve("max_day", tank_levels={"T-1": "20 gpm"})
    with pytest.raises(gridflow.ConfigError, match="no node or attached hydrant with id 'X'"):
        model.solve("max_day", demands={"X": "10 gpm"})
    with pytest.raises(gridflow.InputError, match="HYD-1413 is not attached") as e:
        model.fire_flow(["HYD-1413"])  # the hydrant in the golf course
    assert e.value.exit_code == 2
    with pytest.raises(gridflow.InputError, match="no hydrant with id 'HYD-0' in layer"):
        model.fire_flow("HYD-0")
    # the same unknown valve through the config is exit 2 on the command line
    text = _config(tmp_path, fireflow=False).read_text().replace(
        "[scenarios.max_day]\nfactor = 1.8\n",
        '[scenarios.max_day]\nfactor = 1.8\nclosed_valves = ["V-99999"]\n')
    (tmp_path / "bad.toml").write_text(text)
    res = CliRunner().invoke(cli, ["-q", "run", str(tmp_path / "bad.toml"), "--out",
                                   str(tmp_path / "bad.gpkg")])
    assert res.exit_code == 2
    assert "no valve or pipe with id 'V-99999'" in res.stderr
    assert not (tmp_path / "bad.gpkg").exists()


def test_public_surface_is_curated():
    assert set(gridflow.__all__) == {
        "open_model", "Model", "ScenarioResult", "draft_config", "GridflowError",
        "ConfigError", "InputError", "TopologyError", "NetworkError", "SolverError",
        "ConvergenceError", "OutputError", "__version__"}
    for name in gridflow.__all__:
        assert getattr(gridflow, name) is not None
    for name in ("open_model", "Model", "ScenarioResult", "draft_config"):
        doc = getattr(gridflow, name).__doc__
        assert doc and ("Examples" in doc or name in ("ScenarioResult",)), name


def test_opening_reads_without_writing(tmp_path):
    cfg = _config(tmp_path, fireflow=False)
    before = sorted(p.name for p in tmp_path.iterdir())
    m = gridflow.open_model(cfg)
    m.solve("average_day")
    assert sorted(p.name for p in tmp_path.iterdir()) == before
    assert pyogrio.list_layers(SAMPLE / "millbrook.gpkg") is not None
