"""``gridflow init``: a config drafted from a GIS file's layers, fields and values.

On the Millbrook sample the draft must agree with the hand-written sample config wherever the
evidence is unambiguous, and run ``gridflow check`` without edits. A file with odd layer and
field names and SI units, built here, checks the guesses from names and from value ranges.
"""

from __future__ import annotations

import shutil
import tomllib
from pathlib import Path

import pyogrio
import pytest
from click.testing import CliRunner

from gridflow.cli.main import cli
from gridflow.config import load_config
from gridflow.config.draft import _unit_from_values, count_checks, draft_config
from gridflow.config.layers import NUMERIC_FIELDS
from gridflow.io.inspect import FieldInfo

from ..gis_helpers import CRS, L, P, layer

ROOT = Path(__file__).resolve().parents[2]
SAMPLE = ROOT / "sample_gis"


def _cli(*args):
    return CliRunner().invoke(cli, [str(a) for a in args])


@pytest.fixture(scope="module")
def sample_draft(tmp_path_factory):
    """The sample GeoPackage alone in a folder (its config removed), and the drafted config."""
    tmp = tmp_path_factory.mktemp("draft")
    gpkg = tmp / "millbrook.gpkg"
    shutil.copyfile(SAMPLE / "millbrook.gpkg", gpkg)
    res = _cli("init", gpkg)
    assert res.exit_code == 0, res.output
    assert "written:" in res.output and "CHECK" in res.output
    return tmp, tmp / "millbrook.toml"


def test_sample_draft_maps_what_the_hand_written_config_maps(sample_draft):
    _, path = sample_draft
    draft = tomllib.loads(path.read_text())
    hand = tomllib.loads((SAMPLE / "millbrook.toml").read_text())
    assert draft["inputs"] == {"gis": "millbrook.gpkg"}
    # field flow test layers are not drafted (listed as not used): the roles of the network
    drafted = set(hand["layers"]) - {"flow_tests", "flow_test_outlets"}
    assert set(draft["layers"]) == drafted
    pairs = []
    for role, h in hand["layers"].items():
        if role not in drafted:
            continue
        hs = h if isinstance(h, list) else [h]
        d = draft["layers"][role]
        ds = d if isinstance(d, list) else [d]
        assert [x["layer"] for x in ds] == [x["layer"] for x in hs], role  # lists too
        pairs += [(role, a, b) for a, b in zip(hs, ds)]
    for role, h, d in pairs:
        assert (d["layer"], d["id"]) == (h["layer"], h["id"]), role
        for fr, column in h["fields"].items():
            assert d["fields"].get(fr) == column, (role, fr)
        for fr, unit in h.get("units", {}).items():
            if NUMERIC_FIELDS[role][fr] is None:
                continue  # meters' consumption: its unit is [demand] consumption_unit
            assert d["units"][fr] == unit, (role, fr)
        for fr, codes in d.get("codes", {}).items():
            for code, target in codes.items():  # only codes present in the data are drafted
                assert h["codes"][fr][code] == target, (role, fr, code)
    assert draft["elevation"] == {"source": "z", "unit": "ft"}
    assert draft["run"]["units"] == "US" and draft["run"]["crs"] == "EPSG:26916"
    assert draft["demand"]["consumption_unit"] == hand["demand"]["consumption_unit"]
    for cat, sec in hand["demand"]["categories"].items():
        assert sorted(draft["demand"]["categories"][cat]["codes"]) == sorted(sec["codes"])
    # the pump's design point is drafted too; the three-point curve takes precedence
    assert draft["layers"]["pumps"]["fields"]["design_flow"] == "DSGN_GPM"
    assert [v["layer"] for v in draft["layers"]["valves"]] == ["SystemValves", "PRVStations"]


def test_sample_draft_carries_evidence_and_checks(sample_draft):
    _, path = sample_draft
    text = path.read_text()
    assert 'fields.diameter = "DIAM_IN"' in text
    line = next(ln for ln in text.splitlines() if ln.startswith("fields.diameter"))
    assert "# DIAM_IN: float, 4-24" in line and "unit in from the name" in line
    assert "# LIFECYCLE codes in the sample: ACT (2804), ABD (10), PRO (3)" in text
    assert 'codes.status.PRO = "inactive"' in text and "PRO: inactive? CHECK" in text
    assert "median Z" in text and "ELEV_FT" in text
    assert f"CHECK are the guesses to confirm ({count_checks(text)} of them)" in text
    assert 0 < count_checks(text) < 40


