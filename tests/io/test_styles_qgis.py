"""Result layers opened in a real desktop GIS: QGIS (Debian's python3-qgis), headless.

The sample town is run end to end (and checked, for the cleaned-network layers); a script run
by the system Python that has QGIS opens the output, loads each layer's stored default style,
and renders each rule's features alone. These tests assert that every layer with geometry
loads its style as a rule renderer with symbol levels, that QGIS read back exactly the rules
gridflow meant (labels, filters, colours), and that flagged features are drawn in their flag's
colour (the pixel at the feature). `scripts/test.sh` installs python3-qgis when it runs as root.
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

import pyogrio
import pytest

from gridflow.io.styles import (
    LAYER_STYLES,
    NFPA_CLASS_COLORS,
    PALETTE,
    Marker,
    expand_rules,
    style_for,
    style_xml,
)

ROOT = Path(__file__).resolve().parents[2]
SAMPLE = ROOT / "sample_gis"
SCRIPT = Path(__file__).with_name("qgis_render.py")
SYSTEM_PYTHON = "/usr/bin/python3"


def _rgba(text: str) -> list[int]:
    return [int(v) for v in text.split(",")]


def _qgis_python() -> str:
    probe = subprocess.run([SYSTEM_PYTHON, "-c", "import qgis.core"], capture_output=True,
                           text=True, check=False) if os.path.exists(SYSTEM_PYTHON) else None
    assert probe is not None and probe.returncode == 0, (
        "QGIS's Python bindings are needed: apt-get install python3-qgis "
        "(scripts/test.sh installs them when run as root)")
    return SYSTEM_PYTHON


def _config(tmp: Path) -> Path:
    text = (SAMPLE / "millbrook.toml").read_text()
    text = re.sub(r'(\w+)\s*=\s*"millbrook\.gpkg"',
                  lambda m: f'{m.group(1)} = "{(SAMPLE / "millbrook.gpkg").as_posix()}"', text)
    cfg = tmp / "town.toml"
    cfg.write_text(text)
    return cfg


def _gridflow(*args: str) -> None:
    proc = subprocess.run([sys.executable, "-m", "gridflow", "-q", *args], capture_output=True,
                          text=True, check=False, timeout=600)
    assert proc.returncode == 0, proc.stderr[-2000:]


@pytest.fixture(scope="module")
def rendered(tmp_path_factory):
    python = _qgis_python()
    tmp = tmp_path_factory.mktemp("qgis")
    cfg = _config(tmp)
    run_out, check_out = tmp / "town.gpkg", tmp / "town_check.gpkg"
    _gridflow("run", str(cfg), "--out", str(run_out), "--workers", "1")
    _gridflow("check", str(cfg), "--out", str(check_out))
    reports = {}
    for gpkg in (run_out, check_out):
        out_json = gpkg.with_suffix(".json")
        png_dir = tmp / f"{gpkg.stem}_png"
        png_dir.mkdir()
        env = {k: v for k, v in os.environ.items()
               if not k.startswith(("PYTHON", "VIRTUAL_ENV"))}
        env["QT_QPA_PLATFORM"] = "offscreen"
        proc = subprocess.run([python, str(SCRIPT), str(gpkg), str(out_json), str(png_dir)],
                              capture_output=True, text=True, env=env, timeout=600,
                              check=False)
        assert proc.returncode == 0, proc.stderr[-3000:]
        reports[gpkg.stem] = (gpkg, json.loads(out_json.read_text()))
    return reports


def _spatial_layers(gpkg: Path) -> list[str]:
    return [str(name) for name, geom in pyogrio.list_layers(gpkg) if geom is not None
            and name != "layer_styles"]


def _close(a, b, tol=6) -> bool:
    return all(abs(int(x) - int(y)) <= tol for x, y in zip(a, b))


def test_every_result_layer_with_geometry_loads_its_style_in_qgis(rendered):
    seen = set()
    for gpkg, report in rendered.values():
        layers = _spatial_layers(gpkg)
        assert layers, gpkg
        for name in layers:
            assert style_for(name) is not None, f"{name} has no default style"
            entry = report["layers"].get(name)
            assert entry is not None, f"QGIS did not open {name}"
            assert entry["default_style_loaded"], (name, entry["message"])
            assert entry["renderer"] == "RuleRenderer", name
            assert entry["symbol_levels"], name
            seen.add(name)
    assert {"hydrants_fireflow", "findings", "nodes_max_day", "pipes_max_day",
            "nodes_network", "pipes_network"} <= seen


def test_qgis_reads_back_exactly_the_rules_we_wrote(rendered):
    for gpkg, report in rendered.values():
        for name in _spatial_layers(gpkg):
            kind, rules = style_for(name)
            want = expand_rules(kind, rules)
            got = report["layers"][name]["rules"]
            assert [r["label"] for r in got] == [w[1] for w in want], name
            assert [r["filter"] for r in got] == [w[2] for w in want], name
            for r, w in zip(got, want):
                assert r["color"] == _rgba(w[3].color), (name, r["label"])
                assert r["level"] == w[3].level, (name, r["label"])


def test_flagged_features_are_drawn_in_their_flags_colour(rendered):
    gpkg, report = rendered["town"]
    must_draw = {  # layer -> labels of rules that the sample has features for (flags)
        "nodes_max_day": {"pressure below the working minimum",
                          "not supplied (no path to a source or tank)"},
        "pipes_peak_hour": {"too fast or losing too much head", "closed"},
        "findings": {"error: must be fixed", "warning: should be checked"},
    }
    for layer, labels in must_draw.items():
        entry = report["layers"][layer]
        drawn = set()
        for sample in entry["samples"]:
            rule = entry["rules"][sample["rule"]]
            if rule["label"] in labels:
                assert _close(sample["pixel"], rule["color"]), (layer, rule, sample)
                drawn.add(rule["label"])
        assert drawn == labels, (layer, labels - drawn)
    # a hydrant failing its required flow is drawn in its NFPA 291 class colour, ringed
    hyd = report["layers"]["hydrants_fireflow"]
    failing = [s for s in hyd["samples"]
               if "fails its required flow" in hyd["rules"][s["rule"]]["label"]]
    assert failing, "no failing hydrant drawn (the sample has hydrants below their flow)"
    for s in failing:
        cls = hyd["rules"][s["rule"]]["label"].split()[1].rstrip(",")
        assert _close(s["pixel"], _rgba(NFPA_CLASS_COLORS[cls])), s
    # whatever is drawn quietly is not drawn in a flag's colour
    flags = [_rgba(PALETTE[k]) for k in ("critical", "warning", "high", "unsupplied")]
    for layer in ("nodes_max_day", "pipes_max_day"):
        entry = report["layers"][layer]
        for s in entry["samples"]:
            if entry["rules"][s["rule"]]["label"].startswith(("pressure within", "within")):
                assert not any(_close(s["pixel"], f, tol=40) for f in flags), (layer, s)


# -- without QGIS: the style documents themselves --------------------------------------------

@pytest.mark.parametrize("name", ["nodes_average_day", "pipes_peak_hour", "hydrants_fireflow",
                                  "findings", "changes", "nodes_network", "pipes_network"])
def test_style_document_is_well_formed_with_a_catch_all(name):
    kind, rules = style_for(name)
    root = ET.fromstring(style_xml(kind, rules).split(">", 1)[1])  # after the DOCTYPE
    renderer = root.find("renderer-v2")
    assert renderer is not None and renderer.get("type") == "RuleRenderer"
    written = renderer.findall("rules/rule")
    symbols = {s.get("name") for s in renderer.findall("symbols/symbol")}
    assert {r.get("symbol") for r in written} == symbols
    assert all(r.get("label") for r in written)
    # one rule catches what the others leave, so no feature goes undrawn
    assert rules[-1][1] == "ELSE"


def test_severity_colours_are_told_apart_by_lightness_too():
    """Flag colours differ in lightness as well as hue, so they stay apart for readers with a
    red-green colour-vision deficiency (relative luminance, WCAG 2 definition)."""
    def luminance(rgb):
        c = [v / 255 for v in rgb[:3]]
        c = [v / 12.92 if v <= 0.03928 else ((v + 0.055) / 1.055) ** 2.4 for v in c]
        return 0.2126 * c[0] + 0.7152 * c[1] + 0.0722 * c[2]
    lum = {k: luminance(_rgba(PALETTE[k])) for k in ("critical", "warning", "unsupplied",
                                                     "quiet")}
    ordered = sorted(lum.values())
    assert min(b - a for a, b in zip(ordered, ordered[1:])) > 0.03, lum


def test_every_rule_set_ends_in_a_quiet_or_neutral_catch_all():
    for name, (_kind, rules) in LAYER_STYLES.items():
        label, expr, sym = rules[-1]
        assert expr == "ELSE", name
        flags = {PALETTE["critical"], PALETTE["warning"]}
        assert sym.color not in flags, name
        assert isinstance(sym, Marker) or sym.level == 0


def test_findings_on_a_degenerate_line_are_written_as_points():
    import shapely

    from gridflow.findings import Findings

    f = Findings()
    f.add("zero_length_dropped", "warning", "Mains", "M-1", "both ends snapped to one node",
          shapely.LineString([(5, 5), (5, 5)]))
    f.add("x", "info", "Mains", "M-2", "a line", shapely.LineString([(0, 0), (1, 0)]))
    f.add("y", "info", "Mains", "M-3", "no place")
    gdf = f.to_geodataframe()
    assert gdf.geometry.iloc[0].equals(shapely.Point(5, 5))
    assert gdf.geometry.iloc[1].geom_type == "LineString"
    assert gdf.geometry.iloc[2] is None
