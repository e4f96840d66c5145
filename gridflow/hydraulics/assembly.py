"""The pieces every solve and every check of a solution shares: the head matrix and the
residuals.

Head matrix (global gradient algorithm, Todini and Pilati, 1988): with ``w = 1/G`` per
conducting link (``G = dh/dq``), ``S = A' diag(w) A`` over all nodes, where rows of nodes
whose head is known (sources, tanks, regulated nodes, unsupplied nodes, a pinned node) are
identity rows (diagonal 1, off-diagonals explicit zeros) so the pattern never changes.

Residuals of a solution ``(q, H)``:

    mass_i = sum_out q - sum_in q + d_i        every supplied node whose head is not fixed
    error_l = h_l(q_l) - (H_from - H_to)       every open link between supplied nodes
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from gridflow.hydraulics.results import OPEN, REGULATING
from gridflow.hydraulics.sparse import FixedPatternSPD

__all__ = ["head_matrix", "Residuals", "residuals", "net_outflow", "checked_sets"]


def head_matrix(pattern: FixedPatternSPD, fr: np.ndarray, to: np.ndarray, w: np.ndarray,
                known: np.ndarray, diag_extra: np.ndarray | None = None,
                out: np.ndarray | None = None,
                free_ends: tuple[np.ndarray, np.ndarray] | None = None) -> np.ndarray:
    """Values of the head matrix on ``pattern`` for link weights ``w`` (zero on links that do
    not conduct) with identity rows at ``known`` nodes; ``diag_extra`` is added to the
    diagonal of the other rows (pressure-driven demand). ``free_ends``: ``(~known)[fr]`` and
    ``(~known)[to]`` if already known (iterations with the same known nodes)."""
    nn = pattern.n
    if free_ends is None:
        free = ~known
        free_ends = (free[fr], free[to])
    free_fr, free_to = free_ends
    wf = w * free_fr
    wt = w * free_to
    diag = np.bincount(fr, weights=wf, minlength=nn) + np.bincount(to, weights=wt, minlength=nn)
    if diag_extra is not None:
        diag += diag_extra
    off = -(wf * free_to)
    if pattern.unique_off:
        data = np.zeros(pattern.nnz) if out is None else out
        data[pattern.off_pos] = off
    else:
        data = np.bincount(pattern.off_pos, weights=off, minlength=pattern.nnz)
    data[pattern.diag_pos] = np.where(known, 1.0, diag)
    return data


def net_outflow(q: np.ndarray, fr: np.ndarray, to: np.ndarray, nn: int,
                delivered: np.ndarray | None = None) -> np.ndarray:
    """Per node: outflow through links minus inflow, plus ``delivered`` demand if given."""
    out = np.bincount(fr, weights=q, minlength=nn) - np.bincount(to, weights=q, minlength=nn)
    if delivered is not None:
        out += delivered
    return out


def checked_sets(state: np.ndarray, supplied: np.ndarray, fixed: np.ndarray, fr: np.ndarray,
                 to: np.ndarray, is_prv: np.ndarray | None = None):
    """``(free, conducting)``: nodes whose mass balance is checked (supplied, head not fixed,
    not held by a regulating valve) and links whose head loss is checked (open, both ends
    supplied)."""
    regulating = state == REGULATING
    if is_prv is not None:
        regulating &= is_prv
    pinned = fixed.copy()
    pinned[to[regulating]] = True
    free = supplied & ~pinned
    conducting = (state == OPEN) & supplied[fr] & supplied[to]
    return free, conducting


@dataclass(frozen=True)
class Residuals:
    """Residuals of a solution: per node (``mass``, m3/s) and per link (``error``, m), zero
    where not checked and infinite where a value is not finite; the largest of each and
    where."""

    mass: np.ndarray
    error: np.ndarray
    max_mass: float
    max_error: float
    worst_node: int
    worst_link: int

    def worst_nodes(self, k: int) -> np.ndarray:
        """Positions of the ``k`` nodes with the largest mass imbalance (stable order)."""
        return np.argsort(-np.abs(self.mass), kind="stable")[:k]


def residuals(headloss, q: np.ndarray, h: np.ndarray, *, fr: np.ndarray, to: np.ndarray,
              free: np.ndarray, conducting: np.ndarray, delivered: np.ndarray,
              hl: np.ndarray | None = None, outflow: np.ndarray | None = None,
              gap: np.ndarray | None = None) -> Residuals:
    """Mass and head-loss residuals of ``(q, h)``.

    ``headloss(q) -> (h, dh/dq)`` is the links' law (:meth:`LinkLaws.headloss`); ``hl`` its
    value at ``q`` if already known; ``delivered`` the demand delivered per node. If already
    known (the Newton iteration needs them too): ``outflow``, the links' net outflow per node
    at ``q`` (:func:`net_outflow` without demand), and ``gap``, ``hl - (h[fr] - h[to])``.
    """
    nn = len(h)
    if outflow is None:
        m = net_outflow(q, fr, to, nn, delivered)
    else:
        m = outflow + delivered
    m = np.where(free, m, 0.0)
    if gap is None:
        if hl is None:
            hl = headloss(q)[0]
        with np.errstate(invalid="ignore"):
            gap = hl - (h[fr] - h[to])
    e = np.where(conducting, gap, 0.0)
    am, ae = np.abs(m), np.abs(e)
    wn = int(np.argmax(am)) if nn else 0
    wl = int(np.argmax(ae)) if len(e) else 0
    # a non-finite value where it is checked is an infinite residual there (argmax finds a
    # NaN first; the full scan runs only when something is not finite)
    if (nn and not np.isfinite(am[wn])) or not np.isfinite(h).all():
        bad = free & ~(np.isfinite(m) & np.isfinite(h))
        m[bad] = np.inf
        am = np.abs(m)
        wn = int(np.argmax(am))
    if len(e) and not np.isfinite(ae[wl]):
        e[conducting & ~np.isfinite(e)] = np.inf
        ae = np.abs(e)
        wl = int(np.argmax(ae))
    return Residuals(mass=m, error=e, max_mass=float(am[wn]) if nn else 0.0,
                     max_error=float(ae[wl]) if len(e) else 0.0, worst_node=wn,
                     worst_link=wl)
