"""Field flow tests on the Millbrook sample, end to end: the ``flow_tests`` layer of a run,
``--previous``, the report section, and ``gridflow calibrate``.

The sample's tests were made by its generator solving the model with old cast iron (before
1930) at Hazen-Williams C 55 where the config's table says 75 (scripts/sample_flow_tests.py):
an invented truth, which calibration must find.
"""

from __future__ import annotations

import re
import tomllib
from pathlib import Path

import numpy as np
import pyogrio
import pytest
from click.testing import CliRunner

from gridflow.cli.main import cli

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_gis"
BAD_TEST = "FT-2023-116"  # residual above static (sample_gis/README.md)
SAMPLE_TRUE_C = 55.0  # the generator's invented truth for cast iron before 1930


def _config(tmp_path: Path, *, table_c: float | None = None) -> Path:
    text = (SAMPLE / "millbrook.toml").read_text()
    text = text.replace('gis = "millbrook.gpkg"',
                        f'gis = "{(SAMPLE / "millbrook.gpkg").as_posix()}"')
    text = text.replace("[fireflow]\nenabled = true", "[fireflow]\nenabled = false")
    if table_c is not None:
        text = re.sub(r'installed_before = 1930, value = [0-9.]+',
                      f"installed_before = 1930, value = {table_c}", text)
    cfg = tmp_path / f"town{'' if table_c is None else int(table_c)}.toml"
    cfg.write_text(text)
    return cfg


def _run(*args):
    return CliRunner().invoke(cli, list(args), catch_exceptions=False)


