"""Report figures: maps, HGL profile, pressure histograms, as embedded PNG data URIs.

Figures are made with :class:`matplotlib.figure.Figure` (no pyplot state, Agg rendering) from
the network arrays; maps draw the geometry of :mod:`gridflow.report.geometry` (a budget of
mains, points aggregated on a grid where there are many), so their cost does not grow with the
network. Each function returns a ``data:image/png;base64,...`` string.
"""

from __future__ import annotations

import base64
import io
from collections.abc import Sequence

import numpy as np
import pandas as pd
from matplotlib.axes import Axes
from matplotlib.collections import LineCollection
from matplotlib.colors import Normalize, to_rgba
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

from gridflow.report import palette as pal
from gridflow.report.data import ReportData
from gridflow.report.fields import Fields
from gridflow.report.geometry import (
    MAX_POINTS,
    MAX_SEGMENTS,
    cells_image,
    extent,
    grid_min,
    pick,
    raster_lines,
)

__all__ = [
    "findings_map",
    "flagged_pipes_map",
    "hgl_figure",
    "hydrants_map",
    "pressure_histograms",
    "pressure_maps",
    "to_data_uri",
]

DPI = 80
_RASTERS: dict[tuple, tuple[np.ndarray, tuple[float, float, float, float]]] = {}


def to_data_uri(fig: Figure, *, tight: bool = True) -> str:
    """Render a figure to PNG and return it as a data URI (``tight``: trim the margins, at the
    cost of a second drawing; maps are laid out to fit and skip it)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI, facecolor=pal.PAPER,
                bbox_inches="tight" if tight else None, metadata={"Software": None})
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def _marker_size(n: int) -> float:
    return float(np.clip(2500.0 / max(n, 1), 2.0, 30.0))


def _line_width(n: int) -> float:
    return float(np.clip(300.0 / max(n, 1) ** 0.5, 0.3, 1.6))


def _segments(d: ReportData, idx: np.ndarray) -> np.ndarray:
    xy = d.node_xy
    assert xy is not None
    net = d.network
    return np.stack([xy[net.from_idx[idx]], xy[net.to_idx[idx]]], axis=1)


def _base(ax, d: ReportData, *, color=pal.PIPE_BACKGROUND) -> None:
    """The mains: vector segments on a small network, a raster of every main on a large one."""
    assert d.node_xy is not None
    net = d.network
    ext = extent(d.node_xy)
    if net.n_links <= MAX_SEGMENTS:
        idx = np.arange(net.n_links)
        ax.add_collection(LineCollection(list(_segments(d, idx)), colors=color,
                                         linewidths=_line_width(len(idx)), zorder=1))
    else:
        key = (color, ext, net.n_links, float(np.nansum(d.node_xy)),
               int(net.from_idx.sum()), int(net.to_idx.sum()))
        if key not in _RASTERS:  # one raster per report and colour, shared by its maps
            _RASTERS.clear()
            img, size = raster_lines(d.node_xy[net.from_idx], d.node_xy[net.to_idx], ext)
            rgba = np.zeros((*img.shape, 4), dtype=np.float32)
            rgba[img] = to_rgba(color)
            ny, nx = img.shape
            _RASTERS[key] = (rgba, (ext[0], ext[0] + nx * size, ext[1], ext[1] + ny * size))
        rgba, box = _RASTERS[key]
        ax.imshow(rgba, extent=box, origin="lower", interpolation="nearest", zorder=1)
    x0, y0, x1, y1 = ext
    pad = 0.03 * max(x1 - x0, y1 - y0, 1.0)
    ax.set_xlim(x0 - pad, x1 + pad)
    ax.set_ylim(y0 - pad, y1 + pad)
    ax.set_aspect("equal")
    ax.set_axis_off()


def _aspect(d: ReportData) -> float:
    """Height over width of the network's extent, kept between 0.35 and 1.3."""
    assert d.node_xy is not None
    x0, y0, x1, y1 = extent(d.node_xy)
    ratio = (y1 - y0) / max(x1 - x0, 1e-9)
    return float(np.clip(ratio, 0.35, 1.3)) if np.isfinite(ratio) else 0.8


