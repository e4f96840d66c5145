"""Stopping a run on SIGTERM or SIGINT: worker processes ended, temporaries removed.

:func:`stop_on_signals` turns either signal in the main process into :class:`Interrupted`
(exit code 128 + the signal number, the shell's convention) after terminating this process's
child processes (the fire-flow pool's workers), so the ``finally`` and ``with`` blocks on the
way out remove every temporary file and the earlier outputs stay as they were.
"""

from __future__ import annotations

import contextlib
import logging
import multiprocessing
import signal
import threading

from gridflow.errors import GridflowError

__all__ = ["Interrupted", "stop_on_signals", "terminate_children"]

log = logging.getLogger("gridflow")


class Interrupted(GridflowError):
    """The run was stopped by a signal; nothing of it was put in place."""

    exit_code = 130

    def __init__(self, message: str, **fields) -> None:
        super().__init__(message, **fields)
        signum = self.fields.get("signal")
        if isinstance(signum, int):
            self.exit_code = 128 + signum


def terminate_children(grace_s: float = 3.0) -> int:
    """Terminate this process's multiprocessing children; kill those still alive after
    ``grace_s`` seconds. Returns how many there were."""
    children = multiprocessing.active_children()
    for p in children:
        with contextlib.suppress(Exception):
            p.terminate()
    for p in children:
        with contextlib.suppress(Exception):
            p.join(grace_s / max(len(children), 1))
            if p.is_alive():
                p.kill()
    return len(children)


@contextlib.contextmanager
def stop_on_signals():
    """Within the block, SIGTERM and SIGINT stop the run (see the module notes).

    Outside the main thread (signals cannot be caught there) the block runs unchanged.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def handler(signum, frame):
        name = signal.Signals(signum).name
        n = terminate_children()
        log.warning("%s received: stopping (%d worker process(es) ended)", name, n)
        raise Interrupted(f"stopped by {name}; nothing was written, the previous output is "
                          "kept", signal=int(signum))

    old = {s: signal.signal(s, handler) for s in (signal.SIGTERM, signal.SIGINT)}
    try:
        yield
    finally:
        for s, h in old.items():
            signal.signal(s, h)
