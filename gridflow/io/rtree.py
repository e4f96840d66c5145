"""A GeoPackage layer's spatial index, built packed from its features' bounding boxes.

A GeoPackage keeps each layer's spatial index in an SQLite R*Tree (the GeoPackage "RTree
Spatial Indexes" extension: a virtual table ``rtree_<table>_<column>`` with columns ``id,
minx, maxx, miny, maxy``, and triggers that keep it in step with the table). GDAL fills it
feature by feature as it writes; on a run's large layers that cost about as much as writing the
features themselves (measured: 400k points and 400k lines written with our settings in 4.2-5.1 s
with the index, 2.6-2.7 s without).

:func:`add_spatial_indexes` builds the same index afterwards in one pass: the tree is packed
bottom-up (Sort-Tile-Recursive: boxes sorted into vertical slices by their centre's x, each
slice by y, cut into full nodes; the level above packs those nodes' boxes the same way) and its
nodes are written straight into the R*Tree's own tables in SQLite's node format:

- each node is a blob of the tree's node size: 2 bytes (big-endian) holding the tree's depth in
  the root (unused elsewhere), 2 bytes the entry count, then per entry an 8-byte id (a feature's
  id in a leaf, a child node's number above) and four 4-byte floats ``minx, maxx, miny, maxy``;
  zeros after the last entry; the root is node 1;
- ``<rtree>_rowid`` maps each feature id to its leaf node, ``<rtree>_parent`` each node but the
  root to its parent;
- a box's lower corner is rounded down and its upper corner up to 4-byte floats exactly as
  SQLite's R*Tree rounds them on insert, so the stored boxes are the ones a row-by-row insert
  stores (the tests compare them with GDAL's index of the same layer, and run SQLite's
  ``rtreecheck``).

The triggers and the ``gpkg_extensions`` row are the ones GDAL writes for the index (the
tests compare them with GDAL's), so the file is the same to any reader, and to a GIS that
edits it later.

Layers whose rows have the same boxes (a run's scenario layers share the network's geometry)
have the same index entry for entry: the first is built, the others get a copy of its tables
made by SQLite (:func:`copy_index`; found by a digest of the rounded boxes).
"""

from __future__ import annotations

import hashlib
import json
import logging
import sqlite3
from collections.abc import Sequence

import numpy as np

__all__ = ["add_spatial_indexes", "available", "IndexedLayer", "pack_boxes", "round_boxes",
           "copy_index"]

log = logging.getLogger("gridflow")

#: the node size SQLite gives a new R*Tree of 4 coordinates (4 + 51 entries x 24 bytes,
#: under the 4096-byte page's 4032): read back from the root node's length when opened
NODE_BYTES = 4 + 51 * 24
NODE_ENTRIES = 51
#: SQLite's R*Tree rounding factors (away from / towards zero by 2^-23)
_AWAY = 1.0 + 1.0 / 8388608.0
_TOWARDS = 1.0 - 1.0 / 8388608.0

_ENTRY = np.dtype([("id", ">i8"), ("minx", ">f4"), ("maxx", ">f4"), ("miny", ">f4"),
                   ("maxy", ">f4")])

_EXTENSIONS_DDL = (
    "CREATE TABLE IF NOT EXISTS gpkg_extensions (table_name TEXT,column_name TEXT,"
    "extension_name TEXT NOT NULL,definition TEXT NOT NULL,scope TEXT NOT NULL,"
    "CONSTRAINT ge_tce UNIQUE (table_name, column_name, extension_name))")

