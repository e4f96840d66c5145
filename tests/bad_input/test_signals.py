"""SIGTERM or SIGINT to a run in its fire-flow sweep: the worker processes end within seconds,
no temporary is left, last night's output set is byte-identical, the exit code says which
signal (128 + its number, the shell's convention)."""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from tests.bad_input.harness import previous_output

ROOT = Path(__file__).resolve().parents[2]


def _children(pid: int) -> list[int]:
    out = subprocess.run(["ps", "-o", "pid=", "--ppid", str(pid)], capture_output=True,
                         text=True).stdout
    return [int(x) for x in out.split()]


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    try:  # a zombie waiting for its parent counts as gone
        with open(f"/proc/{pid}/stat", encoding="ascii") as fh:
            return fh.read().rsplit(")", 1)[1].split()[0] != "Z"
    except OSError:
        return False


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGINT], ids=["SIGTERM", "SIGINT"])
def test_signal_during_fire_flow_stops_workers_and_leaves_nothing(tmp_path, sig):
    shutil.copytree(ROOT / "sample_gis", tmp_path / "gis")
    out = tmp_path / "out"
    out.mkdir()
    target = out / "night.gpkg"
    before = previous_output(target)
    (out / "night.html").write_text("last night's report")
    (out / "night.log").write_text("last night's log")
    set_before = {p.name: p.read_bytes() for p in out.iterdir()}
    err = (tmp_path / "stderr.txt").open("w")
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    proc = subprocess.Popen([sys.executable, "-m", "gridflow", "run",
                             str(tmp_path / "gis" / "millbrook.toml"), "--out", str(target),
                             "--workers", "2"], env=env, stdout=subprocess.DEVNULL, stderr=err,
                            start_new_session=True)
    workers: list[int] = []
    try:
        deadline = time.monotonic() + 300
        while time.monotonic() < deadline and proc.poll() is None:
            workers = _children(proc.pid)
            if len(workers) >= 2:
                break
            time.sleep(0.05)
        assert len(workers) >= 2, "the run never started its worker processes: " + \
            (tmp_path / "stderr.txt").read_text()[-2000:]
        time.sleep(0.3)
        t0 = time.monotonic()
        os.kill(proc.pid, sig)
        proc.wait(30)
        stopped_s = time.monotonic() - t0
        for _ in range(100):
            if not any(_alive(w) for w in workers):
                break
            time.sleep(0.05)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait(10)
        err.close()
    assert proc.returncode == 128 + sig, (tmp_path / "stderr.txt").read_text()[-2000:]
    assert stopped_s < 10, stopped_s
    assert not [w for w in workers if _alive(w)], "worker processes outlived the run"
    assert not [p.name for p in tmp_path.rglob("*") if ".tmp-" in p.name]
    after = {p.name: p.read_bytes() for p in out.iterdir() if p.name != "night.failed.log"}
    assert after == set_before  # last night's set, byte for byte
    assert target.read_bytes() == before
    assert f"stopped by {signal.Signals(sig).name}" in (tmp_path / "stderr.txt").read_text()
