"""Faults during a run: killed while writing, an exception while writing, two runs at once,
and a solution that fails its own check.

The previous output must survive each, the next run must leave no stray temporary file, and a
wrong solution must never be written quietly (exit 3 naming the worst node and link).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pyogrio
import pytest
from click.testing import CliRunner

from gridflow.cli.main import cli
from gridflow.io.write import remove_stale_temporaries
from tests.bad_input.harness import previous_output
from tests.bad_input.town import Town

ROOT = Path(__file__).resolve().parents[2]


def _many_scenarios(t: Town, n: int) -> Town:
    """Enough scenarios (two layers each) that writing takes a while to catch in the act."""
    t.config["scenarios"] = {f"s{i:02d}": {"factor": 1.0 + i / 100} for i in range(n)}
    return t


def _cli(*args):
    return CliRunner().invoke(cli, list(args))


def _gridflow(*args, **kw) -> subprocess.Popen:
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    return subprocess.Popen([sys.executable, "-m", "gridflow", "-q", *args], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, **kw)


def _temporaries(folder: Path, stem: str = "result") -> list[Path]:
    return sorted(folder.glob(f".{stem}.tmp-*"))


def test_killed_while_writing_keeps_previous_output_and_next_run_cleans_up(tmp_path):
    gpkg, cfg = _many_scenarios(Town(), 40).write(tmp_path)
    out = tmp_path / "out"
    target = out / "result.gpkg"
    before = previous_output(target)
    proc = _gridflow("run", str(cfg), "--out", str(target))
    deadline = time.monotonic() + 120
    try:
        while not _temporaries(out) and time.monotonic() < deadline and proc.poll() is None:
            time.sleep(0.002)
        assert _temporaries(out), "the run never started writing: " + \
            proc.stderr.read().decode() if proc.poll() is not None else "timed out"
        time.sleep(0.05)  # well inside writing its layers
        os.kill(proc.pid, signal.SIGKILL)
    finally:
        proc.wait(30)
    assert proc.returncode == -signal.SIGKILL
    assert target.read_bytes() == before  # the previous output is intact
    assert _temporaries(out)  # a killed process cannot clean up after itself ...
    time.sleep(0.1)  # the next process starts measurably later than the last change
    nxt = _gridflow("run", str(cfg), "--out", str(target))  # the next night: a new process
    _, err = nxt.communicate(timeout=180)
    assert nxt.returncode == 0, err.decode()
    assert not _temporaries(out)  # ... the next run does
    names = {n for n, _ in pyogrio.list_layers(target)}
    assert {"nodes_s00", "pipes_s39", "findings", "run_info"} <= names


def test_exception_while_writing_keeps_previous_output(tmp_path, monkeypatch):
    gpkg, cfg = _many_scenarios(Town(), 3).write(tmp_path)
    target = tmp_path / "out" / "result.gpkg"
    before = previous_output(target)
    import gridflow.io.write as w

    real = w._write_layer
    calls = []

    def fail_on_third(*a, **k):
        calls.append(a[2])
        if len(calls) == 3:
            raise OSError(28, "No space left on device (injected)")
        return real(*a, **k)

    monkeypatch.setattr(w, "_write_layer", fail_on_third)
    res = _cli("run", str(cfg), "--out", str(target))
    assert res.exit_code == 1 and "No space left on device" in res.stderr
    assert len(calls) == 3
    assert target.read_bytes() == before
    assert not _temporaries(target.parent)


def test_stale_temporaries_of_other_targets_and_live_runs_are_kept(tmp_path):
    target = tmp_path / "result.gpkg"
    gone = subprocess.Popen([sys.executable, "-c", "pass"])
    gone.wait()  # a process that has ended: its pid names its temporaries
    dead = gone.pid
    stale = [tmp_path / f".result.tmp-{dead}-0badf00d.gpkg",
             tmp_path / f".result.tmp-{dead}-0badf00d.gpkg-journal",
             tmp_path / f".result.tmp-{dead}-1badf00d.html"]
    other = tmp_path / f".other.tmp-{dead}-2badf00d.gpkg"  # another target's: not ours
    unrelated = tmp_path / ".result.tmp-notes.txt"
    live = tmp_path / f".result.tmp-{os.getppid()}-3badf00d.gpkg"  # a live process's
    mine = tmp_path / f".result.tmp-{os.getpid()}-4badf00d.gpkg"  # this process's
    for p in (*stale, other, unrelated, live, mine):
        p.write_bytes(b"x")
    removed = remove_stale_temporaries(target)
    assert sorted(removed) == sorted(stale)
    assert other.exists() and unrelated.exists() and live.exists() and mine.exists()


def test_two_runs_writing_different_outputs_at_once(tmp_path):
    gpkg, cfg = _many_scenarios(Town(), 12).write(tmp_path)
    out = tmp_path / "out"
    a, b = out / "a.gpkg", out / "b.gpkg"
    procs = [_gridflow("run", str(cfg), "--out", str(p)) for p in (a, b)]
    for p in procs:
        p.wait(180)
        assert p.returncode == 0, p.stderr.read().decode()
    assert not list(out.glob(".*.tmp-*"))
    for name in ("nodes_s00", "pipes_s11"):
        da = pyogrio.read_dataframe(a, layer=name, read_geometry=False)
        db = pyogrio.read_dataframe(b, layer=name, read_geometry=False)
        assert len(da) > 0
        assert da.equals(db)  # same inputs, same answers, neither disturbed the other


# ----------------------------------------------------------------- never a quiet wrong answer
def _spoil(monkeypatch, how):
    """Make the solver's result wrong after it returns, as a bug in it would."""
    import gridflow.jobs.run as run

    real = run.HydraulicSystem.solve

    def solve(self, *a, **k):
        r = real(self, *a, **k)
        how(self.net, r)
        return r

    monkeypatch.setattr(run.HydraulicSystem, "solve", solve)


