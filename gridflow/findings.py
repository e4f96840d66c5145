"""Findings: every repair and every problem, with a location, for the ``findings`` layer.

Stages append to one :class:`Findings` log; the writer turns it into a GeoDataFrame with the
contract's fields ``kind``, ``severity``, ``layer``, ``feature_id``, ``message`` (plus
``geometry``). Appending takes arrays, so a stage reports thousands of snapped ends in one call.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Literal

import numpy as np

__all__ = ["Findings", "Severity"]

Severity = Literal["info", "warning", "error"]
log = logging.getLogger("gridflow")


@dataclass
class Findings:
    """An append-only log of findings, column-wise."""

    kind: list[str] = field(default_factory=list)
    severity: list[str] = field(default_factory=list)
    layer: list[str] = field(default_factory=list)
    feature_id: list[str] = field(default_factory=list)
    message: list[str] = field(default_factory=list)
    geometry: list = field(default_factory=list)  # shapely geometries or None

    def add(self, kind: str, severity: Severity, layer: str, feature_id, message: str,
            geometry=None) -> None:
        """Add one finding."""
        self.add_many(kind, severity, layer, [feature_id], [message], [geometry])

    def add_many(self, kind: str, severity: Severity, layer: str,
                 feature_ids: Sequence | np.ndarray,
                 messages: Sequence[str] | np.ndarray | str,
                 geometries: Sequence | np.ndarray | None = None) -> None:
        """Add one finding per feature id (``messages`` may be one string for all)."""
        n = len(feature_ids)
        if n == 0:
            return
        if isinstance(messages, str):
            messages = [messages] * n
        if geometries is None:
            geometries = [None] * n
        if not (len(messages) == n and len(geometries) == n):
            raise ValueError("feature_ids, messages and geometries must have equal length")
        self.kind.extend([kind] * n)
        self.severity.extend([severity] * n)
        self.layer.extend([layer] * n)
        self.feature_id.extend("" if f is None else str(f) for f in feature_ids)
        self.message.extend(str(m) for m in messages)
        self.geometry.extend(list(geometries))
        level = {"info": logging.DEBUG, "warning": logging.INFO, "error": logging.WARNING}
        log.log(level[severity], "%d finding(s) %s on %s", n, kind, layer)

    def extend(self, other: Findings) -> None:
        for name in ("kind", "severity", "layer", "feature_id", "message", "geometry"):
            getattr(self, name).extend(getattr(other, name))

    def __len__(self) -> int:
        return len(self.kind)

    def count(self, kind: str | None = None, severity: str | None = None) -> int:
        k = np.asarray(self.kind, dtype=object)
        s = np.asarray(self.severity, dtype=object)
        m = np.ones(len(k), bool)
        if kind is not None:
            m &= k == kind
        if severity is not None:
            m &= s == severity
        return int(m.sum())

    def to_geodataframe(self, crs=None):
        """The ``findings`` layer as a GeoDataFrame (geometry may be empty per row).

        A line of zero length (a pipe whose ends meet) is written as its point: a map draws
        nothing for a degenerate line, and the finding must be visible where it is.
        """
        import geopandas as gpd
        import shapely

        geoms = np.empty(len(self.geometry), dtype=object)
        geoms[:] = self.geometry
        lines = np.isin(shapely.get_type_id(geoms), (1, 5))
        degenerate = np.flatnonzero(lines & (shapely.length(geoms) == 0.0))
        if degenerate.size:
            xy, owner = shapely.get_coordinates(geoms[degenerate], return_index=True)
            first = np.unique(owner, return_index=True)[1]
            geoms[degenerate[owner[first]]] = shapely.points(xy[first])
        return gpd.GeoDataFrame(
            {"kind": self.kind, "severity": self.severity, "layer": self.layer,
             "feature_id": self.feature_id, "message": self.message},
            geometry=gpd.GeoSeries(geoms, crs=crs), crs=crs)