def _map_figure(d: ReportData) -> tuple[Figure, Axes]:
    """A figure sized to the network's extent, with room for a legend on the right."""
    fig = Figure(figsize=(9.0, 0.6 + 6.5 * _aspect(d)))
    ax = fig.add_axes((0.02, 0.04, 0.72, 0.88))
    return fig, ax


def _legend(ax, handles) -> None:
    """Legend beside the map, never over the network."""
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=8,
              frameon=False, borderaxespad=0.0)


def _crs_note(fig: Figure, d: ReportData) -> None:
    if d.crs:
        fig.text(0.01, 0.005, f"CRS: {d.crs}", fontsize=7, color=pal.MUTED)


def _cells(ax, xy, value, ext, norm) -> None:
    """Aggregated points: one square per occupied cell, coloured by its lowest value."""
    g = grid_min(xy, value, ext)
    img = cells_image(g, ext)
    ny, nx = img.shape
    ax.imshow(img, cmap=pal.PRESSURE_CMAP, norm=norm, origin="lower", interpolation="nearest",
              extent=(ext[0], ext[0] + nx * g.size, ext[1], ext[1] + ny * g.size), zorder=3)


def pressure_maps(d: ReportData) -> str:
    """Pressure at supplied junctions, one panel per scenario, one shared colour scale.

    Above :data:`MAX_POINTS` junctions, each panel shows the lowest pressure per grid cell.
    """
    f, net, xy = d.fields, d.network, d.node_xy
    assert xy is not None
    names = [s.name for s in d.scenarios]
    ncols = min(3, len(names))
    nrows = int(np.ceil(len(names) / ncols))
    fig = Figure(figsize=(4.6 * ncols, (4.2 * _aspect(d) + 0.6) * nrows + 0.3))
    axes = np.atleast_1d(fig.subplots(nrows, ncols, squeeze=False)).ravel()
    vals = [d.conv(np.where(s.junction, s.result.pressure_m, np.nan), "pressure")
            for s in d.scenarios]
    allv = np.concatenate([v[np.isfinite(v)] for v in vals]) if vals else np.array([0.0])
    lo, hi = (np.percentile(allv, [1, 99]) if allv.size else (0.0, 1.0))
    norm = Normalize(vmin=min(lo, hi - 1e-9), vmax=hi)
    ext = extent(xy)
    fixed = net.is_fixed
    for ax, s, v in zip(axes, d.scenarios, vals):
        _base(ax, d)
        j = np.flatnonzero(s.junction)
        if j.size > MAX_POINTS:
            _cells(ax, xy[j], v[j], ext, norm)
        elif j.size:
            ax.scatter(xy[j, 0], xy[j, 1], c=v[j], cmap=pal.PRESSURE_CMAP, norm=norm,
                       s=_marker_size(j.size), zorder=3, linewidths=0)
        off = pick(np.zeros(net.n_nodes), s.unsupplied)
        if off.size:
            ax.scatter(xy[off, 0], xy[off, 1], facecolors="none", edgecolors=pal.MUTED,
                       s=_marker_size(off.size), zorder=3)
        if fixed.any():
            ax.scatter(xy[fixed, 0], xy[fixed, 1], color=pal.INK, marker="s", s=40, zorder=4)
        ax.set_title(s.name, fontsize=10, color=pal.INK)
    for ax in axes[len(names):]:
        ax.set_axis_off()
    sm = _scalar_mappable(norm)
    cb = fig.colorbar(sm, ax=list(axes[: len(names)]), shrink=0.9, fraction=0.03, pad=0.02)
    cb.set_label(f"pressure [{f.u_pressure}]")
    _crs_note(fig, d)
    return to_data_uri(fig, tight=False)


def _scalar_mappable(norm):
    from matplotlib.cm import ScalarMappable

    sm = ScalarMappable(norm=norm, cmap=pal.PRESSURE_CMAP)
    sm.set_array([])
    return sm


