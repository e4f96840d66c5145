"""Report figures: maps, HGL profile, pressure histograms, as embedded PNG data URIs.

Figures are made with :class:`matplotlib.figure.Figure` (no pyplot state, Agg rendering) and
geopandas' plotting; each function returns a ``data:image/png;base64,...`` string.
"""

from __future__ import annotations

import base64
import io
from collections.abc import Sequence

import numpy as np
import pandas as pd
from matplotlib.axes import Axes
from matplotlib.colors import Normalize
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

from gridflow.report import palette as pal
from gridflow.report.fields import Fields

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


def to_data_uri(fig: Figure) -> str:
    """Render a figure to PNG and return it as a data URI."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI, facecolor=pal.PAPER, bbox_inches="tight",
                metadata={"Software": None})
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def _marker_size(n: int) -> float:
    return float(np.clip(2500.0 / max(n, 1), 2.0, 30.0))


def _line_width(n: int) -> float:
    return float(np.clip(300.0 / max(n, 1) ** 0.5, 0.3, 1.6))


def _base(ax, pipes, *, color=pal.PIPE_BACKGROUND) -> None:
    if pipes is not None and len(pipes):
        pipes.plot(ax=ax, color=color, linewidth=_line_width(len(pipes)), zorder=1)
    ax.set_aspect("equal")
    ax.set_axis_off()


def _aspect(gdf) -> float:
    """Height over width of the layer's extent, kept between 0.35 and 1.3."""
    try:
        x0, y0, x1, y1 = gdf.total_bounds
        ratio = (y1 - y0) / (x1 - x0)
    except (AttributeError, ValueError, ZeroDivisionError):
        return 0.8
    return float(np.clip(ratio, 0.35, 1.3)) if np.isfinite(ratio) else 0.8


def _map_figure(pipes) -> tuple[Figure, Axes]:
    """A figure sized to the network's extent, with room for a legend on the right."""
    fig = Figure(figsize=(9.0, 0.6 + 6.5 * _aspect(pipes)))
    ax = fig.add_axes((0.02, 0.04, 0.72, 0.88))
    return fig, ax


def _legend(ax, handles) -> None:
    """Legend beside the map, never over the network."""
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=8,
              frameon=False, borderaxespad=0.0)


def _crs_note(fig: Figure, gdf) -> None:
    crs = getattr(gdf, "crs", None)
    if crs is not None:
        fig.text(0.01, 0.005, f"CRS: {crs.name}", fontsize=7, color=pal.MUTED)


def pressure_maps(pipes, nodes_by_scenario: dict, f: Fields) -> str:
    """Pressure at supplied junctions, one panel per scenario, one shared colour scale."""
    names = list(nodes_by_scenario)
    ncols = min(3, len(names))
    nrows = int(np.ceil(len(names) / ncols))
    fig = Figure(figsize=(4.6 * ncols, (4.2 * _aspect(pipes) + 0.6) * nrows + 0.3))
    axes = np.atleast_1d(fig.subplots(nrows, ncols, squeeze=False)).ravel()
    vals = [n.loc[_junctions(n), f.pressure].to_numpy(float) for n in nodes_by_scenario.values()]
    allv = np.concatenate(vals) if vals else np.array([0.0])
    allv = allv[np.isfinite(allv)]
    lo, hi = (np.percentile(allv, [1, 99]) if allv.size else (0.0, 1.0))
    norm = Normalize(vmin=min(lo, hi - 1e-9), vmax=hi)
    for ax, name in zip(axes, names):
        nodes = nodes_by_scenario[name]
        _base(ax, pipes)
        j = nodes[_junctions(nodes)]
        if len(j):
            j.plot(ax=ax, column=f.pressure, cmap=pal.PRESSURE_CMAP, norm=norm,
                   markersize=_marker_size(len(j)), zorder=3)
        fixed = nodes[nodes["fixed_head"].astype(int) == 1]
        if len(fixed):
            fixed.plot(ax=ax, color=pal.INK, marker="s", markersize=40, zorder=4)
        off = nodes[nodes["supplied"].astype(int) == 0]
        if len(off):
            off.plot(ax=ax, color="none", edgecolor=pal.MUTED, marker="o",
                     markersize=_marker_size(len(off)), zorder=3)
        ax.set_title(name, fontsize=10, color=pal.INK)
    for ax in axes[len(names):]:
        ax.set_axis_off()
    sm = _scalar_mappable(norm)
    cb = fig.colorbar(sm, ax=list(axes[: len(names)]), shrink=0.9, fraction=0.03, pad=0.02)
    cb.set_label(f"pressure [{f.u_pressure}]")
    _crs_note(fig, pipes)
    return to_data_uri(fig)


def _scalar_mappable(norm):
    from matplotlib.cm import ScalarMappable

    sm = ScalarMappable(norm=norm, cmap=pal.PRESSURE_CMAP)
    sm.set_array([])
    return sm


def _junctions(nodes: pd.DataFrame) -> np.ndarray:
    fixed = nodes["fixed_head"].astype(int) == 0
    return (fixed & (nodes["supplied"].astype(int) == 1)).to_numpy()


