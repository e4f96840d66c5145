"""Map geometry sized to what a map can show, not to the network.

Both the printed figures and the interactive map draw mains as straight segments between
their end nodes (the network arrays' coordinates), and draw at most a budget of features per
layer: below the budget everything is drawn; above it, the widest mains are kept (the
skeleton a planner reads), and points are aggregated on a grid of cells (each cell shows its
count and its worst value). Flagged features are chosen first, up to their own budget. The
printed maps of a large network burn every main into a raster instead (:func:`raster_lines`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["MAX_SEGMENTS", "MAX_POINTS", "GRID_CELLS", "skeleton", "pick", "grid_min",
           "GridCells", "raster_lines", "cells_image", "extent"]

MAX_SEGMENTS = 20_000  # mains drawn per map
MAX_POINTS = 12_000  # points drawn one by one per layer; more are aggregated
GRID_CELLS = 160  # cells along the longer side when points are aggregated


def skeleton(diameter_m: np.ndarray, keep: np.ndarray | None = None,
             budget: int = MAX_SEGMENTS) -> np.ndarray:
    """Positions of the mains to draw: all if few, else the widest ``budget`` (and ``keep``).

    Ties at the cut keep the lower positions, so the choice is deterministic.
    """
    n = len(diameter_m)
    if n <= budget:
        return np.arange(n)
    d = np.where(np.isfinite(diameter_m), diameter_m, 0.0)
    idx = np.argpartition(-d, budget - 1)[:budget]
    if keep is not None:
        idx = np.union1d(idx, np.flatnonzero(keep))
    return np.sort(idx)


def pick(score: np.ndarray, mask: np.ndarray, budget: int = MAX_POINTS) -> np.ndarray:
    """Positions where ``mask`` holds, the ``budget`` lowest ``score`` first if there are more."""
    idx = np.flatnonzero(mask)
    if idx.size <= budget:
        return idx
    s = np.where(np.isfinite(score[idx]), score[idx], np.inf)
    return np.sort(idx[np.argpartition(s, budget - 1)[:budget]])


@dataclass(frozen=True)
class GridCells:
    """Square cells of a grid over the points: lower-left corners, size, count, worst value."""

    x0: np.ndarray
    y0: np.ndarray
    size: float
    count: np.ndarray
    worst: np.ndarray


def grid_min(xy: np.ndarray, value: np.ndarray, extent: tuple[float, float, float, float],
             cells: int = GRID_CELLS) -> GridCells:
    """Aggregate points on a grid: per occupied cell, the count and the smallest value.

    Cells are listed by their key ``i * (cells + 2) + j`` (column ``i``, row ``j``). Points
    inside the extent fall in a grid of ``(cells + 2)**2`` cells, counted with one
    ``np.bincount`` and reduced with one ``np.minimum.at``: O(n + cells**2). Points outside it
    (or without coordinates) make the keys unbounded: then one sort, O(n log n).
    """
    x0, y0, x1, y1 = extent
    size = max(x1 - x0, y1 - y0, 1.0) / cells
    i = np.floor((xy[:, 0] - x0) / size).astype(np.int64)
    j = np.floor((xy[:, 1] - y0) / size).astype(np.int64)
    side = cells + 2
    key = i * side + j
    v = np.where(np.isfinite(value), value, np.inf)
    if bool(((i >= 0) & (i < side) & (j >= 0) & (j < side)).all()):
        count = np.bincount(key, minlength=side * side)
        occupied = np.flatnonzero(count)
        low = np.full(side * side, np.inf)
        np.minimum.at(low, key, v)
        return GridCells(x0 + occupied // side * size, y0 + occupied % side * size, size,
                         count[occupied], low[occupied])
    return _grid_min_sorted(key, v, x0, y0, size, side)


def _grid_min_sorted(key: np.ndarray, v: np.ndarray, x0: float, y0: float, size: float,
                     side: int) -> GridCells:
    """:func:`grid_min` for keys of any range: one sort by key, then value."""
    order = np.lexsort((v, key))
    k = key[order]
    first = np.r_[True, k[1:] != k[:-1]]
    starts = np.flatnonzero(first)
    count = np.diff(np.r_[starts, len(k)])
    worst = v[order][starts]
    ci, cj = k[starts] // side, k[starts] % side
    return GridCells(x0 + ci * size, y0 + cj * size, size, count, worst)


def extent(xy: np.ndarray) -> tuple[float, float, float, float]:
    """``(xmin, ymin, xmax, ymax)`` of the points with both coordinates finite; the unit square
    if there are none. One pass per coordinate column, no copy where all are finite."""
    x, y = xy[:, 0], xy[:, 1]
    ok = np.isfinite(x) & np.isfinite(y)
    if not ok.all() or not len(ok):
        if not ok.any():
            return (0.0, 0.0, 1.0, 1.0)
        x, y = x[ok], y[ok]
    return (float(x.min()), float(y.min()), float(x.max()), float(y.max()))


def raster_lines(a: np.ndarray, b: np.ndarray, ext: tuple[float, float, float, float],
                 width: int = 900) -> tuple[np.ndarray, float]:
    """Segments ``a[i] -> b[i]`` burnt into a boolean image (rows from the bottom), and the
    pixel size; pixel (0, 0) has its lower-left corner at the extent's lower-left.

    Each segment is sampled at about one point per pixel of its length (at least its two
    ends), so the cost is one vector pass over the samples: about the network's length in
    pixels, whatever the number of mains.
    """
    x0, y0, x1, y1 = ext
    size = max(x1 - x0, y1 - y0, 1e-9) / width
    nx = max(1, int(np.ceil((x1 - x0) / size)) + 1)
    ny = max(1, int(np.ceil((y1 - y0) / size)) + 1)
    pa = (a - [x0, y0]) / size
    d = (b - a) / size
    ok = np.isfinite(pa).all(axis=1) & np.isfinite(d).all(axis=1)
    pa, d = pa[ok], d[ok]
    n = np.clip(np.ceil(np.abs(d).max(axis=1)).astype(np.int64) + 1, 2, 4 * width)
    seg = np.repeat(np.arange(len(n)), n)
    start = np.cumsum(n) - n
    t = (np.arange(int(n.sum())) - start[seg]) / (n[seg] - 1)
    px = np.clip((pa[seg, 0] + t * d[seg, 0]).astype(np.int64), 0, nx - 1)
    py = np.clip((pa[seg, 1] + t * d[seg, 1]).astype(np.int64), 0, ny - 1)
    img = np.zeros(nx * ny, bool)
    img[py * nx + px] = True
    return img.reshape(ny, nx), size


def cells_image(g: GridCells, ext: tuple[float, float, float, float]) -> np.ndarray:
    """Grid cells as an image of their worst values (NaN where no cell; rows from the bottom)."""
    x0, y0, x1, y1 = ext
    nx = int(np.floor((x1 - x0) / g.size)) + 1
    ny = int(np.floor((y1 - y0) / g.size)) + 1
    img = np.full((ny, nx), np.nan)
    i = np.clip(np.round((g.x0 - x0) / g.size).astype(np.int64), 0, nx - 1)
    j = np.clip(np.round((g.y0 - y0) / g.size).astype(np.int64), 0, ny - 1)
    img[j, i] = np.where(np.isfinite(g.worst), g.worst, np.nan)
    return img
