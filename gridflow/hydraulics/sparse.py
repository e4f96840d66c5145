"""Sparse symmetric positive definite solves on a fixed pattern.

The head matrix of the global gradient algorithm keeps one sparsity pattern for every
iteration, status change and fire-flow solve (Dirichlet rows change values, never the pattern),
so the ordering and symbolic analysis are done once and each iteration pays one numeric
refactorization plus a triangular solve.

Backends, chosen by measurement (DEVELOPERS.md, ``scripts/bench_solver.py``):

- ``qdldl`` (default): LDL' with AMD ordering; ``Solver.update`` refactors on the same pattern.
- ``splu``: scipy's SuperLU with COLAMD, no symbolic reuse; a fallback and a reference.
"""

from __future__ import annotations

import threading
from typing import Literal

import numpy as np
import scipy.sparse as sp

__all__ = ["FixedPatternSPD", "Backend"]

Backend = Literal["qdldl", "splu"]


def _unique_inverse(key: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``np.unique(key, return_inverse=True)`` for integer keys, by one stable sort (a radix
    sort for integers) instead of a hash table: several times faster at millions of keys."""
    order = np.argsort(key, kind="stable")
    k = key[order]
    first = np.empty(len(k), dtype=bool)
    first[:1] = True
    np.not_equal(k[1:], k[:-1], out=first[1:])
    inverse = np.empty(len(k), dtype=np.int64)
    inverse[order] = np.cumsum(first) - 1
    return k[first], inverse


class FixedPatternSPD:
    """An upper-triangular CSC pattern and a factorization refreshed by values only.

    Parameters
    ----------
    n : int
        Matrix size.
    rows, cols : ndarray of int
        Off-diagonal entries (any order, duplicates and either triangle allowed).
    backend : {'qdldl', 'splu'}

    Attributes
    ----------
    diag_pos : ndarray
        Position of each diagonal entry in the data array.
    off_pos : ndarray
        Position in the data array of each given off-diagonal entry (same order as inputs).
    """

    def __init__(self, n: int, rows: np.ndarray, cols: np.ndarray, *,
                 backend: Backend = "qdldl") -> None:
        self.n = n
        self.backend = backend
        lo = np.minimum(rows, cols).astype(np.int64)
        hi = np.maximum(rows, cols).astype(np.int64)
        diag = np.arange(n, dtype=np.int64)
        r = np.concatenate([diag, lo])
        c = np.concatenate([diag, hi])
        key = c * n + r  # column-major order, row within column
        uniq, inverse = _unique_inverse(key)
        self.indices = (uniq % n).astype(np.int32)
        col_of = (uniq // n).astype(np.int64)
        self.indptr = np.zeros(n + 1, dtype=np.int32)
        np.cumsum(np.bincount(col_of, minlength=n), out=self.indptr[1:])
        self.nnz = len(uniq)
        self.diag_pos = inverse[:n]
        self.off_pos = inverse[n:]
        #: no two links share an off-diagonal entry (no parallel links): plain assignment works
        self.unique_off = bool(len(self.off_pos) == 0 or
                               np.bincount(self.off_pos, minlength=self.nnz).max() <= 1)
        # factorizations per (slot, thread): systems sharing this pattern may be solved by
        # several threads at once (e.g. Dask workers in one process); each keeps its own
        self._solvers: dict = {}
        self._upper: dict[int, sp.csc_matrix] = {}
        self.factorizations = 0

    def matrix(self, data: np.ndarray) -> sp.csc_matrix:
        """The upper triangle as a CSC matrix holding ``data`` (explicit zeros kept)."""
        return sp.csc_matrix((data, self.indices, self.indptr), shape=(self.n, self.n))

    def factor(self, data: np.ndarray, slot: str = "main") -> None:
        """Numeric factorization of the matrix with values ``data``.

        ``slot`` names where the factorization is kept: factorizations in different slots live
        side by side (e.g. a base state's, kept for many nearby solves, and a working one).
        """
        self.factorizations += 1
        tid = threading.get_ident()
        key = (slot, tid)
        solver = self._solvers.get(key)
        if self.backend == "qdldl":
            import qdldl

            # one CSC object per thread, its values overwritten: qdldl reads the values on
            # each update
            m = self._upper.get(tid)
            if m is None or m.data.shape != (self.nnz,):
                m = self._upper[tid] = self.matrix(np.array(data, dtype=float))
            else:
                m.data[:] = data
            if solver is None:
                self._solvers[key] = qdldl.Solver(m, upper=True)
            else:
                solver.update(m, upper=True)
        else:
            import scipy.sparse.linalg as spla

            upper = self.matrix(data)
            full = (upper + sp.triu(upper, k=1).T).tocsc()
            self._solvers[key] = spla.splu(full, permc_spec="COLAMD")

    def solve(self, b: np.ndarray, slot: str = "main") -> np.ndarray:
        """Solve with the factorization kept in ``slot`` (default: the current one)."""
        solver = self._solvers[(slot, threading.get_ident())]
        return np.asarray(solver.solve(np.ascontiguousarray(b, dtype=float)))

    def has_factor(self, slot: str = "main") -> bool:
        """True if ``slot`` holds a factorization."""
        return (slot, threading.get_ident()) in self._solvers