#: the index's triggers as GDAL writes them ({t}: table, {c}: geometry column, {i}: id
#: column, {r}: the R*Tree's name); the tests compare them with a GDAL-written file's
_TRIGGERS = (
    'CREATE TRIGGER "{r}_insert" AFTER INSERT ON "{t}" WHEN (new."{c}" NOT NULL AND NOT '
    'ST_IsEmpty(NEW."{c}")) BEGIN INSERT OR REPLACE INTO "{r}" VALUES (NEW."{i}",'
    'ST_MinX(NEW."{c}"), ST_MaxX(NEW."{c}"),ST_MinY(NEW."{c}"), ST_MaxY(NEW."{c}")); END',
    'CREATE TRIGGER "{r}_update6" AFTER UPDATE OF "{c}" ON "{t}" WHEN OLD."{i}" = NEW."{i}" '
    'AND (NEW."{c}" NOTNULL AND NOT ST_IsEmpty(NEW."{c}")) AND (OLD."{c}" NOTNULL AND NOT '
    'ST_IsEmpty(OLD."{c}")) BEGIN UPDATE "{r}" SET minx = ST_MinX(NEW."{c}"), maxx = '
    'ST_MaxX(NEW."{c}"),miny = ST_MinY(NEW."{c}"), maxy = ST_MaxY(NEW."{c}") WHERE id = '
    'NEW."{i}";END',
    'CREATE TRIGGER "{r}_update7" AFTER UPDATE OF "{c}" ON "{t}" WHEN OLD."{i}" = NEW."{i}" '
    'AND (NEW."{c}" NOTNULL AND NOT ST_IsEmpty(NEW."{c}")) AND (OLD."{c}" ISNULL OR '
    'ST_IsEmpty(OLD."{c}")) BEGIN INSERT INTO "{r}" VALUES (NEW."{i}",ST_MinX(NEW."{c}"), '
    'ST_MaxX(NEW."{c}"),ST_MinY(NEW."{c}"), ST_MaxY(NEW."{c}")); END',
    'CREATE TRIGGER "{r}_update2" AFTER UPDATE OF "{c}" ON "{t}" WHEN OLD."{i}" = NEW."{i}" '
    'AND (NEW."{c}" ISNULL OR ST_IsEmpty(NEW."{c}")) BEGIN DELETE FROM "{r}" WHERE id = '
    'OLD."{i}"; END',
    'CREATE TRIGGER "{r}_update5" AFTER UPDATE ON "{t}" WHEN OLD."{i}" != NEW."{i}" AND '
    '(NEW."{c}" NOTNULL AND NOT ST_IsEmpty(NEW."{c}")) BEGIN DELETE FROM "{r}" WHERE id = '
    'OLD."{i}"; INSERT OR REPLACE INTO "{r}" VALUES (NEW."{i}",ST_MinX(NEW."{c}"), '
    'ST_MaxX(NEW."{c}"),ST_MinY(NEW."{c}"), ST_MaxY(NEW."{c}")); END',
    'CREATE TRIGGER "{r}_update4" AFTER UPDATE ON "{t}" WHEN OLD."{i}" != NEW."{i}" AND '
    '(NEW."{c}" ISNULL OR ST_IsEmpty(NEW."{c}")) BEGIN DELETE FROM "{r}" WHERE id IN '
    '(OLD."{i}", NEW."{i}"); END',
    'CREATE TRIGGER "{r}_delete" AFTER DELETE ON "{t}" WHEN old."{c}" NOT NULL BEGIN DELETE '
    'FROM "{r}" WHERE id = OLD."{i}"; END',
)


class IndexedLayer:
    """What :func:`add_spatial_indexes` needs of one written layer: its table's name and the
    bounding box of each row in the order written (rounded as the index stores it; ``NaN``
    where the geometry is missing or empty), collected batch by batch while the layer is
    written. The geometry column and the id column are read from the file."""

    def __init__(self, table: str) -> None:
        self.table = table
        self.column = self.fid = ""
        self._parts: list[np.ndarray] = []
        self._rows = 0

    def add(self, bounds: np.ndarray) -> None:
        """The next rows' boxes (``shapely.bounds``: minx, miny, maxx, maxy per row), kept as
        the index's 4-byte floats (:func:`round_boxes`: minx, maxx, miny, maxy)."""
        self.add_rounded(round_boxes(np.asarray(bounds, dtype=float).reshape(-1, 4)))

    def add_rounded(self, boxes: np.ndarray) -> None:
        """The next rows' boxes, already rounded (:func:`round_boxes`)."""
        self._parts.append(boxes)
        self._rows += len(boxes)

    @property
    def rows(self) -> int:
        return self._rows

    def clear(self) -> None:
        """Let go of the boxes (after :meth:`boxes`)."""
        self._parts = []

    def boxes(self) -> np.ndarray:
        """Every row's rounded box (float32 minx, maxx, miny, maxy)."""
        if len(self._parts) > 1:
            self._parts = [np.concatenate(self._parts)]  # once, however often asked
        return self._parts[0] if self._parts else np.zeros((0, 4), np.float32)

    def key(self) -> tuple[int, bytes]:
        """The rows' count and a digest of their boxes: two layers with the same key (ids
        1..n in the same order) have the same index, entry for entry."""
        return self._rows, hashlib.blake2b(np.ascontiguousarray(self.boxes()).tobytes(),
                                           digest_size=32).digest()