def flagged_pipes_map(d: ReportData, velocity_flag: np.ndarray,
                      headloss_flag: np.ndarray) -> str:
    """Pipes flagged in any scenario: high velocity, high unit head loss, or both."""
    fig, ax = _map_figure(d)
    _base(ax, d)
    both = velocity_flag & headloss_flag
    handles = []
    lw = 3 * _line_width(min(d.network.n_links, 20_000))
    for key, mask, label in (("high_velocity", velocity_flag & ~both, "high velocity"),
                             ("high_headloss", headloss_flag & ~both, "high unit head loss"),
                             ("both", both, "both")):
        idx = np.flatnonzero(mask)
        if idx.size:
            ax.add_collection(LineCollection(list(_segments(d, idx)), colors=pal.FLAG[key],
                                             linewidths=lw, zorder=3))
        handles.append(Line2D([], [], color=pal.FLAG[key], lw=3,
                              label=f"{label} ({idx.size})"))
    handles.append(Line2D([], [], color=pal.PIPE_BACKGROUND, lw=2, label="not flagged"))
    _legend(ax, handles)
    ax.set_title("Pipes flagged in any scenario", fontsize=10, color=pal.INK)
    _crs_note(fig, d)
    return to_data_uri(fig, tight=False)


def findings_map(d: ReportData, xy: np.ndarray, severity: np.ndarray) -> str:
    """Findings with a location (one representative point each), by severity."""
    fig, ax = _map_figure(d)
    _base(ax, d)
    handles = []
    for sev in ("warning", "error"):
        m = (severity == sev) & np.isfinite(xy).all(axis=1)
        col = pal.SEVERITY[sev]
        if m.any():
            ax.scatter(xy[m, 0], xy[m, 1], color=col, edgecolors=pal.INK, linewidths=0.5,
                       marker="D", s=45, zorder=4)
        handles.append(Line2D([], [], color=col, marker="D", lw=0,
                              label=f"{sev} ({int((severity == sev).sum())})"))
    _legend(ax, handles)
    located = int(np.isfinite(xy).all(axis=1).sum())
    ax.set_title(f"Findings with a location ({located} of {len(severity)})", fontsize=10,
                 color=pal.INK)
    _crs_note(fig, d)
    return to_data_uri(fig, tight=False)


def hydrants_map(d: ReportData, xy: np.ndarray, cls: np.ndarray, fail: np.ndarray) -> str:
    """Hydrants by fire-flow class; those short of their required flow ringed."""
    fig, ax = _map_figure(d)
    _base(ax, d)
    size = 2.5 * _marker_size(len(cls))
    if fail.any():
        ax.scatter(xy[fail, 0], xy[fail, 1], facecolors="none", edgecolors=pal.FAIL_RING,
                   linewidths=1.8, s=size * 3.2, zorder=3)
    if len(cls):
        colors = [pal.FIRE_CLASS.get(c, pal.FIRE_CLASS[""]) for c in cls]
        ax.scatter(xy[:, 0], xy[:, 1], c=colors, edgecolors=pal.INK, linewidths=0.4, s=size,
                   zorder=4)
    handles = [Line2D([], [], color=pal.FIRE_CLASS[c], marker="o", lw=0,
                      label=f"class {c} ({int((cls == c).sum())})") for c in ("AA", "A", "B", "C")]
    handles.append(Line2D([], [], color="none", marker="o", markeredgecolor=pal.FAIL_RING,
                          markersize=11, lw=0, label=f"below required flow ({int(fail.sum())})"))
    _legend(ax, handles)
    ax.set_title("Hydrants by fire-flow class (available flow at the residual target)",
                 fontsize=10, color=pal.INK)
    _crs_note(fig, d)
    return to_data_uri(fig, tight=False)


