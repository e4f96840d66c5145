"""Identifier text, array at a time: suffixes and uniqueness without per-id Python work.

Ids stay Python ``str`` objects in object arrays (what the GIS frames and findings carry); the
functions here do their work with numpy's variable-width string type and hash sets, once per
array.
"""

from __future__ import annotations

import numpy as np
from numpy.dtypes import StringDType

__all__ = ["as_text", "all_distinct", "suffixed", "numbered"]


def as_text(ids) -> np.ndarray:
    """``ids`` as an object array of ``str`` (``str(v)`` of each value; a copy)."""
    a = np.asarray(ids)
    if a.dtype == object and set(map(type, a.tolist())) <= {str}:  # one pass in C
        return a.copy()
    return a.astype(str).astype(object)


def all_distinct(text: np.ndarray) -> bool:
    """True when no two of the ``str`` values are equal (one hash pass)."""
    return len(set(text.tolist())) == len(text)


def suffixed(ids: np.ndarray, k: np.ndarray, sep: str = ".") -> np.ndarray:
    """``f"{id}{sep}{k}"`` for each id and integer ``k``, as an object array of ``str``.

    Examples
    --------
    >>> suffixed(np.array(["P1", "P2"], dtype=object), np.array([1, 3]))
    array(['P1.1', 'P2.3'], dtype=object)
    """
    if len(ids) == 0:
        return np.zeros(0, dtype=object)
    text = np.asarray(ids, dtype=object).astype(StringDType())
    num = np.asarray(k, dtype=np.int64).astype(StringDType())
    return np.strings.add(np.strings.add(text, sep), num).astype(object)


def numbered(prefix: str, n: int):
    """``prefix1`` ... ``prefix<n>`` as an Arrow ``large_string`` array, its bytes written
    by array arithmetic (digit by digit over all numbers at once), not one str per number.

    Examples
    --------
    >>> numbered("N", 12).to_pylist()[9:]
    ['N10', 'N11', 'N12']
    """
    import pyarrow as pa

    head = prefix.encode()
    i = np.arange(1, n + 1, dtype=np.int64)
    tens = 10 ** np.arange(1, 19, dtype=np.int64)
    digits = np.searchsorted(tens, i, side="right") + 1  # decimal digits of each number
    offsets = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(len(head) + digits, out=offsets[1:])
    data = np.empty(int(offsets[-1]), dtype=np.uint8)
    start = offsets[:-1]
    for j, byte in enumerate(head):
        data[start + j] = byte
    for k in range(int(digits.max()) if n else 0):  # the k-th digit from the left
        has = digits > k
        power = 10 ** (digits[has] - 1 - k)
        data[start[has] + len(head) + k] = 48 + (i[has] // power) % 10
    return pa.LargeStringArray.from_buffers(n, pa.py_buffer(offsets), pa.py_buffer(data))
