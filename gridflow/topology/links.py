"""Stage 6 of the topology: every link's columns, pipes first, then each device layer.

Valves and pumps are zero-length links between their two coincident nodes, from the side
upstream of their action to the side downstream (against the main's digitised direction where
``fields.direction`` says so). A PRV needs a setting (a pressure) and a throttle valve a loss
coefficient; a pump needs three curve points or a design point with a shut-off head (mapped,
or assumed by ``solver.pump_shutoff_ratio`` with a warning): where missing, an error finding
says how it is modelled instead.
"""

from __future__ import annotations

import numpy as np
import pyarrow as arrow
import shapely

from gridflow.network import (
    LINK_PIPE,
    LINK_PUMP,
    LINK_VALVE,
    STATUS_CHECK,
    STATUS_CLOSED,
    STATUS_OPEN,
    VALVE_ISOLATION,
    VALVE_PRESSURE_REDUCING,
    VALVE_THROTTLE,
    fit_pump_curve,
)
from gridflow.topology.idtext import all_distinct, as_text
from gridflow.topology.nodes import unique_ids_checked
from gridflow.topology.points import arrow_text, column, text_in
from gridflow.topology.records import (
    Attached,
    Context,
    Device,
    LinkTable,
    NodeTable,
    Snapped,
    Split,
)

__all__ = ["link_table", "CLOSED_WORDS"]

#: status words that mean closed (or, for a pump, off)
CLOSED_WORDS = ("closed", "inactive", "off", "out_of_service")
_EPS = 1e-3  # [m] shortest pipe length kept


def link_table(ctx: Context, sn: Snapped, at: Attached, sp: Split, nt: NodeTable) -> LinkTable:
    """Stage 6: the columns of every link (see :data:`COLUMNS`), ids unique."""
    df, pl = sn.frame, sp.line
    glen = shapely.length(sn.geoms) if sn.length_m is None else sn.length_m
    plen = shapely.length(sp.pieces)
    attr_len = df["length"].to_numpy(dtype=float)[pl]
    frac = plen / np.maximum(glen[pl], 1e-12)
    length = np.where(np.isfinite(attr_len) & (attr_len > 0), attr_len * frac, plen)
    length = np.maximum(length, _EPS)
    # closed per main, then spread to its pieces (the text work once per main, not per piece)
    closed = text_in(df, "status", CLOSED_WORDS)[pl]
    devices = [_device_columns(ctx, sn, d, nt) for d in at.devices]  # a few: small parts
    ids: list = [sp.pipe_id] + [dev_ids for dev_ids, _ in devices]
    cols = _Columns(len(pl), [dev_cols for _, dev_cols in devices])
    cols.put("from", nt.idx_of_key[sp.from_key])
    cols.put("to", nt.idx_of_key[sp.to_key])
    cols.fill("kind", LINK_PIPE)
    cols.put("length", length)
    del plen, attr_len, frac, length
    cols.put("diameter", df["diameter"].to_numpy(dtype=float)[pl])
    cols.put("rough", df["roughness"].to_numpy(dtype=float)[pl])
    cols.put("mk", np.nan_to_num(df["minor_loss_k"].to_numpy(dtype=float)[pl], nan=0.0))
    cols.put("status", np.where(closed, STATUS_CLOSED, STATUS_OPEN))
    cols.fill("vt", 0)
    for name in ("vs", "pa", "pb", "pc"):
        cols.fill(name, np.nan)
    cols.fill("speed", 1.0)
    cols.put("geom", sp.pieces)
    cols.put("material", df["material"].to_numpy(dtype=object)[pl])
    cols.put("year", df["install_year"].to_numpy(dtype=float)[pl])
    cols.put("rating", df["pressure_rating"].to_numpy(dtype=float)[pl])
    cols.put("zone", df["zone"].to_numpy(dtype=object)[pl])
    c = cols.done
    text = arrow.concat_arrays(ids)
    c["link_id"] = text.to_numpy(zero_copy_only=False)
    if all_distinct(c["link_id"]):  # the usual case: one hash pass, every id a str
        return LinkTable(cols=c, ids_distinct=True, id_text=text)
    c["link_id"], distinct = _link_ids_checked(c["link_id"], c["kind"])
    return LinkTable(cols=c, ids_distinct=distinct)


