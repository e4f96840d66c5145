"""Findings: every repair and every problem, with a location, for the ``findings`` layer.

Stages append to one :class:`Findings` log; the writer turns it into a GeoDataFrame with the
contract's fields ``kind``, ``severity``, ``layer``, ``feature_id``, ``message`` (plus
``geometry``). Appending takes arrays, so a stage reports thousands of snapped ends in one call.

Severity ``info`` marks a routine fact (a hydrant attached to its main, an end snapped within
tolerance, a dead end, an abandoned main left out): nothing for anyone to do. The log keeps
them (``gridflow check`` writes them all, as the detail an editor may want), but the run's
``findings`` layer holds only what someone should look at (``warning`` and ``error``); the
routine facts become counts, ``routine:<kind>`` in ``run_info`` and a table in the report
(:meth:`Findings.routine_counts`). The run's log is made with ``keep_routine=False``: it only
counts the routine facts (at a million mains they are millions of rows it would never write).
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Literal

import numpy as np

__all__ = ["ROUTINE_SEVERITY", "Findings", "Severity"]

Severity = Literal["info", "warning", "error"]
log = logging.getLogger("gridflow")

ROUTINE_SEVERITY: Severity = "info"  # a routine fact: counted, not a row of the run's layer


def _all_str(values: list) -> bool:
    """True when every value is a ``str`` (not a subclass); one pass in C."""
    return set(map(type, values)) <= {str}


@dataclass
class Findings:
    """An append-only log of findings, column-wise.

    ``keep_routine=False``: routine facts (severity ``info``) are counted by kind, not kept
    as rows; :meth:`routine_counts`, :meth:`count` and ``len`` include them all the same.
    """

    kind: list[str] = field(default_factory=list)
    severity: list[str] = field(default_factory=list)
    layer: list[str] = field(default_factory=list)
    feature_id: list[str] = field(default_factory=list)
    message: list[str] = field(default_factory=list)
    geometry: list = field(default_factory=list)  # shapely geometries or None
    keep_routine: bool = True
    counted: dict[str, int] = field(default_factory=dict)  # routine facts not kept, by kind

    def add(self, kind: str, severity: Severity, layer: str, feature_id, message: str,
            geometry=None) -> None:
        """Add one finding."""
        self.add_many(kind, severity, layer, [feature_id], [message], [geometry])

    def keeps(self, severity: Severity) -> bool:
        """True when findings of ``severity`` are kept as rows (their messages are read);
        False when they are only counted, so a caller may skip writing their messages."""
        return self.keep_routine or severity != ROUTINE_SEVERITY

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
        if severity == ROUTINE_SEVERITY and not self.keep_routine:
            self.counted[kind] = self.counted.get(kind, 0) + n
            log.debug("%d finding(s) %s on %s", n, kind, layer)
            return
        self.kind.extend([kind] * n)
        self.severity.extend([severity] * n)
        self.layer.extend([layer] * n)
        fids = feature_ids.tolist() if isinstance(feature_ids, np.ndarray) else list(feature_ids)
        msgs = messages.tolist() if isinstance(messages, np.ndarray) else list(messages)
        # the usual case, every id and message a str already: no conversion per row
        self.feature_id.extend(fids if _all_str(fids) else
                               ("" if f is None else str(f) for f in fids))
        self.message.extend(msgs if _all_str(msgs) else (str(m) for m in msgs))
        self.geometry.extend(list(geometries))
        level = {"info": logging.DEBUG, "warning": logging.INFO, "error": logging.WARNING}
        log.log(level[severity], "%d finding(s) %s on %s", n, kind, layer)

    def extend(self, other: Findings) -> None:
        if self.keep_routine:
            for name in ("kind", "severity", "layer", "feature_id", "message", "geometry"):
                getattr(self, name).extend(getattr(other, name))
        else:
            for i, s in enumerate(other.severity):
                self.add(other.kind[i], s, other.layer[i], other.feature_id[i],  # type: ignore[arg-type]
                         other.message[i], other.geometry[i])
        for k, c in other.counted.items():
            self.counted[k] = self.counted.get(k, 0) + c

    def __len__(self) -> int:
        return len(self.kind) + sum(self.counted.values())

    def count(self, kind: str | None = None, severity: str | None = None) -> int:
        k = np.asarray(self.kind, dtype=object)
        s = np.asarray(self.severity, dtype=object)
        m = np.ones(len(k), bool)
        if kind is not None:
            m &= k == kind
        if severity is not None:
            m &= s == severity
        extra = 0
        if severity in (None, ROUTINE_SEVERITY):
            extra = sum(c for kd, c in self.counted.items() if kind in (None, kd))
        return int(m.sum()) + extra

    def routine_counts(self) -> dict[str, int]:
        """Routine facts (severity ``info``) counted by kind, kinds in alphabetical order."""
        counts: dict[str, int] = dict(self.counted)
        for k, s in zip(self.kind, self.severity):
            if s == ROUTINE_SEVERITY:
                counts[k] = counts.get(k, 0) + 1
        return dict(sorted(counts.items()))

    def to_geodataframe(self, crs=None, *, routine: bool = True):
        """The ``findings`` layer as a GeoDataFrame (geometry may be empty per row).

        ``routine=False`` leaves out the routine facts (severity ``info``): the run's layer
        holds only what someone should look at; :meth:`routine_counts` has the rest.
        A line of zero length (a pipe whose ends meet) is written as its point: a map draws
        nothing for a degenerate line, and the finding must be visible where it is.
        """
        import geopandas as gpd
        import shapely

        keep = [i for i, s in enumerate(self.severity) if routine or s != ROUTINE_SEVERITY]

        def col(values: list) -> list:
            return values if len(keep) == len(values) else [values[i] for i in keep]

        geoms = np.empty(len(keep), dtype=object)
        geoms[:] = col(self.geometry)
        lines = np.isin(shapely.get_type_id(geoms), (1, 5))
        degenerate = np.flatnonzero(lines & (shapely.length(geoms) == 0.0))
        if degenerate.size:
            xy, owner = shapely.get_coordinates(geoms[degenerate], return_index=True)
            first = np.unique(owner, return_index=True)[1]
            geoms[degenerate[owner[first]]] = shapely.points(xy[first])
        return gpd.GeoDataFrame(
            {"kind": col(self.kind), "severity": col(self.severity), "layer": col(self.layer),
             "feature_id": col(self.feature_id), "message": col(self.message)},
            geometry=gpd.GeoSeries(geoms, crs=crs), crs=crs)