def _link(net, lid):
    return int(np.flatnonzero(net.link_id == lid)[0])


@pytest.mark.parametrize("spoil, node, link", [
    # 5 L/s too much on M5: mass off at both its ends, its head loss off too
    (lambda net, r: r.flow_m3s.__setitem__(_link(net, "M5"), r.flow_m3s[_link(net, "M5")]
                                           + 0.005), ("J4", "J5"), "M5"),
    # 3 m of head added at J4: the head loss on every link at J4 off
    (lambda net, r: r.head_m.__setitem__(int(np.flatnonzero(net.node_id == "J4")[0]),
                                         r.head_m[net.node_id == "J4"][0] + 3.0),
     None, ("M3", "M5")),
    # a NaN head at a supplied junction
    (lambda net, r: r.head_m.__setitem__(int(np.flatnonzero(net.node_id == "J5")[0]),
                                         np.nan), ("J5",), None),
], ids=["flow", "head", "nan"])
def test_solution_failing_its_check_stops_with_exit_3(tmp_path, monkeypatch, spoil, node, link):
    gpkg, cfg = Town().write(tmp_path)
    target = tmp_path / "out" / "result.gpkg"
    before = previous_output(target)
    _spoil(monkeypatch, spoil)
    res = _cli("run", str(cfg), "--out", str(target))
    assert res.exit_code == 3, res.output
    assert target.read_bytes() == before  # last night's output is kept
    diag = target.with_name("result.diagnostics.gpkg")
    assert str(diag) in " ".join(res.stderr.split()).replace(" ", "") or \
        "result.diagnostics.gpkg" in res.stderr
    assert not _temporaries(target.parent)
    msg = res.stderr
    assert "average_day" in msg and "failed its check" in msg
    m_node = msg.split("at node ")[1].split(",")[0]
    m_link = msg.split("on link ")[1].split(")")[0]
    if node:
        assert m_node in node, msg
    if link:
        assert m_link in link, msg
    f = pyogrio.read_dataframe(diag, layer="findings", read_geometry=False)
    bad = f[f["kind"] == "solution_check_failed"]
    assert set(bad["feature_id"]) == {m_node, m_link}
    layers = {n for n, _ in pyogrio.list_layers(diag)}
    assert "nodes_average_day" not in layers  # the wrong answer is not written
    info = pyogrio.read_dataframe(diag, layer="run_info")
    kv = dict(zip(info["key"], info["value"]))
    mass = float(kv["average_day:mass_residual_m3s"])
    head = float(kv["average_day:head_residual_m"])
    assert not (mass <= 1e-5 and head <= 1e-3)  # recorded, and above 10 x the tolerances


def test_residuals_recorded_on_a_good_run(tmp_path):
    gpkg, cfg = Town().write(tmp_path)
    target = tmp_path / "out" / "result.gpkg"
    res = _cli("run", str(cfg), "--out", str(target))
    assert res.exit_code == 0, res.output
    kv = dict(pyogrio.read_dataframe(target, layer="run_info")[["key", "value"]].values)
    for s in ("average_day", "max_day", "peak_hour"):
        # the solver's default tolerances: 1e-6 m3/s and 1e-4 m (README config reference)
        assert float(kv[f"{s}:mass_residual_m3s"]) <= 1e-6
        assert float(kv[f"{s}:head_residual_m"]) <= 1e-4