def test_sample_draft_runs_check_without_edits(sample_draft, tmp_path):
    folder, path = sample_draft
    res = _cli("-q", "check", path, "--out", tmp_path / "draft.gpkg")
    assert res.exit_code == 0, res.output
    hand = folder / "hand.toml"
    shutil.copyfile(SAMPLE / "millbrook.toml", hand)
    res2 = _cli("-q", "check", hand, "--out", tmp_path / "hand.gpkg")
    assert res2.exit_code == 0, res2.output
    # the same network and the same findings as the hand-written config
    for name in ("nodes_network", "findings"):
        a = pyogrio.read_dataframe(tmp_path / "draft.gpkg", layer=name)
        b = pyogrio.read_dataframe(tmp_path / "hand.gpkg", layer=name)
        assert len(a) == len(b), name
    a = pyogrio.read_dataframe(tmp_path / "draft.gpkg", layer="findings")
    b = pyogrio.read_dataframe(tmp_path / "hand.gpkg", layer="findings")
    assert a["kind"].value_counts().to_dict() == b["kind"].value_counts().to_dict()


def test_init_never_overwrites(sample_draft):
    folder, path = sample_draft
    before = path.read_bytes()
    res = _cli("init", folder / "millbrook.gpkg")
    assert res.exit_code == 2
    assert "exists; gridflow init never writes over a file" in res.stderr
    assert path.read_bytes() == before
    assert not [p for p in folder.iterdir() if p.name.endswith(".tmp")]


def test_init_unreadable_inputs_are_exit_2(tmp_path):
    res = _cli("init", tmp_path / "none.gpkg")
    assert res.exit_code == 2 and "does not exist" in res.stderr
    pts = tmp_path / "points.gpkg"
    layer(pts, "wells", [{"WELL": "W1", "geometry": P(0, 0)}])
    res = _cli("init", pts, "--out", tmp_path / "points.toml")
    assert res.exit_code == 2
    assert "no line layer to take as the water mains" in res.stderr and "wells (Point)" in \
        res.stderr
    assert not (tmp_path / "points.toml").exists()


# ---- a file with odd names and SI units, built here (invented data) -------------------------

def _odd_gis(path: Path) -> None:
    mains = []
    mats = ["Ductile Iron", "PVC", "Cast Iron"]
    status = ["In Service"] * 6 + ["Abandoned", "Proposed"]
    k = 0
    for i in range(3):  # a 3 x 3 grid of 200 m blocks, 150-300 mm mains
        for j in range(3):
            for (x0, y0, x1, y1) in ((i * 200, j * 200, (i + 1) * 200, j * 200),
                                     (i * 200, j * 200, i * 200, (j + 1) * 200)):
                k += 1
                mains.append({"FacilityID": 7000 + k, "Nominal Size": [150.0, 200.0, 300.0][k % 3],
                              "Pipe Material": mats[k % 3],
                              "LifeCycleStatus": status[k % len(status)] if k > 2 else
                              "In Service", "InstallYear": 1950 + k,
                              "PressureZone": "Low", "geometry": L((x0, y0), (x1, y1))})
    layer(path, "WL_2024", mains)
    # service lines to the meters: lines too, but not mains
    layer(path, "ServiceLines", [{"SvcID": f"S{n}", "Size": 1.0,
                                  "geometry": L((50 + 20 * n, 0), (50 + 20 * n, 12))}
                                 for n in range(5)])
    layer(path, "FireHydrants_pt", [
        {"HydrantNo": f"FH{n}", "GroundElev_m": 120.0 + n, "geometry": P(100 + 200 * n, 3)}
        for n in range(3)])
    layer(path, "Reservoirs", [{"Site": "Hill reservoir", "HydraulicGrade": 165.0,
                                "geometry": P(0, 0)}])
    layer(path, "AccountMeters", [
        {"AcctNo": f"A{n:03d}", "Cons_m3_month": 8.0 + (n % 7),
         "Class": ["RES", "COM", "IRR"][n % 3], "geometry": P(50 + 20 * n, 12)}
        for n in range(20)])