@pytest.fixture(scope="module")
def run_output(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("ft")
    out = tmp / "night1.gpkg"
    res = _run("run", str(_config(tmp)), "--out", str(out), "--workers", "1")
    assert res.exit_code == 0, res.output
    assert re.search(r"field flow tests: 15 of 16 compared, residual error mean [0-9.]+ psi, "
                     r"worst [0-9.]+ psi; \d+ out of tolerance", res.output), res.output
    return out, tmp


def test_flow_tests_layer_fields_and_bad_record(run_output):
    out, _ = run_output
    assert dict(pyogrio.list_layers(out))["flow_tests"] == "Point"
    ft = pyogrio.read_dataframe(out, layer="flow_tests")
    for f in ("test_id", "test_date", "residual_hydrant_id", "flowing_hydrant_ids", "used",
              "problem", "field_static_pressure_psi", "model_static_pressure_psi",
              "static_diff_psi", "field_residual_pressure_psi", "model_residual_pressure_psi",
              "residual_diff_psi", "field_flow_gpm", "field_flow_20psi_gpm",
              "model_flow_20psi_gpm", "flow_20psi_diff_gpm", "out_of_tolerance"):
        assert f in ft.columns, f
    bad = ft[ft["test_id"] == BAD_TEST].iloc[0]
    assert bad["used"] == 0 and "is not below static" in bad["problem"]
    fnd = pyogrio.read_dataframe(out, layer="findings", read_geometry=False)
    hit = fnd[(fnd["feature_id"] == BAD_TEST) & (fnd["kind"] == "flow_test_left_out")]
    assert len(hit) == 1 and hit["layer"].iloc[0] == "HydrantFlowTests"
    used = ft[ft["used"] == 1]
    assert len(used) == len(ft) - 1
    # the tolerance flag follows its definition (5 psi, the config's tolerance)
    assert ((used["residual_diff_psi"].abs() > 5.0).astype(int)
            == used["out_of_tolerance"]).all()
    # the table's C 75 is too smooth for old cast iron: the model overstates residuals there
    assert (used["residual_diff_psi"] > -1.5).all() and used["residual_diff_psi"].max() > 5.0
    # physically possible: pressures above vacuum, 20 psi flows below 30,000 gpm
    assert (used["model_residual_pressure_psi"] > 0).all()
    assert (ft["model_flow_20psi_gpm"].dropna() < 30_000).all()
    info = dict(pyogrio.read_dataframe(out, layer="run_info").itertuples(index=False))
    assert info["flow_tests:count"] == str(len(ft))
    assert info["flow_tests:worst_test"] == used.loc[used["residual_diff_psi"].abs().idxmax(),
                                                     "test_id"]
    # mass balance and head-loss residuals of the test solves (the solver's tolerances)
    assert float(info["flow_tests:mass_residual_m3s"]) <= 1e-6
    assert float(info["flow_tests:head_residual_m"]) <= 1e-4
    html = out.with_suffix(".html").read_text()
    assert "Field flow tests against the model" in html and BAD_TEST in html


def test_previous_gives_the_change_in_each_tests_error(run_output):
    out, tmp = run_output
    out2 = tmp / "night2.gpkg"
    res = _run("run", str(_config(tmp, table_c=SAMPLE_TRUE_C)), "--out", str(out2),
               "--previous", str(out), "--workers", "1")
    assert res.exit_code == 0, res.output
    a = pyogrio.read_dataframe(out, layer="flow_tests", read_geometry=False).set_index("test_id")
    b = pyogrio.read_dataframe(out2, layer="flow_tests", read_geometry=False).set_index("test_id")
    np.testing.assert_allclose(b["previous_residual_diff_psi"], a["residual_diff_psi"])
    change = b["abs_error_change_psi"].dropna()
    np.testing.assert_allclose(change, (b["residual_diff_psi"].abs()
                                        - a["residual_diff_psi"].abs()).dropna())
    # with the true roughness the worst tests come close to the field
    assert change.min() < -4.0 and b["residual_diff_psi"].abs().max() < 2.0


def test_calibrate_finds_the_rough_group_and_changes_nothing(tmp_path):
    cfg = _config(tmp_path)
    before = (cfg.read_bytes(), (SAMPLE / "millbrook.gpkg").read_bytes())
    snippet = tmp_path / "fitted.toml"
    res = _run("calibrate", str(cfg), "--out", str(snippet), "--workers", "1")
    assert res.exit_code == 0, res.output
    assert (cfg.read_bytes(), (SAMPLE / "millbrook.gpkg").read_bytes()) == before
    text = snippet.read_text()
    rules = tomllib.loads(text)["roughness"]["table"]
    old = [r for r in rules if r["material"] == "cast_iron"
           and r.get("installed_before") == 1930][0]
    assert old["value"] == pytest.approx(SAMPLE_TRUE_C, rel=0.05)
    assert "not informed by any flow test" in text
    assert re.search(r"cast_iron before 1930: 75 -> [0-9.]+ \+- [0-9.]+ \(\d+ test", res.output)
    assert "RMS residual pressure error" in res.output


def test_calibrate_without_flow_tests_exits_2(tmp_path):
    text = _config(tmp_path).read_text()
    text = re.sub(r"\[layers\.flow_tests\]\n(?:.*\n)*?\n", "", text)
    text = re.sub(r"\[layers\.flow_test_outlets\]\n(?:.*\n)*?\n", "", text)
    cfg = tmp_path / "none.toml"
    cfg.write_text(text)
    res = _run("calibrate", str(cfg), "--out", str(tmp_path / "x.toml"))
    assert res.exit_code == 2
    assert "map layers.flow_tests" in res.output
    assert not (tmp_path / "x.toml").exists()


def test_text_in_a_measured_field_exits_2_naming_file_layer_feature_and_field(tmp_path):
    tests = pyogrio.read_dataframe(SAMPLE / "millbrook.gpkg", layer="HydrantFlowTests")
    tests["STATIC_PSI"] = tests["STATIC_PSI"].map(lambda v: f"{v:.1f}").astype(object)
    tests.loc[2, "STATIC_PSI"] = "n/a"
    other = tmp_path / "tests.gpkg"
    pyogrio.write_dataframe(tests, other, layer="HydrantFlowTests")
    text = _config(tmp_path).read_text()
    text = text.replace("[inputs]\n", f'[inputs]\nfield = "{other.as_posix()}"\n', 1)
    text = text.replace('[layers.flow_tests]\ninput = "gis"',
                        '[layers.flow_tests]\ninput = "field"')
    cfg = tmp_path / "bad.toml"
    cfg.write_text(text)
    out = tmp_path / "out.gpkg"
    res = _run("run", str(cfg), "--out", str(out), "--workers", "1")
    assert res.exit_code == 2
    tid = tests.loc[2, "TEST_ID"]
    assert re.search(rf"tests\.gpkg: layer 'HydrantFlowTests', feature {tid}: field "
                     r"'STATIC_PSI' holds 'n/a' where a number belongs", res.output), res.output
    assert not out.exists()