def _device_columns(ctx: Context, sn: Snapped, dev: Device, nt: NodeTable) -> tuple:
    """The devices' ids (Arrow text) and their other columns."""
    f, pl, li = ctx.findings, dev.points, dev.line
    fr, pts, layer, role = pl.frame, pl.pts, pl.layer, pl.role
    df = sn.frame
    m = len(li)
    id_text = arrow_text(fr.iloc[:, 0])
    if id_text is None:
        id_text = arrow.array(as_text(pl.ids), type=arrow.large_string())
    ids = _Lazy(id_text)  # Python strings only where a finding names a device
    closed = text_in(fr, "status", CLOSED_WORDS)
    main_d = df["diameter"].to_numpy(dtype=float)[li]
    kind = np.full(m, LINK_VALVE if role == "valves" else LINK_PUMP)
    vt = np.zeros(m, int)
    vs = np.full(m, np.nan)
    status = np.where(closed, STATUS_CLOSED, STATUS_OPEN)
    pa, pb, pc = (np.full(m, np.nan) for _ in range(3))
    speed = np.ones(m)
    d = main_d.copy()
    mk = np.zeros(m)
    if role == "valves":
        dv = column(fr, "diameter")
        d = np.where(np.isfinite(dv) & (dv > 0), dv, main_d)
        mk = np.nan_to_num(column(fr, "minor_loss_k"), nan=0.0)
        raw = column(fr, "setting")  # PRVs: metres of head (read converts); throttles: K
        vt[:] = VALVE_ISOLATION
        prv = text_in(fr, "type", ("prv",))
        vs[prv] = raw[prv]
        bad = prv & ~np.isfinite(vs)
        f.add_many("valve_setting_missing", "error", layer, ids[bad],
                   "pressure-reducing valve without a setting: modelled as an open valve",
                   pts[bad])
        vt[prv & ~bad] = VALVE_PRESSURE_REDUCING
        tcv = text_in(fr, "type", ("throttle",))
        vs[tcv] = raw[tcv]
        badt = tcv & ~(np.isfinite(vs) & (vs >= 0))
        f.add_many("valve_setting_missing", "error", layer, ids[badt],
                   "throttle valve without a loss coefficient setting: K = 0 used", pts[badt])
        vs[badt] = 0.0
        vt[tcv] = VALVE_THROTTLE
        status[text_in(fr, "type", ("check",)) & ~closed] = STATUS_CHECK
    else:
        sp = column(fr, "speed")
        speed = np.where(np.isfinite(sp), sp, 1.0)
        speed[closed] = 0.0
        for r in range(m):  # a few pumps per utility: not a hot path
            pts3 = [(column(fr, f"flow_{i}")[r], column(fr, f"head_{i}")[r]) for i in (1, 2, 3)]
            design = (column(fr, "design_flow")[r], column(fr, "design_head")[r])
            shut = column(fr, "shut_off_head")[r]
            try:
                if all(np.isfinite(v) for p in pts3 for v in p):
                    a, b_, c_ = fit_pump_curve(pts3, link_id=str(ids[r]))
                elif all(np.isfinite(design)):
                    if not np.isfinite(shut):
                        ratio = ctx.cfg.solver.pump_shutoff_ratio
                        shut = ratio * design[1]
                        f.add("pump_shutoff_assumed", "warning", layer, ids[r],
                              f"pump given by one design point without a shut-off head: "
                              f"{ratio:g} x the design head assumed (solver.pump_shutoff_ratio);"
                              " map layers.pumps.fields.shut_off_head for the maker's value",
                              pts[r])
                    a, b_, c_ = fit_pump_curve([design], shutoff_head_m=shut,
                                               link_id=str(ids[r]))
                else:
                    raise ValueError("no design point or three curve points")
                pa[r], pb[r], pc[r] = a, b_, c_
            except ValueError as exc:
                f.add("pump_curve_missing", "error", layer, ids[r],
                      f"pump without a usable head curve ({exc}); modelled as a closed valve",
                      pts[r])
                kind[r], vt[r], status[r], d[r] = LINK_VALVE, VALVE_ISOLATION, STATUS_CLOSED, \
                    main_d[r]
    xy = dev.xy if dev.xy is not None else shapely.get_coordinates(
        shapely.line_interpolate_point(sn.geoms[li], shapely.line_locate_point(sn.geoms[li],
                                                                                pts)))
    up, down = nt.idx_of_key[dev.up], nt.idx_of_key[dev.down]
    fi = np.where(dev.reversed, down, up)
    ti = np.where(dev.reversed, up, down)
    geom = shapely.linestrings(np.repeat(np.asarray(xy, dtype=float).reshape(m, 1, 2), 2,
                                         axis=1))
    return id_text, {"from": fi, "to": ti, "kind": kind, "length": np.zeros(m),
            "diameter": d, "rough": df["roughness"].to_numpy(dtype=float)[li], "mk": mk,
            "status": status, "vt": vt, "vs": vs, "pa": pa, "pb": pb, "pc": pc,
            "speed": speed, "geom": geom, "material": np.full(m, None, dtype=object),
            "year": np.full(m, np.nan), "rating": np.full(m, np.nan),
            "zone": df["zone"].to_numpy(dtype=object)[li]}


