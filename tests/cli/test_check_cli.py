"""``gridflow check`` through the command line, and the atomic GeoPackage writer."""

import geopandas as gpd
import pandas as pd
import pyogrio
import pytest
from click.testing import CliRunner

from gridflow.cli.main import cli
from gridflow.errors import OutputError
from gridflow.io.write import write_geopackage

from ..gis_helpers import L, P, layer, pipe, source_rows

CONFIG = """
[run]
snap_tolerance = "0.5 m"
output = "out.gpkg"
[inputs]
gis = "gis.gpkg"
[layers.pipes]
input = "gis"
layer = "mains"
id = "MAIN_ID"
fields = {{ diameter = "DIAM_IN", status = "STATUS" }}
units = {{ diameter = "in" }}
codes.status = {{ ACT = "open", ABD = "abandoned" }}
{extra}
[layers.sources]
input = "gis"
layer = "sources"
id = "SRC_ID"
fields = {{ head = "HGL_FT" }}
units = {{ head = "ft" }}
"""


@pytest.fixture
def project(tmp_path):
    g = tmp_path / "gis.gpkg"
    layer(g, "mains", [pipe("P1", L((0, 0), (100, 0))), pipe("P2", L((100.1, 0), (200, 0))),
                       pipe("P3", L((202, 0), (300, 0)))])
    layer(g, "sources", source_rows(P(0, 0)))
    cfg = tmp_path / "millbrook.toml"
    cfg.write_text(CONFIG.format(extra=""))
    return tmp_path, cfg


def _run(*args):
    return CliRunner().invoke(cli, list(map(str, args)))


def test_check_writes_layers(project):
    tmp, cfg = project
    r = _run("check", cfg)
    assert r.exit_code == 0, r.output
    assert "findings:" in r.output and "model estimates" in r.output
    out = tmp / "out.gpkg"
    names = set(pyogrio.list_layers(out)[:, 0])
    assert names == {"findings", "nodes_network", "pipes_network", "run_info", "layer_styles"}
    pipes = gpd.read_file(out, layer="pipes_network")
    assert list(pipes.pipe_id) == ["P1", "P2", "P3"]
    assert {"length_ft", "diameter_in", "from_node", "to_node"} <= set(pipes.columns)
    assert pipes.diameter_in.iloc[0] == pytest.approx(8.0)
    f = gpd.read_file(out, layer="findings")
    assert set(f.kind) >= {"end_snapped", "disconnected_part", "dangling_end"}
    info = pyogrio.read_dataframe(out, layer="run_info")
    kv = dict(zip(info.key, info.value))
    assert kv["unit_system"] == "US" and kv["tool"] == "gridflow"
    assert any(k.startswith("input_sha256:") for k in kv)
    assert not [p for p in tmp.iterdir() if ".tmp-" in p.name]


def test_unknown_config_key_exit_2_no_output(project):
    tmp, cfg = project
    cfg.write_text(CONFIG.format(extra='colour = "blue"'))
    r = _run("check", cfg)
    assert r.exit_code == 2
    assert "unknown config key layers.pipes.colour" in r.output
    assert not (tmp / "out.gpkg").exists()


def test_output_equal_to_input_refused(project):
    tmp, cfg = project
    before = (tmp / "gis.gpkg").read_bytes()
    r = _run("check", cfg, "--out", tmp / "gis.gpkg")
    assert r.exit_code == 2
    assert "is one of the inputs" in r.output
    assert (tmp / "gis.gpkg").read_bytes() == before


def test_missing_field_exit_2(project):
    tmp, cfg = project
    cfg.write_text(CONFIG.format(extra="").replace('"DIAM_IN"', '"DIAM"'))
    r = _run("check", cfg)
    assert r.exit_code == 2
    assert "has no field 'DIAM'" in r.output and "gis.gpkg" in r.output


def test_failed_write_leaves_previous_output(tmp_path, monkeypatch):
    import gridflow.io.write as w

    out = tmp_path / "res.gpkg"
    ok = gpd.GeoDataFrame({"a": [1]}, geometry=[P(0, 0)], crs="EPSG:32616")
    write_geopackage(out, {"one": ok, "info": pd.DataFrame({"key": ["k"], "value": ["v"]})})
    before = out.read_bytes()
    real = w._write_layer

    def fail_on_second(pyogrio_, tmp, name, df, *rest):
        if name == "two":
            raise RuntimeError("disk full")
        real(pyogrio_, tmp, name, df, *rest)

    monkeypatch.setattr(w, "_write_layer", fail_on_second)
    with pytest.raises(RuntimeError, match="disk full"):
        write_geopackage(out, {"one": ok, "two": ok})
    assert out.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["res.gpkg"]


def test_write_refuses_input(tmp_path):
    g = tmp_path / "in.gpkg"
    g.write_bytes(b"x")
    with pytest.raises(OutputError, match="is one of the inputs"):
        write_geopackage(g, {}, inputs=[g])
    assert g.read_bytes() == b"x"