def flagged_pipes_map(pipes, velocity_flag: np.ndarray, headloss_flag: np.ndarray) -> str:
    """Pipes flagged in any scenario: high velocity, high unit head loss, or both."""
    fig, ax = _map_figure(pipes)
    _base(ax, pipes)
    both = velocity_flag & headloss_flag
    handles = []
    for key, mask, label in (("high_velocity", velocity_flag & ~both, "high velocity"),
                             ("high_headloss", headloss_flag & ~both, "high unit head loss"),
                             ("both", both, "both")):
        if mask.any():
            pipes[mask].plot(ax=ax, color=pal.FLAG[key], linewidth=3 * _line_width(len(pipes)),
                             zorder=3)
        handles.append(Line2D([], [], color=pal.FLAG[key], lw=3,
                              label=f"{label} ({int(mask.sum())})"))
    handles.append(Line2D([], [], color=pal.PIPE_BACKGROUND, lw=2, label="not flagged"))
    _legend(ax, handles)
    ax.set_title("Pipes flagged in any scenario", fontsize=10, color=pal.INK)
    _crs_note(fig, pipes)
    return to_data_uri(fig)


def findings_map(pipes, findings) -> str:
    """Findings with a location, by severity."""
    fig, ax = _map_figure(pipes)
    _base(ax, pipes)
    located = findings[findings.geometry.notna() & ~findings.geometry.is_empty]
    handles = []
    for sev in ("info", "warning", "error"):
        part = located[located["severity"].astype(str) == sev]
        col = pal.SEVERITY[sev]
        if len(part):
            pts = part[part.geom_type.isin(["Point", "MultiPoint"])]
            other = part[~part.geom_type.isin(["Point", "MultiPoint"])]
            if len(other):
                other.plot(ax=ax, color=col, edgecolor=col, linewidth=3, alpha=0.9, zorder=3)
            if len(pts):
                pts.plot(ax=ax, color=col, edgecolor=pal.INK, linewidth=0.5, marker="D",
                         markersize=45, zorder=4)
        handles.append(Line2D([], [], color=col, marker="D", lw=0,
                              label=f"{sev} ({len(part)})"))
    _legend(ax, handles)
    ax.set_title(f"Findings with a location ({len(located)} of {len(findings)})", fontsize=10,
                 color=pal.INK)
    _crs_note(fig, pipes)
    return to_data_uri(fig)


def hydrants_map(pipes, hydrants) -> str:
    """Hydrants by fire-flow class; those short of their required flow ringed."""
    fig, ax = _map_figure(pipes)
    _base(ax, pipes)
    cls = hydrants["nfpa_class"].fillna("").astype(str)
    fail = hydrants["meets_required"].fillna(0).astype(int).to_numpy() == 0
    size = 2.5 * _marker_size(len(hydrants))
    if fail.any():
        hydrants[fail].plot(ax=ax, color="none", edgecolor=pal.FAIL_RING, linewidth=1.8,
                            markersize=size * 3.2, zorder=3)
    colors = cls.map(lambda c: pal.FIRE_CLASS.get(c, pal.FIRE_CLASS[""])).to_numpy()
    if len(hydrants):
        hydrants.plot(ax=ax, color=colors, edgecolor=pal.INK, linewidth=0.4, markersize=size,
                      zorder=4)
    handles = [Line2D([], [], color=pal.FIRE_CLASS[c], marker="o", lw=0,
                      label=f"class {c} ({int((cls == c).sum())})") for c in ("AA", "A", "B", "C")]
    handles.append(Line2D([], [], color="none", marker="o", markeredgecolor=pal.FAIL_RING,
                          markersize=11, lw=0, label=f"below required flow ({int(fail.sum())})"))
    _legend(ax, handles)
    ax.set_title("Hydrants by fire-flow class (available flow at the residual target)",
                 fontsize=10, color=pal.INK)
    _crs_note(fig, pipes)
    return to_data_uri(fig)


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
    return to_data_uri(fig)


def pressure_histograms(nodes_by_scenario: dict, f: Fields,
                        lines: Sequence[tuple[str, float]] = ()) -> str:
    """Distribution of pressure at supplied junctions, one panel per scenario."""
    names = list(nodes_by_scenario)
    fig = Figure(figsize=(9.0, 2.3 * len(names) + 0.6))
    axes = np.atleast_1d(fig.subplots(len(names), 1, sharex=True, squeeze=False)).ravel()
    vals = {n: v.loc[_junctions(v), f.pressure].to_numpy(float) for n, v in
            nodes_by_scenario.items()}
    allv = np.concatenate(list(vals.values())) if vals else np.array([])
    allv = allv[np.isfinite(allv)]
    edges = np.histogram_bin_edges(allv if allv.size else [0.0, 1.0], bins=30)
    for k, (ax, name) in enumerate(zip(axes, names)):
        v = vals[name][np.isfinite(vals[name])]
        ax.hist(v, bins=edges, color=pal.SCENARIO_CYCLE[k % len(pal.SCENARIO_CYCLE)],
                edgecolor="white", linewidth=0.5)
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
    return to_data_uri(fig)
