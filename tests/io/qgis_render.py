"""Open a result GeoPackage in QGIS (headless), load each layer's default style, render it.

Run by the system Python that has Debian's ``python3-qgis`` (not the project's venv):

    QT_QPA_PLATFORM=offscreen /usr/bin/python3 qgis_render.py RESULTS.gpkg OUT.json [PNG_DIR]

For every layer with geometry it writes to OUT.json: whether a default style loaded, the
renderer type, its rules (label, filter, symbol colour, symbol level), and per rule one sample:
a feature that matches that rule and no other (drawn alone in a 40 m window around it, no other
feature of the layer within 3 m), with the RGBA of the rendered pixel at the feature (its point,
or the middle of its line). The test compares those with the styles gridflow meant to store.
"""

from __future__ import annotations

import json
import os
import sys

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

from qgis.core import (  # noqa: E402
    QgsApplication,
    QgsExpression,
    QgsExpressionContext,
    QgsExpressionContextUtils,
    QgsFeatureRequest,
    QgsMapRendererSequentialJob,
    QgsMapSettings,
    QgsPointXY,
    QgsRectangle,
    QgsVectorLayer,
)
from qgis.PyQt.QtCore import QSize  # noqa: E402
from qgis.PyQt.QtGui import QColor  # noqa: E402

WINDOW_M = 40.0
ALONE_M = 3.0
PIXELS = 400


def _anchor(geom):
    """The point of a feature to sample: the point itself, or the middle of its line."""
    if geom.type() == 0:  # point
        return geom.asPoint() if not geom.isMultipart() else geom.asMultiPoint()[0]
    return geom.interpolate(geom.length() / 2.0).asPoint()


def _render(layer, center: QgsPointXY, png: str | None):
    settings = QgsMapSettings()
    settings.setLayers([layer])
    settings.setDestinationCrs(layer.crs())
    settings.setBackgroundColor(QColor(255, 255, 255))
    settings.setOutputSize(QSize(PIXELS, PIXELS))
    settings.setOutputDpi(96)
    half = WINDOW_M / 2.0
    settings.setExtent(QgsRectangle(center.x() - half, center.y() - half,
                                    center.x() + half, center.y() + half))
    job = QgsMapRendererSequentialJob(settings)
    job.start()
    job.waitForFinished()
    image = job.renderedImage()
    if png:
        image.save(png)
    pixel = settings.mapToPixel().transform(center)
    color = QColor(image.pixel(int(round(pixel.x())), int(round(pixel.y()))))
    return [color.red(), color.green(), color.blue(), color.alpha()]


def _describe(layer, png_dir: str | None) -> dict:
    renderer = layer.renderer()
    out: dict = {"renderer": renderer.type() if renderer else None, "rules": [],
                 "features": layer.featureCount()}
    if renderer is None or renderer.type() != "RuleRenderer":
        return out
    out["symbol_levels"] = bool(renderer.usingSymbolLevels())
    rules = renderer.rootRule().children()
    ctx = QgsExpressionContext()
    ctx.appendScopes(QgsExpressionContextUtils.globalProjectLayerScopes(layer))
    exprs = []
    for rule in rules:
        sym = rule.symbol()
        out["rules"].append({
            "label": rule.label(), "filter": rule.filterExpression(),
            "is_else": rule.isElse(), "color": list(sym.color().getRgb()) if sym else None,
            "level": sym.symbolLayer(0).renderingPass() if sym else None,
            "symbol_type": int(sym.type()) if sym else None,
        })
        exprs.append(None if rule.isElse() else QgsExpression(rule.filterExpression()))
    # which rules each feature matches (the ELSE rule: none of the others)
    matches: dict[int, list] = {i: [] for i in range(len(rules))}
    for feat in layer.getFeatures(QgsFeatureRequest().setOrderBy(
            QgsFeatureRequest.OrderBy([QgsFeatureRequest.OrderByClause("$id")]))):
        if not feat.hasGeometry() or (feat.geometry().type() == 1
                                      and feat.geometry().length() < 2 * ALONE_M):
            continue
        ctx.setFeature(feat)
        hit = [i for i, e in enumerate(exprs) if e is not None and bool(e.evaluate(ctx))]
        if not hit:
            hit = [i for i, e in enumerate(exprs) if e is None]
        if len(hit) == 1 and len(matches[hit[0]]) < 40:
            matches[hit[0]].append(feat)
    samples = []
    for i, feats in matches.items():
        for feat in feats:
            p = _anchor(feat.geometry())
            near = QgsRectangle(p.x() - ALONE_M, p.y() - ALONE_M, p.x() + ALONE_M,
                                p.y() + ALONE_M)
            others = sum(1 for _ in layer.getFeatures(QgsFeatureRequest().setFilterRect(near)))
            if others != 1:
                continue
            png = os.path.join(png_dir, f"{layer.name()}_{i}.png") if png_dir else None
            samples.append({"rule": i, "fid": feat.id(), "x": p.x(), "y": p.y(),
                            "pixel": _render(layer, p, png)})
            break
    out["samples"] = samples
    return out


def main() -> int:
    gpkg, out_json = sys.argv[1], sys.argv[2]
    png_dir = sys.argv[3] if len(sys.argv) > 3 else None
    app = QgsApplication([], False)
    app.initQgis()
    try:
        probe = QgsVectorLayer(gpkg, "probe", "ogr")
        names = [s.split("!!::!!")[1] for s in probe.dataProvider().subLayers()]
        report = {"qgis_version": QgsApplication.instance().applicationVersion()
                  if hasattr(QgsApplication.instance(), "applicationVersion") else "",
                  "layers": {}}
        for name in dict.fromkeys(names):
            layer = QgsVectorLayer(f"{gpkg}|layername={name}", name, "ogr")
            if not layer.isValid() or not layer.isSpatial():
                continue
            msg, loaded = layer.loadDefaultStyle()
            entry = {"default_style_loaded": bool(loaded), "message": msg,
                     "geometry_type": int(layer.geometryType())}
            entry.update(_describe(layer, png_dir))
            report["layers"][name] = entry
        with open(out_json, "w", encoding="utf-8") as fh:
            json.dump(report, fh, indent=1)
    finally:
        sys.stdout.flush()
        sys.stderr.flush()
    return 0


if __name__ == "__main__":
    code = main()
    # QGIS's own teardown can crash the interpreter after the work is done (layers and the
    # application destroyed in Python's arbitrary order); the report is written and flushed
    os._exit(code)
