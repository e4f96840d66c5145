"""Reading mapped layers: schema checks first, units, codes, CRS handling."""

import hashlib

import numpy as np
import pytest

from gridflow.errors import InputError
from gridflow.findings import Findings
from gridflow.io.read import read_inputs

from ..gis_helpers import CRS, X0, Y0, L, P, config, layer, pipe, source_layer, source_rows


def _gis(tmp_path, rows=None, crs=CRS):
    g = tmp_path / "gis.gpkg"
    layer(g, "mains", rows or [pipe("P1", L((0, 0), (100, 0)), diam=8.0),
                               pipe("P2", L((100, 0), (200, 0)), diam=12.0, status="ABD")],
          crs=crs)
    return g


def test_units_codes_and_ids(tmp_path):
    g = _gis(tmp_path)
    f = Findings()
    rr = read_inputs(config(tmp_path, g), f)
    p = rr.layers["pipes"]
    assert list(p["pipe_id"]) == ["P1", "P2"]
    # 8 in = 0.2032 m, 12 in = 0.3048 m (international inch, definition)
    assert np.allclose(p["diameter"], [0.2032, 0.3048])
    assert list(p["status"]) == ["open", "abandoned"]
    assert rr.crs.to_epsg() == 32616


def test_input_file_is_not_changed(tmp_path):
    g = _gis(tmp_path)
    before = hashlib.sha256(g.read_bytes()).hexdigest()
    read_inputs(config(tmp_path, g), Findings())
    assert hashlib.sha256(g.read_bytes()).hexdigest() == before


def test_missing_field_named_before_reading(tmp_path):
    g = _gis(tmp_path)
    cfg = config(tmp_path, g, pipes={"fields": {"diameter": "DIAMETER"}})
    with pytest.raises(InputError, match=r"layer 'mains' has no field 'DIAMETER' "
                                         r"\(layers\.pipes\.fields\.diameter\)") as e:
        read_inputs(cfg, Findings())
    assert e.value.field == "DIAMETER" and e.value.layer == "mains"
    assert e.value.file == str(g)


def test_missing_layer_named(tmp_path):
    g = _gis(tmp_path)
    cfg = config(tmp_path, g, layers={"sources": source_layer()})
    with pytest.raises(InputError, match=r"layer 'sources' \(layers\.sources\.layer\) not found"):
        read_inputs(cfg, Findings())


def test_text_where_a_number_belongs(tmp_path):
    g = _gis(tmp_path, rows=[pipe("P1", L((0, 0), (100, 0)), diam="8"),
                             pipe("P2", L((100, 0), (200, 0)), diam="eight")])
    with pytest.raises(InputError, match=r"feature P2: field 'DIAM_IN' holds 'eight' where a "
                                         r"number belongs") as e:
        read_inputs(config(tmp_path, g), Findings())
    assert (e.value.feature_id, e.value.field, e.value.layer) == ("P2", "DIAM_IN", "mains")


def test_layer_without_crs_is_an_input_error(tmp_path):
    g = _gis(tmp_path)
    layer(g, "sources", source_rows(P(0, 0)), crs=None)
    cfg = config(tmp_path, g, layers={"sources": source_layer()})
    with pytest.raises(InputError, match=r"layer 'sources' has no coordinate reference system"):
        read_inputs(cfg, Findings())


def test_layers_in_other_crs_are_reprojected(tmp_path):
    g = _gis(tmp_path)
    # the source point written in geographic coordinates (EPSG:4326)
    import geopandas as gpd

    pt = gpd.GeoSeries([P(0, 0)], crs=CRS).to_crs(4326)
    layer(g, "sources", [{"SRC_ID": "S1", "HGL_FT": 900.0, "geometry": pt.iloc[0]}],
          crs="EPSG:4326")
    rr = read_inputs(config(tmp_path, g, layers={"sources": source_layer()}), Findings())
    s = rr.layers["sources"]
    assert s.crs.to_epsg() == 32616
    assert s.geometry.iloc[0].distance(P(0, 0)) < 1e-3  # round trip to 1 mm


def test_geographic_pipes_go_to_local_utm(tmp_path):
    import geopandas as gpd

    lines = gpd.GeoSeries([L((0, 0), (100, 0))], crs=CRS).to_crs(4326)
    g = _gis(tmp_path, rows=[pipe("P1", lines.iloc[0])], crs="EPSG:4326")
    f = Findings()
    rr = read_inputs(config(tmp_path, g), f)
    # 500000 E in UTM 16N lies on the central meridian of zone 16 (87 W): EPSG 32616
    assert rr.crs.to_epsg() == 32616
    assert f.kind == ["crs_chosen"] and f.severity == ["info"]
    assert rr.layers["pipes"].geometry.length.iloc[0] == pytest.approx(100.0, abs=0.01)


def test_configured_target_crs(tmp_path):
    g = _gis(tmp_path)
    rr = read_inputs(config(tmp_path, g, run={"crs": "EPSG:3857"}), Findings())
    assert rr.crs.to_epsg() == 3857
    assert rr.layers["pipes"].crs.to_epsg() == 3857
    _ = (X0, Y0)


def _two_valve_layers(tmp_path, second_id="V2"):
    g = _gis(tmp_path)
    layer(g, "valves", [{"VID": "V1", "POS": "C", "geometry": P(50, 0)},
                        {"VID": "V3", "POS": "Q", "geometry": P(60, 0)},
                        {"VID": "V4", "POS": "Q", "geometry": P(70, 0)}])
    layer(g, "prvs", [{"SID": second_id, "KIND": "PRV", "SET": 50.0, "DIR": "A",
                       "geometry": P(150, 0)}])
    return config(tmp_path, g, layers={"valves": [
        {"input": "gis", "layer": "valves", "id": "VID", "fields": {"status": "POS"},
         "codes": {"status": {"C": "closed", "O": "open"}}},
        {"input": "gis", "layer": "prvs", "id": "SID",
         "fields": {"type": "KIND", "setting": "SET", "direction": "DIR"},
         "units": {"setting": "psi"},
         "codes": {"type": {"PRV": "prv"}, "direction": {"A": "against", "W": "with"}}}]})


def test_several_layers_per_role_each_with_its_own_fields(tmp_path):
    f = Findings()
    rr = read_inputs(_two_valve_layers(tmp_path), f)
    v = rr.layers["valves"]
    assert list(v["valve_id"]) == ["V1", "V3", "V4", "V2"]
    assert list(v["source_layer"]) == ["valves"] * 3 + ["prvs"]
    assert list(v["status"])[:3] == ["closed", "open", "open"]  # Q unlisted: the default
    # 50 psi = 35.15 m of water head (1 psi = 0.70307 m of water; standard definitions)
    assert v["setting"].iloc[3] == pytest.approx(35.153, abs=1e-3)
    assert v["direction"].iloc[3] == "against"
    # one finding per distinct unlisted value, with its count, layer and field
    unknown = [m for k, m in zip(f.kind, f.message) if k == "unknown_code"]
    assert len(unknown) == 1
    assert unknown[0].startswith("2 feature(s) of layer 'valves' hold 'Q' in field 'POS'")
    assert "layers.valves[0].codes.status" in unknown[0] and "treated as 'open'" in unknown[0]


def test_id_clash_across_layers_names_both(tmp_path):
    cfg = _two_valve_layers(tmp_path, second_id="V1")
    with pytest.raises(InputError, match=r"'V1' is in layer 'valves' \(layers\.valves\[0\]\) "
                                         r"and in layer 'prvs' \(layers\.valves\[1\]\)"):
        read_inputs(cfg, Findings())