def test_odd_names_and_si_units(tmp_path):
    gpkg = tmp_path / "export 2024.gpkg"
    _odd_gis(gpkg)
    out = tmp_path / "cfg" / "draft.toml"
    out.parent.mkdir()
    res = _cli("init", gpkg, "--out", out)
    assert res.exit_code == 0, res.output
    text = out.read_text()
    d = tomllib.loads(text)
    assert d["inputs"]["gis"] == "../export 2024.gpkg"  # relative to the config's folder
    assert d["run"]["units"] == "SI"
    assert d["run"]["crs"] == CRS
    pipes = d["layers"]["pipes"]
    assert pipes["layer"] == "WL_2024" and pipes["id"] == "FacilityID"
    assert pipes["fields"]["diameter"] == "Nominal Size"
    assert pipes["units"]["diameter"] == "mm"  # from the values: median 200
    line = next(ln for ln in text.splitlines() if ln.startswith("units.diameter"))
    assert line.rstrip().endswith("CHECK")
    assert pipes["fields"]["status"] == "LifeCycleStatus"
    assert pipes["codes"]["status"] == {"In Service": "open", "Abandoned": "abandoned",
                                        "Proposed": "inactive"}
    assert pipes["codes"]["material"] == {"Ductile Iron": "ductile_iron", "PVC": "pvc",
                                          "Cast Iron": "cast_iron"}
    assert pipes["fields"]["install_year"] == "InstallYear"
    assert pipes["fields"]["zone"] == "PressureZone"
    hyd = d["layers"]["hydrants"]
    assert (hyd["layer"], hyd["id"]) == ("FireHydrants_pt", "HydrantNo")
    assert hyd["fields"]["elevation"] == "GroundElev_m" and hyd["units"]["elevation"] == "m"
    src = d["layers"]["sources"]
    assert src["layer"] == "Reservoirs" and src["fields"]["head"] == "HydraulicGrade"
    assert src["units"]["head"] == "m"
    met = d["layers"]["meters"]
    assert (met["id"], met["fields"]["consumption"], met["fields"]["category"]) == \
        ("AcctNo", "Cons_m3_month", "Class")
    assert d["demand"]["consumption_unit"] == "m3/month"
    assert d["demand"]["categories"]["residential"]["codes"] == ["RES"]
    assert d["elevation"]["source"] == "attribute"
    assert "tanks" not in d["layers"] and "pumps" not in d["layers"]
    assert "#   ServiceLines: LineString, 5 feature(s), EPSG:32616 (not used)" in text
    load_config(out)  # the draft is a valid config as written
    res = _cli("-q", "check", out, "--out", tmp_path / "check.gpkg")
    assert res.exit_code == 0, res.output
    assert "gridflow check:" in res.output


@pytest.mark.parametrize(("role", "fr", "values", "unit"), [
    ("pipes", "diameter", [6.0, 8.0, 12.0], "in"),      # common US main sizes
    ("pipes", "diameter", [150.0, 200.0, 300.0], "mm"),  # common metric main sizes
    ("pipes", "diameter", [0.15, 0.2, 0.3], "m"),
    ("valves", "setting", [45.0, 60.0], "psi"),          # PRV settings (common practice)
    ("valves", "setting", [350.0, 420.0], "kpa"),
    ("hydrants", "required_fire_flow", [1000.0, 1500.0], "gpm"),  # IFC B105 flows
    ("hydrants", "required_fire_flow", [63.0, 95.0], "l/s"),
    ("meters", "consumption", [150.0, 300.0], "gal/day"),  # a household's day (common practice)
    ("meters", "consumption", [8.0, 20.0], "m3/month"),
])
def test_units_guessed_from_values(role, fr, values, unit):
    f = FieldInfo("X", "float", values, len(values))
    guess, why = _unit_from_values(role, fr, f, "US")
    assert guess == unit
    assert "looks like" in why


def test_draft_config_text_is_valid_toml_anywhere(tmp_path):
    gpkg = tmp_path / "odd.gpkg"
    _odd_gis(gpkg)
    text = draft_config(gpkg, config_dir=tmp_path)
    assert tomllib.loads(text)["inputs"]["gis"] == "odd.gpkg"


# ---- the street town: real OSM street geometry with invented utility attributes -------------

def test_street_town_draft_maps_what_its_hand_written_config_maps(tmp_path):
    from tests.topology.street_town import build, config_table

    town = build(tmp_path)
    out = tmp_path / "town.toml"
    res = _cli("init", town.gpkg, "--out", out)
    assert res.exit_code == 0, res.output
    draft = tomllib.loads(out.read_text())
    hand = config_table(town)
    assert draft["run"]["units"] == "SI" and draft["run"]["crs"] == "EPSG:3067"
    assert draft["elevation"] == {"source": "z", "unit": "m"}
    for role, h in hand["layers"].items():
        hs = h if isinstance(h, list) else [h]
        d = draft["layers"][role]
        ds = d if isinstance(d, list) else [d]
        assert [x["layer"] for x in ds] == [x["layer"] for x in hs], role  # two-layer roles
        for a, b in zip(hs, ds):
            assert b["id"] == a["id"], (role, a["layer"])
            for fr, column in a["fields"].items():
                assert b["fields"].get(fr) == column, (role, a["layer"], fr)
            for fr, unit in a.get("units", {}).items():
                assert b["units"][fr] == unit, (role, a["layer"], fr)
            for fr in ("type", "direction"):
                for code, target in b.get("codes", {}).get(fr, {}).items():
                    assert a["codes"][fr][code] == target, (role, fr, code)
    assert draft["layers"]["tanks"]["levels"] == "elevation"  # absolute water levels
    assert draft["demand"]["consumption_unit"] == hand["demand"]["consumption_unit"]
    res = _cli("-q", "check", out, "--out", tmp_path / "check.gpkg")
    assert res.exit_code == 0, res.output
