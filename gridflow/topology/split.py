"""Stage 4 of the topology: the mains split at their events into pipe pieces."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from gridflow.topology.idtext import as_text
from gridflow.topology.lines import split_lines
from gridflow.topology.records import Attached, Snapped, Split

__all__ = ["split_mains"]


def split_mains(sn: Snapped, at: Attached) -> Split:
    """Stage 4: pieces of each main between its events; a split main's pieces carry its id
    with a suffix (``<id>.1``, ``<id>.2`` ...), as Arrow text."""
    n = len(sn.geoms)
    pieces, p_line, p_k = split_lines(sn.geoms, at.ev_line, at.ev_s, at.ev_xy,
                                      verts=sn.vertices, lengths=sn.length_m)
    n_ev = np.bincount(at.ev_line, minlength=n)
    ev_before = np.concatenate([[0], np.cumsum(n_ev)[:-1]])
    last = p_k == n_ev[p_line]
    first = p_k == 0
    e_end = ev_before[p_line] + p_k  # event ending this piece (when not last)
    ev_up = np.r_[at.ev_up, -1].astype(np.int64)  # a sentinel keeps the indexing in range
    ev_down = np.r_[at.ev_down, -1].astype(np.int64)
    p_from = np.where(first, at.start_key[p_line], ev_down[np.maximum(e_end - 1, 0)])
    p_to = np.where(last, at.end_key[p_line], ev_up[np.minimum(e_end, len(ev_up) - 1)])
    split_n = n_ev[p_line] > 0
    pid = pa.array(as_text(sn.ids), type=pa.large_string()).take(pa.array(p_line))
    if split_n.any():  # "<id>.<k>": made for every piece by Arrow, kept for split mains
        k = pa.array(p_k + 1).cast(pa.large_string())
        dot = pa.scalar(".", pa.large_string())
        pid = pc.if_else(pa.array(split_n), pc.binary_join_element_wise(pid, k, dot), pid)
    return Split(pieces=pieces, line=p_line, from_key=p_from.astype(np.int64),
                 to_key=p_to.astype(np.int64), pipe_id=pid)
