"""Handing freed memory back to the operating system between the run's large stages.

A run at the scale of a large utility frees gigabytes between stages (the topology's
intermediates, each result layer once written), but the C allocators keep much of it:
glibc's ``malloc`` keeps freed pages inside its heap (large numpy arrays come from there once
its dynamic threshold for separate mappings has grown), and Arrow's memory pool keeps freed
blocks for reuse. Both then count in the process's resident memory, and the peak of a later
stage stacks on top of them. :func:`release_memory` asks both to return what is free. It
changes no data; where the calls are not available (not glibc, no pyarrow) it does nothing.

:func:`gc_paused` holds Python's cyclic garbage collector off while a stage makes millions of
objects it keeps (every shapely geometry is one the collector tracks): otherwise each full
collection walks every geometry made so far, about a fifth of reading and cleaning a large
utility. Memory freed by reference counting (nearly all of it: arrays, frames) is freed as
usual; only reference cycles wait for the collector, which runs again when the stage ends.
"""

from __future__ import annotations

import contextlib
import ctypes
import ctypes.util
import functools
import gc
import sys

__all__ = ["gc_paused", "release_memory", "resident_mb"]


@functools.cache
def _libc():
    if not sys.platform.startswith("linux"):
        return None
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
    except OSError:
        return None
    return libc if hasattr(libc, "malloc_trim") else None  # glibc only (musl has none)


def release_memory() -> None:
    """Return freed memory to the operating system: Arrow's pool, then glibc's heap."""
    pa = sys.modules.get("pyarrow")
    if pa is not None:
        try:
            pa.default_memory_pool().release_unused()
        except Exception:  # an older pyarrow without it: nothing to do
            pass
    libc = _libc()
    if libc is not None:
        libc.malloc_trim(0)


def resident_mb() -> float:
    """The process's resident memory now [MB] (NaN where /proc is not available)."""
    try:
        with open("/proc/self/statm") as f:
            pages = int(f.read().split()[1])
    except (OSError, ValueError, IndexError):
        return float("nan")
    import os

    return pages * os.sysconf("SC_PAGE_SIZE") / 2**20


@contextlib.contextmanager
def gc_paused():
    """Hold the cyclic garbage collector off inside the block (see the module notes); its
    state on entry is restored on exit, so nested blocks are fine."""
    was = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was:
            gc.enable()
