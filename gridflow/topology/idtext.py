"""Identifier text, array at a time: suffixes and uniqueness without per-id Python work.

Ids stay Python ``str`` objects in object arrays (what the GIS frames and findings carry); the
functions here do their work with numpy's variable-width string type and hash sets, once per
array.
"""

from __future__ import annotations

import numpy as np
from numpy.dtypes import StringDType

__all__ = ["as_text", "all_distinct", "suffixed", "numbered", "two_decimals", "joined"]


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
    """``prefix1`` ... ``prefix<n>`` as an Arrow ``large_string`` array, made by Arrow's
    cast of the numbers to text and one row-wise join, not one str per number.

    Notes
    -----
    Arrow writes an integer as its decimal digits, a minus sign for negatives, no leading
    zeros: the text of ``f"{i}"`` for each ``i`` (about 4x faster than writing the digits
    with numpy array arithmetic at two million numbers).

    Examples
    --------
    >>> numbered("N", 12).to_pylist()[9:]
    ['N10', 'N11', 'N12']
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    num = pa.array(np.arange(1, n + 1, dtype=np.int64)).cast(pa.large_string())
    return pc.binary_join_element_wise(pa.scalar(prefix, pa.large_string()), num,
                                       pa.scalar("", pa.large_string()))


#: largest value :func:`two_decimals` writes (its cents stay exact in 64-bit integers)
_TWO_DECIMALS_MAX = 2.0**40


def two_decimals(x: np.ndarray):
    """``f"{v:.2f}"`` of each value as an Arrow ``large_string`` array, or None where that
    is not done here (a value negative, -0.0, not finite or from 2**40 on): the caller
    formats those values itself.

    Notes
    -----
    Exact, as Python's formatting: each double is ``m * 2**-k`` (``m`` its 53-bit integer
    significand), so ``100 * v`` is ``100 m / 2**k``, rounded half to even in integers; the
    cents are then written as text by Arrow.

    Examples
    --------
    >>> two_decimals(np.array([0.125, 2.675, 8.0, 0.005])).to_pylist()
    ['0.12', '2.67', '8.00', '0.01']
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    x = np.asarray(x, dtype=float)
    if not (np.isfinite(x).all() and not np.signbit(x).any()
            and (x < _TWO_DECIMALS_MAX).all()):
        return None
    frac, exp = np.frexp(x)  # x = frac * 2**exp, frac in [0.5, 1) (0 for 0)
    m = (frac * 2.0**53).astype(np.int64)  # exact: the significand as an integer
    k = np.minimum(53 - exp.astype(np.int64), 62)  # x = m / 2**k (k >= 13 here); beyond
    num = m * 100  # 62 the value rounds to 0 either way; 100 m < 2**60
    q = num >> k
    rem = num - (q << k)
    half = np.int64(1) << (k - 1)
    q += (rem > half) | ((rem == half) & (q % 2 == 1))
    whole = pa.array(q // 100).cast(pa.large_string())
    cents = pc.utf8_lpad(pa.array(q % 100).cast(pa.large_string()), width=2, padding="0")
    return pc.binary_join_element_wise(whole, cents, pa.scalar(".", pa.large_string()))


def joined(*parts):
    """Row-wise concatenation of text: each part a str (the same in every row), an array of
    ``str`` or an Arrow text array; an object array of ``str``, or None when a part holds
    something other than text (the caller then formats the rows itself)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    arrays = []
    for part in parts:
        if isinstance(part, str):
            arrays.append(pa.scalar(part, pa.large_string()))
        elif isinstance(part, (pa.Array, pa.ChunkedArray)):
            arrays.append(part.cast(pa.large_string()))
        else:
            vals = np.asarray(part, dtype=object)
            if not set(map(type, vals.tolist())) <= {str}:
                return None
            arrays.append(pa.array(vals, type=pa.large_string()))
    n = max((len(a) for a in arrays if not isinstance(a, pa.Scalar)), default=0)
    if n == 0:
        return np.zeros(0, dtype=object)
    out = pc.binary_join_element_wise(*arrays, pa.scalar("", pa.large_string()))
    return out.to_numpy(zero_copy_only=False)