def round_boxes(boxes: np.ndarray) -> np.ndarray:
    """``(minx, maxx, miny, maxy)`` as 4-byte floats, lower corners rounded down and upper
    ones up, as SQLite's R*Tree stores a double box (``boxes``: minx, miny, maxx, maxy)."""
    b = np.asarray(boxes, dtype=float)
    out = np.empty((len(b), 4), dtype=np.float32)
    for k, (col, up) in enumerate(((0, False), (2, True), (1, False), (3, True))):
        d = b[:, col]
        f = d.astype(np.float32)
        wide = f.astype(float)
        bad = (wide < d) if up else (wide > d)
        if bad.any():
            db = d[bad]
            if up:
                fac = np.where(db < 0, _TOWARDS, _AWAY)
            else:
                fac = np.where(db < 0, _AWAY, _TOWARDS)
            f[bad] = (db * fac).astype(np.float32)
        out[:, k] = f
    return out


def _str_order(box: np.ndarray, cap: int) -> np.ndarray:
    """Sort-Tile-Recursive order of boxes (float32 minx, maxx, miny, maxy): vertical slices
    of whole nodes by centre x, each slice by centre y (one sort of slice number and y)."""
    n = len(box)
    cx = box[:, 0].astype(float) + box[:, 1]
    cy = box[:, 2].astype(float) + box[:, 3]
    nodes = -(-n // cap)
    per_slice = max(1, int(np.ceil(np.sqrt(nodes)))) * cap
    slice_of = np.empty(n, dtype=float)
    slice_of[np.argsort(cx, kind="stable")] = np.arange(n) // per_slice
    lo, hi = float(cy.min()), float(cy.max())
    key = slice_of * (2.0 * (hi - lo) + 1.0) + (cy - lo)
    return np.argsort(key, kind="stable")


def pack_boxes(boxes: np.ndarray, ids: np.ndarray, cap: int = NODE_ENTRIES):
    """A packed tree of rounded boxes ``boxes`` (float32 minx, maxx, miny, maxy) with ids
    ``ids``: per level from the leaves up, ``(entries, starts)``: the level's entries
    (structured, in node order; above the leaves an entry's id is its node's position in the
    level below) and where each node's entries start. The root level has one node."""
    levels = []
    box, ident = boxes, np.asarray(ids, dtype=np.int64)
    while True:
        order = _str_order(box, cap) if len(box) > cap else np.arange(len(box))
        ent = np.empty(len(box), dtype=_ENTRY)
        ent["id"] = ident[order]
        b = box[order]
        del order
        for k, name in enumerate(("minx", "maxx", "miny", "maxy")):
            ent[name] = b[:, k]
        starts = np.arange(0, len(box), cap)
        levels.append((ent, starts))
        if len(starts) == 1:
            return levels
        box = np.column_stack([np.minimum.reduceat(b[:, 0], starts),
                               np.maximum.reduceat(b[:, 1], starts),
                               np.minimum.reduceat(b[:, 2], starts),
                               np.maximum.reduceat(b[:, 3], starts)]).astype(np.float32)
        del b
        ident = np.arange(len(starts), dtype=np.int64)  # the nodes below, by position


#: nodes made into blobs at a time, and feature ids sent to SQLite at a time
_NODE_CHUNK = 8192
_ROW_CHUNK = 262_144


def _blobs(ent: np.ndarray, starts: np.ndarray, depth: int | None):
    """Node blobs of one level in node order (``depth`` written into the root's header
    only), made a chunk of nodes at a time."""
    m = len(starts)
    ends = np.append(starts[1:], len(ent))
    for a in range(0, m, _NODE_CHUNK):
        b = min(a + _NODE_CHUNK, m)
        lo, hi = int(starts[a]), int(ends[b - 1])
        counts = ends[a:b] - starts[a:b]
        raw = np.zeros((b - a, NODE_BYTES), dtype=np.uint8)
        head = np.zeros((b - a, 2), dtype=">u2")
        head[:, 1] = counts
        if depth is not None:
            head[:, 0] = depth
        raw[:, :4] = head.view(np.uint8).reshape(b - a, 4)
        cells = raw[:, 4:].view(_ENTRY)  # (nodes, NODE_ENTRIES) entries in place
        col = np.arange(lo, hi) - np.repeat(starts[a:b], counts)
        cells[np.repeat(np.arange(b - a), counts), col] = ent[lo:hi]
        yield from (r.tobytes() for r in raw)


def _quote(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def build_index(con: sqlite3.Connection, layer: IndexedLayer) -> int:
    """Create and fill the spatial index of one layer whose rows have ids 1..n in the order
    their boxes were collected. Returns the entries written."""
    t, c = layer.table, layer.column
    r = f"rtree_{t}_{c}"
    con.execute(f"CREATE VIRTUAL TABLE {_quote(r)} USING rtree(id, minx, maxx, miny, maxy)")
    boxes = layer.boxes()
    layer.clear()
    ok = np.flatnonzero(np.isfinite(boxes).all(axis=1))
    if len(ok):
        levels = pack_boxes(boxes[ok], ok + 1)
        del boxes
        depth = len(levels) - 1
        # node numbers: the root 1, then each level below in node order
        next_no = 1
        numbers = []
        for _ent, starts in reversed(levels):
            numbers.append(np.arange(next_no, next_no + len(starts), dtype=np.int64))
            next_no += len(starts)
        numbers = numbers[::-1]  # per level, leaves first
        for lv in range(1, len(levels)):
            ent = levels[lv][0]
            ent["id"] = numbers[lv - 1][ent["id"]]
        con.execute(f"DELETE FROM {_quote(r + '_node')}")
        for lv, (ent, starts) in enumerate(levels):
            con.executemany(f"INSERT INTO {_quote(r + '_node')} VALUES (?, ?)",
                            zip(numbers[lv].tolist(),
                                _blobs(ent, starts, depth if lv == depth else None)))
            if lv > 0:
                counts = np.diff(np.append(starts, len(ent)))
                con.executemany(f"INSERT INTO {_quote(r + '_parent')} VALUES (?, ?)",
                                zip(ent["id"].astype(np.int64).tolist(),
                                    np.repeat(numbers[lv], counts).tolist()))
        # each feature's leaf node, in id order (appends to the table's B-tree), as JSON
        # arrays read by SQLite itself, a chunk of ids at a time
        leaf, starts = levels[0]
        counts = np.diff(np.append(starts, len(leaf)))
        node_of = np.zeros(int(ok[-1]) + 1, dtype=np.int64)  # 0: no box, no entry
        node_of[leaf["id"].astype(np.int64) - 1] = np.repeat(numbers[0], counts)
        del levels, leaf
        sql = (f"INSERT INTO {_quote(r + '_rowid')} SELECT key + ?, value FROM json_each(?) "
               "WHERE value > 0")
        for a in range(0, len(node_of), _ROW_CHUNK):
            part = node_of[a:a + _ROW_CHUNK].tolist()
            con.execute(sql, (a + 1, json.dumps(part, separators=(",", ":"))))
    _finish(con, layer)
    return len(ok)


def copy_index(con: sqlite3.Connection, layer: IndexedLayer, source: str) -> None:
    """Give ``layer`` a copy of the spatial index ``source`` (an R*Tree of the same file, of
    rows with the same boxes and ids: the same :meth:`IndexedLayer.key`): its tables copied
    row for row, then the layer's own triggers and catalogue entry."""
    r = f"rtree_{layer.table}_{layer.column}"
    src = source
    con.execute(f"CREATE VIRTUAL TABLE {_quote(r)} USING rtree(id, minx, maxx, miny, maxy)")
    layer.clear()
    con.execute(f"DELETE FROM {_quote(r + '_node')}")
    for shadow in ("_node", "_parent", "_rowid"):
        con.execute(f"INSERT INTO {_quote(r + shadow)} SELECT * FROM {_quote(src + shadow)}")
    _finish(con, layer)


def _finish(con: sqlite3.Connection, layer: IndexedLayer) -> None:
    """The index's triggers and its ``gpkg_extensions`` row, as GDAL writes them."""
    t, c, i = layer.table, layer.column, layer.fid
    r = f"rtree_{t}_{c}"
    for sql in _TRIGGERS:
        con.execute(sql.format(t=t.replace('"', '""'), c=c.replace('"', '""'),
                               i=i.replace('"', '""'), r=r.replace('"', '""')))
    con.execute(_EXTENSIONS_DDL)
    con.execute("INSERT INTO gpkg_extensions VALUES (?, ?, 'gpkg_rtree_index', "
                "'http://www.geopackage.org/spec120/#extension_rtree', 'write-only')",
                (t, c))


def _has_table(con: sqlite3.Connection, name: str) -> bool:
    return con.execute("SELECT 1 FROM sqlite_master WHERE type = 'table' AND name = ?",
                       (name,)).fetchone() is not None


def _one(con: sqlite3.Connection, sql: str, arg: str) -> str:
    got = con.execute(sql, (arg,)).fetchall()
    if len(got) != 1:
        raise RuntimeError(f"{sql!r} with {arg!r}: {len(got)} rows, expected 1")
    return str(got[0][0])


def available() -> bool:
    """True when Python's SQLite has the R*Tree module and JSON functions this needs."""
    global _AVAILABLE
    if _AVAILABLE is None:
        try:
            con = sqlite3.connect(":memory:")
            try:
                con.execute("CREATE VIRTUAL TABLE t USING rtree(id, a, b, c, d)")
                con.execute("SELECT key, value FROM json_each('[1]')").fetchall()
            finally:
                con.close()
            _AVAILABLE = True
        except sqlite3.Error:
            _AVAILABLE = False
    return _AVAILABLE


_AVAILABLE: bool | None = None


def add_spatial_indexes(path: str, layers: Sequence[IndexedLayer],
                        built: dict[tuple[int, bytes], str] | None = None) -> None:
    """Build the spatial index of each of ``layers`` in the GeoPackage at ``path`` (written
    without them), in one transaction; the file is left without journal or sync, as the rest
    of the write (the caller syncs it).

    ``built``: the indexes of this file already built, by :meth:`IndexedLayer.key`; a layer
    whose rows have the boxes of one of them (a run's scenario layers share the network's
    geometry) gets a copy of that index (:func:`copy_index`), and each layer indexed here is
    added to it."""
    con = sqlite3.connect(path, isolation_level=None)
    try:
        con.execute("PRAGMA journal_mode=OFF")
        con.execute("PRAGMA synchronous=OFF")
        con.execute("PRAGMA cache_size=-32768")
        con.execute("BEGIN")
        for layer in layers:
            layer.column = _one(con, "SELECT column_name FROM gpkg_geometry_columns WHERE "
                                "lower(table_name) = lower(?)", layer.table)
            layer.fid = _one(con, "SELECT name FROM pragma_table_info(?) WHERE pk = 1",
                             layer.table)
            n = layer.rows
            # the rows must have ids 1..n in the order written: GDAL's kept feature count,
            # or a count of the table where it keeps none, and the smallest and largest id
            count = con.execute("SELECT feature_count FROM gpkg_ogr_contents WHERE "
                                "lower(table_name) = lower(?)", (layer.table,)).fetchone() \
                if _has_table(con, "gpkg_ogr_contents") else None
            if count is None or count[0] is None:
                count = con.execute(f"SELECT count(*) FROM {_quote(layer.table)}").fetchone()
            lo, hi = con.execute(f"SELECT min({_quote(layer.fid)}), max({_quote(layer.fid)}) "
                                 f"FROM {_quote(layer.table)}").fetchone()
            if count[0] != n or (n and (lo != 1 or hi != n)):
                raise RuntimeError(f"layer {layer.table}: {count[0]} rows with ids {lo}..{hi}, "
                                   f"expected 1..{n}")
            key = layer.key() if built is not None else None
            if key is not None and built is not None and key in built:
                copy_index(con, layer, built[key])
            else:
                build_index(con, layer)
            if key is not None and built is not None:
                built.setdefault(key, f"rtree_{layer.table}_{layer.column}")
        con.execute("COMMIT")
    except BaseException:
        if con.in_transaction:
            con.execute("ROLLBACK")
        raise
    finally:
        con.close()
