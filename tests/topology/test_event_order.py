"""Split events ordered by main, then by distance along it, exactly as numpy's ``lexsort``
orders them (the reference: numpy, a general-purpose library), ties in their given order."""

from __future__ import annotations

import numpy as np

from gridflow.topology.attach import by_line_and_distance


def test_same_order_as_lexsort_ties_included():
    rng = np.random.default_rng(5)
    n = 50_000
    line = rng.integers(0, 3_000, n)
    s = np.round(rng.uniform(0, 120, n), 1)  # coarse distances: many equal on one main
    s[rng.random(n) < 0.05] = 0.0
    s[rng.random(n) < 0.02] = -0.0  # equal to 0.0 for both orders
    line[:200] = 2**40 + rng.integers(0, 3, 200)  # large main numbers stay exact
    ref = np.lexsort((s, line))
    got = by_line_and_distance(line, s)
    # both cases are really there: equal (main, distance) pairs and several events a main
    assert len(np.unique(np.c_[line, s], axis=0)) < n
    np.testing.assert_array_equal(got, ref)


def test_no_events():
    assert by_line_and_distance(np.zeros(0, np.int64), np.zeros(0)).size == 0


def test_missing_distances_last_on_their_main():
    rng = np.random.default_rng(6)
    line = rng.integers(0, 50, 2_000)
    s = rng.uniform(0, 100, 2_000)
    s[rng.random(2_000) < 0.1] = np.nan
    np.testing.assert_array_equal(by_line_and_distance(line, s), np.lexsort((s, line)))