def hgl_figure(profile: pd.DataFrame, f: Fields, *, title: str,
               min_pressure: float | None = None) -> str:
    """Ground, hydraulic grade line and pressure-rating limit along the profile path."""
    fig = Figure(figsize=(10.0, 4.6))
    ax = fig.subplots()
    x = profile[f"distance_{f.u_len}"].to_numpy(float)
    ground = profile[f.elevation].to_numpy(float)
    head = profile[f.head].to_numpy(float)
    rating = profile[f"rating_head_{f.u_len}"].to_numpy(float)
    low = np.nanmin(np.r_[ground, head])  # a grade line below ground must stay visible
    top = np.nanmax(np.r_[ground, head])
    floor = low - 0.1 * max(top - low, 1.0)
    ax.fill_between(x, floor, ground, color=pal.GROUND_FILL, zorder=1)
    ax.plot(x, ground, color=pal.GROUND_EDGE, lw=1.4, label="ground", zorder=2)
    ax.plot(x, head, color=pal.HGL_LINE, lw=2.2, marker="o", ms=3.5,
            label="hydraulic grade line", zorder=4)
    if np.isfinite(rating).any():
        ax.plot(x, rating, color=pal.RATING_LINE, lw=1.4, ls="--",
                label="pipe pressure-rating limit (ground + rating as head)", zorder=3)
    if min_pressure is not None:
        ax.plot(x, ground + min_pressure * f.head_per_pressure, color=pal.MIN_PRESSURE_LINE,
                lw=1.2, ls=":", label="ground + minimum pressure", zorder=3)
    ids = profile["node_id"].astype(str).to_numpy()
    for k in ({0, len(ids) - 1} | set(np.flatnonzero(np.isfinite(head)
                                                     & (head == np.nanmin(head))).tolist())):
        ax.annotate(ids[k], (x[k], head[k]), textcoords="offset points", xytext=(0, 8),
                    ha="center", fontsize=8, color=pal.INK)
    ax.set_xlabel(f"distance along path [{f.u_len}]")
    ax.set_ylabel(f"elevation / head [{f.u_len}]")
    ax.set_ylim(bottom=floor)
    ax.grid(True, color="#e4e7eb", lw=0.6)
    ax.legend(loc="best", fontsize=8)
    ax.set_title(title, fontsize=10, color=pal.INK)
    fig.subplots_adjust(left=0.08, right=0.98, bottom=0.12, top=0.9)
    return to_data_uri(fig, tight=False)


def pressure_histograms(d: ReportData, lines: Sequence[tuple[str, float]] = ()) -> str:
    """Distribution of pressure at supplied junctions, one panel per scenario."""
    f = d.fields
    names = [s.name for s in d.scenarios]
    fig = Figure(figsize=(9.0, 2.3 * len(names) + 0.6))
    axes = np.atleast_1d(fig.subplots(len(names), 1, sharex=True, squeeze=False)).ravel()
    vals = {s.name: d.conv(s.result.pressure_m[s.junction], "pressure") for s in d.scenarios}
    allv = np.concatenate(list(vals.values())) if vals else np.array([])
    allv = allv[np.isfinite(allv)]
    edges = np.histogram_bin_edges(allv if allv.size else [0.0, 1.0], bins=30)
    for k, (ax, name) in enumerate(zip(axes, names)):
        v = vals[name][np.isfinite(vals[name])]
        counts, _ = np.histogram(v, bins=edges)
        ax.stairs(counts, edges, fill=True,
                  color=pal.SCENARIO_CYCLE[k % len(pal.SCENARIO_CYCLE)])
        for j, (label, value) in enumerate(lines):
            ax.axvline(value, color=pal.INK, ls=["--", ":", "-.", (0, (5, 2))][j % 4], lw=1.0,
                       label=label if k == 0 else None)
        ax.set_ylabel("nodes")
        ax.set_title(f"{name}: {v.size} supplied junctions", fontsize=9, color=pal.INK,
                     loc="left")
        ax.grid(True, axis="y", color="#e4e7eb", lw=0.6)
    axes[-1].set_xlabel(f"pressure [{f.u_pressure}]")
    if lines:
        axes[0].legend(fontsize=8, loc="upper left")
    fig.tight_layout()
    return to_data_uri(fig, tight=False)
