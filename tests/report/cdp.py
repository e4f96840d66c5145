"""A small client of the Chrome DevTools Protocol over ``--remote-debugging-pipe``.

Debian's chromium reads commands from file descriptor 3 and writes replies and events to
descriptor 4, each message JSON ended by a NUL byte. No browser download and no network port:
the pipe is private to the test.
"""

from __future__ import annotations

import fcntl
import json
import os
import queue
import subprocess
import threading
import time
from pathlib import Path

CHROMIUM = Path("/usr/bin/chromium")


class Browser:
    """One headless chromium with one page, driven by CDP commands."""

    def __init__(self, profile: Path, *, width: int = 1280, height: int = 1000) -> None:
        cmd_r, self._cmd_w = os.pipe()
        self._out_r, out_w = os.pipe()

        def fds() -> None:  # in the child: the pipe ends become descriptors 3 and 4
            a = fcntl.fcntl(cmd_r, fcntl.F_DUPFD, 10)
            b = fcntl.fcntl(out_w, fcntl.F_DUPFD, 10)
            os.dup2(a, 3)
            os.dup2(b, 4)

        self.proc = subprocess.Popen(
            [str(CHROMIUM), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
             "--no-first-run", "--disable-background-networking",
             "--disable-component-update", "--disable-sync", "--disable-extensions",
             f"--user-data-dir={profile}", f"--window-size={width},{height}",
             "--remote-debugging-pipe", "about:blank"],
            pass_fds=(3, 4), preexec_fn=fds, stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL)
        os.close(cmd_r)
        os.close(out_w)
        self._id = 0
        self._replies: dict[int, dict] = {}
        self._cv = threading.Condition()
        self.events: queue.Queue = queue.Queue()
        self.log: list[dict] = []  # every event, in order
        threading.Thread(target=self._read, daemon=True).start()
        targets = self.send("Target.getTargets")["targetInfos"]
        page = next(t for t in targets if t["type"] == "page")
        self.session = self.send("Target.attachToTarget", targetId=page["targetId"],
                                 flatten=True)["sessionId"]

    def _read(self) -> None:
        buf = b""
        while True:
            try:
                chunk = os.read(self._out_r, 1 << 16)
            except OSError:
                return
            if not chunk:
                return
            buf += chunk
            while b"\0" in buf:
                raw, buf = buf.split(b"\0", 1)
                msg = json.loads(raw)
                if "id" in msg:
                    with self._cv:
                        self._replies[msg["id"]] = msg
                        self._cv.notify_all()
                else:
                    self.log.append(msg)
                    self.events.put(msg)

    def send(self, method: str, *, session: bool = False, timeout: float = 60.0, **params):
        """Send a command and wait for its reply; raise on a protocol error."""
        self._id += 1
        msg = {"id": self._id, "method": method, "params": params}
        if session:
            msg["sessionId"] = self.session
        os.write(self._cmd_w, json.dumps(msg).encode() + b"\0")
        end = time.monotonic() + timeout
        with self._cv:
            while self._id not in self._replies:
                if not self._cv.wait(timeout=max(0.0, end - time.monotonic())):
                    raise TimeoutError(f"no reply to {method}")
            reply = self._replies.pop(self._id)
        if "error" in reply:
            raise RuntimeError(f"{method}: {reply['error']}")
        return reply.get("result", {})

    def page(self, method: str, **params):
        return self.send(method, session=True, **params)

    def wait_event(self, method: str, timeout: float = 60.0) -> dict:
        end = time.monotonic() + timeout
        while True:
            msg = self.events.get(timeout=max(0.01, end - time.monotonic()))
            if msg.get("method") == method:
                return msg

    def js(self, expression: str):
        """Evaluate in the page and return the value (raise on an exception)."""
        r = self.page("Runtime.evaluate", expression=expression, returnByValue=True,
                      awaitPromise=True)
        if "exceptionDetails" in r:
            raise RuntimeError(f"page script failed: {r['exceptionDetails']}")
        return r["result"].get("value")

    def click(self, x: float, y: float) -> None:
        """A real left click at page coordinates (viewport pixels)."""
        for kind in ("mouseMoved", "mousePressed", "mouseReleased"):
            self.page("Input.dispatchMouseEvent", type=kind, x=x, y=y, button="left",
                      clickCount=1)

    def close(self) -> None:
        try:
            self.send("Browser.close", timeout=10)
        except (RuntimeError, TimeoutError, OSError):
            pass
        try:
            self.proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()
        os.close(self._cmd_w)
        os.close(self._out_r)
