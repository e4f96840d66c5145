"""Well-known binary for the writer, made from coordinate arrays.

A layer of points or of line strings (each with a vertex count of its own) is encoded with a
few numpy passes over its coordinates: a 5- or 9-byte header per geometry (byte order, type,
vertex count) inserted into the coordinates' bytes. The bytes equal
``shapely.to_wkb(geoms)`` (little-endian, a Z flag ``0x80000000`` on the type as shapely
writes it by default); a missing geometry is a null. Anything else (empty geometries, other
types, mixed Z and 2D, M values, a big-endian machine) is left to :func:`shapely.to_wkb`.
"""

from __future__ import annotations

import sys

import numpy as np
import shapely

__all__ = ["wkb_array"]

_POINT, _LINESTRING = 0, 1  # shapely's type ids
_Z_FLAG = 0x80000000


def wkb_array(geoms):
    """``pyarrow.array(shapely.to_wkb(geoms), type=pyarrow.binary())``, the same values.

    Parameters
    ----------
    geoms : ndarray of shapely geometries (None where missing)

    Returns
    -------
    pyarrow.BinaryArray
    """
    import pyarrow as pa

    g = np.asarray(geoms, dtype=object)
    fast = _encode(g)
    if fast is None:
        return pa.array(shapely.to_wkb(g), type=pa.binary())
    data, offsets, valid = fast
    n = len(g)
    bitmap = None if valid.all() else pa.py_buffer(np.packbits(valid, bitorder="little"))
    return pa.Array.from_buffers(pa.binary(), n, [bitmap, pa.py_buffer(offsets),
                                                  pa.py_buffer(data)],
                                 null_count=int(n - valid.sum()))


def _encode(g: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
    """``(bytes, int32 offsets, present)`` for a simple layer, else None."""
    if sys.byteorder != "little" or not len(g):
        return None
    tid = shapely.get_type_id(g)
    valid = tid >= 0
    kinds = np.unique(tid[valid])
    if len(kinds) != 1 or kinds[0] not in (_POINT, _LINESTRING):
        return None
    geo = g[valid]
    if shapely.is_empty(geo).any() or shapely.has_m(geo).any():
        return None
    hz = shapely.has_z(geo)
    if hz.any() and not hz.all():
        return None
    z = bool(hz.all()) if len(hz) else False
    xyz, owner = shapely.get_coordinates(geo, include_z=z, return_index=True)
    line = kinds[0] == _LINESTRING
    count = np.bincount(owner, minlength=len(geo))
    if not line and not (count == 1).all():
        return None
    head_len = 9 if line else 5
    dims = 3 if z else 2
    size = head_len + 8 * dims * count
    total = int(size.sum())
    if total >= 2**31:  # binary offsets are int32
        return None
    header = np.zeros(len(geo), dtype=np.dtype([("order", "u1"), ("type", "<u4"),
                                                ("n", "<u4")][:3 if line else 2]))
    header["order"] = 1  # little-endian
    header["type"] = (2 if line else 1) | (_Z_FLAG if z else 0)
    if line:
        header["n"] = count
    row_size = np.zeros(len(g), dtype=np.int64)
    row_size[valid] = size
    offsets = np.zeros(len(g) + 1, dtype=np.int32)
    np.cumsum(row_size, out=offsets[1:])
    # each geometry: its header, then its coordinates' bytes (in the order shapely gives them)
    coords = np.ascontiguousarray(xyz, dtype="<f8").view(np.uint8).ravel()
    if not line:  # points: rows of one size, header and coordinates side by side
        data = np.empty((len(geo), size[0] if len(geo) else 0), dtype=np.uint8)
        data[:, :head_len] = header.view(np.uint8).reshape(len(geo), head_len)
        data[:, head_len:] = coords.reshape(len(geo), -1)
        return data.ravel(), offsets, valid
    runs = np.empty((len(geo), 2), dtype=np.int64)  # per geometry: header bytes, coordinates'
    runs[:, 0] = head_len
    runs[:, 1] = size - head_len
    is_head = np.repeat(np.tile(np.array([True, False]), len(geo)), runs.ravel())
    data = np.empty(total, dtype=np.uint8)
    data[is_head] = header.view(np.uint8)
    data[~is_head] = coords
    return data, offsets, valid