class _Columns:
    """The link columns, each made once at its full length: the pipes' part written into
    its head, the devices' parts after it.

    Notes
    -----
    What ``np.concatenate`` of each column's parts gives (the same values and dtype), without
    holding every pipe part at once until the columns are joined: each pipe part is a
    temporary let go as soon as it is written (or a constant filled in place), so its memory
    is used again by the next column instead of fresh pages (a page fault each; at a million
    mains these parts are hundreds of megabytes).
    """

    def __init__(self, m: int, devices: list[dict]):
        self.m = m
        self.devices = devices
        self.n = m + sum(len(d["kind"]) for d in devices)
        self.done: dict[str, np.ndarray] = {}

    def _column(self, name: str, pipe_dtype) -> np.ndarray:
        parts = [d[name] for d in self.devices]
        out = np.empty(self.n, dtype=np.result_type(pipe_dtype, *(p.dtype for p in parts)))
        at = self.m
        for p in parts:
            out[at:at + len(p)] = p
            at += len(p)
        self.done[name] = out
        return out

    def put(self, name: str, pipe: np.ndarray) -> None:
        """The column ``name``: ``pipe`` for the pipes, then each device part."""
        self._column(name, pipe.dtype)[:self.m] = pipe

    def fill(self, name: str, value) -> None:
        """The column ``name``: ``value`` for every pipe (``np.full``'s dtype for it), then
        each device part."""
        self._column(name, np.asarray(value).dtype)[:self.m] = value


class _Lazy:
    """Ids as Arrow text, turned into Python strings only for the rows asked for
    (``ids[mask]``, ``ids[r]``): the findings name a few devices."""

    def __init__(self, text):
        self.text = text

    def __getitem__(self, sel):
        if isinstance(sel, (int, np.integer)):
            return self.text[int(sel)].as_py()
        rows = np.flatnonzero(sel) if np.asarray(sel).dtype == bool else np.asarray(sel)
        return self.text.take(arrow.array(rows, type=arrow.int64())).to_numpy(zero_copy_only=False)


def _link_ids(ids: np.ndarray, kind: np.ndarray) -> np.ndarray:
    """Link ids made unique: device ids that repeat a pipe id prefixed with their kind, then
    any id still repeated suffixed (:func:`~gridflow.topology.nodes.unique_ids`)."""
    return _link_ids_checked(ids, kind)[0]


def _link_ids_checked(ids: np.ndarray, kind: np.ndarray) -> tuple[np.ndarray, bool]:
    """:func:`_link_ids`, and whether the ids returned are shown distinct as text.

    Notes
    -----
    One hash set over every link's id answers both questions in the usual case (all
    distinct: no device id is a pipe id, nothing to prefix or suffix); the sets below, and
    the full uniqueness pass, run only when that fails.
    """
    pipe = kind == LINK_PIPE
    if pipe.all():
        return unique_ids_checked(ids.astype(object))
    if all_distinct(as_text(ids)):
        return ids.astype(object).copy(), True
    pipe_text = as_text(ids[pipe])
    seen = set(pipe_text.tolist())
    dev = np.flatnonzero(~pipe)
    dev_text = as_text(ids[dev])
    hit = np.fromiter(map(seen.__contains__, dev_text.tolist()), bool, len(dev))
    out = ids.astype(object).copy()
    for k, name in ((LINK_VALVE, "valve"), (LINK_PUMP, "pump")):
        m = dev[(kind[dev] == k) & hit]
        out[m] = [f"{name}:{x}" for x in out[m]]  # a few: ids mapped twice
    dev_final = as_text(out[dev]).tolist()
    dev_set = set(dev_final)
    if len(seen) == len(pipe_text) and len(dev_set) == len(dev) and seen.isdisjoint(dev_set):
        return out, True
    return unique_ids_checked(out)
