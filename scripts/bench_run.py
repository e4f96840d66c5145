"""Benchmark the default nightly run end to end on the synthetic utility.

The utility of ``synthetic_utility.py`` is written to a GeoPackage once per size; a fresh
process runs ``run_job`` on it with the default config (report on, segments with their
defaults, the three default scenarios; fire flow off: ``bench_fireflow.py`` measures it).
Printed per size: each stage's time (read + clean, demand, scenarios and segments from the
``run_info`` layer; the GeoPackage write and the report from the run's log records), the
whole run, and its ratio to a floor measured in the same process:

    floor = bare read (pyogrio + Arrow, every mapped layer)
          + bare write (the run's own output layers written again with pyogrio + Arrow)
          + solver floor (iterations x one numeric factorization of the network matrix)

The bare write is also timed with gridflow's GeoPackage write settings
(``gridflow.io.write.GPKG_WRITE_OPTIONS`` and an fsync at the end; the same layers in the same
loop, which of the two files is written first alternating by layer): printed as ``w.ours``
beside the floor, not part of it, so the floor stays the I/O cost a naive writer pays.

Peak memory (ru_maxrss of the run's process, taken before the floor is measured), with the
peak resident memory of each stage (a sampler resets the kernel's high-water mark every 0.1 s,
so no peak between samples is missed), and the machine's load average beside the figures (the
machine is shared: compare ratios taken in the same run).

    python scripts/bench_run.py 100000 500000 1000000 [--cache=DIR]

Targets: run <= 1.5x the floor; 1M mains under 5 min and 8 GB.
"""

from __future__ import annotations

import json
import logging
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE))

LAYERS = ("mains", "valves", "hydrants", "meters", "sources")


class _Stamps(logging.Handler):
    """Times of the run's 'network', 'scenario <name>' and 'wrote <file>' log records."""

    def __init__(self) -> None:
        super().__init__(logging.INFO)
        self.t: dict[str, float] = {}

    def emit(self, record: logging.LogRecord) -> None:
        msg = record.getMessage()
        now = time.perf_counter()
        if msg.startswith("wrote ") and msg.endswith(".gpkg"):
            self.t["gpkg"] = now
        elif msg.startswith("wrote ") and msg.endswith(".html"):
            self.t["html"] = now
        elif msg.startswith("network: "):
            self.t["network"] = now
        elif msg.startswith("scenario ") and ":" in msg:
            self.t.setdefault("scenario:" + msg.split()[1].rstrip(":"), now)


class _PeakSampler(threading.Thread):
    """The process's peak resident memory per 0.1 s window (VmHWM, reset after each read)."""

    def __init__(self) -> None:
        super().__init__(daemon=True)
        self.samples: list[tuple[float, float]] = []  # (end of window, peak MB)
        self.stop = threading.Event()

    @staticmethod
    def _hwm_mb() -> float:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024
        return float("nan")

    def run(self) -> None:
        while not self.stop.wait(0.1):
            self.samples.append((time.perf_counter(), self._hwm_mb()))
            try:
                with open("/proc/self/clear_refs", "w") as f:
                    f.write("5")
            except OSError:  # not Linux, or not permitted: one running peak
                pass

    def peak(self, t0: float, t1: float) -> float:
        """Peak MB over the windows ending in (t0, t1], plus the first one after t1."""
        vals = [mb for t, mb in self.samples if t0 < t <= t1]
        after = [mb for t, mb in self.samples if t > t1][:1]
        return max(vals + after, default=float("nan"))


def load() -> str:
    """The machine's 1-minute load average (other developers share it)."""
    try:
        return f"{os.getloadavg()[0]:.1f}"
    except OSError:
        return "?"


def one(gis: Path) -> dict:
    import pyogrio
    from synthetic import numeric_factorization_seconds
    from synthetic_utility import config_text

    from gridflow.config import load_config
    from gridflow.findings import Findings
    from gridflow.hydraulics import HydraulicSystem
    from gridflow.jobs.run import run_job
    from gridflow.topology import build_network

    d = gis.parent
    cfg_path = d / "utility.toml"
    out = d / "out.gpkg"
    cfg_path.write_text(config_text(gis, fireflow=False, report=True, output=out.as_posix()))
    stamps = _Stamps()
    logging.getLogger("gridflow").addHandler(stamps)
    logging.getLogger("gridflow").setLevel(logging.INFO)
    sampler = _PeakSampler()
    load0 = load()
    t0 = time.perf_counter()
    sampler.start()
    run_job(cfg_path, out=out)
    total = time.perf_counter() - t0
    sampler.stop.set()
    sampler.join()
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    info = dict(pyogrio.read_dataframe(out, layer="run_info")[["key", "value"]].values)
    run_s = float(info["seconds_total"])  # everything before the write
    stage = {"read_clean": float(info["seconds_read_clean"]),
             "demand": float(info["seconds_demand"]),
             "scenarios": sum(float(v) for k, v in info.items()
                              if k.endswith(":seconds") and k.split(":")[0] not in
                              ("fireflow", "segments", "flow_tests")),
             "segments": float(info.get("seconds_segments", "nan")),
             "write": stamps.t["gpkg"] - t0 - run_s,
             "report": stamps.t.get("html", float("nan")) - stamps.t["gpkg"]}
    stage["other"] = run_s - stage["read_clean"] - stage["demand"] - stage["scenarios"] - \
        (stage["segments"] if stage["segments"] == stage["segments"] else 0.0)
    # peak memory per stage, on the stage boundaries the log and run_info give
    t_net = stamps.t.get("network", t0 + stage["read_clean"])
    t_dem = t_net + stage["demand"]
    t_scn = max([v for k, v in stamps.t.items() if k.startswith("scenario:")], default=t_dem)
    seg = stage["segments"] if stage["segments"] == stage["segments"] else 0.0
    t_seg = t_scn + seg
    bounds = {"read_clean": (t0, t_net), "demand": (t_net, t_dem), "scenarios": (t_dem, t_scn),
              "segments": (t_scn, t_seg), "other": (t_seg, t0 + run_s),
              "write": (t0 + run_s, stamps.t["gpkg"]),
              "report": (stamps.t["gpkg"], stamps.t.get("html", t0 + total))}
    peaks = {k: sampler.peak(a, b) for k, (a, b) in bounds.items()}
    rss = max([rss] + [v for v in peaks.values() if v == v])  # the sampler resets ru_maxrss
    # floors, same process
    t1 = time.perf_counter()
    for layer in LAYERS:
        pyogrio.read_dataframe(gis, layer=layer, use_arrow=True)
    bare_read = time.perf_counter() - t1
    from gridflow.io.write import GPKG_WRITE_OPTIONS, gdal_config

    again, tuned = d / "again.gpkg", d / "again_tuned.gpkg"
    bare_write = tuned_write = 0.0
    for k, (name, _) in enumerate(pyogrio.list_layers(out)):  # one layer in memory at a time
        if name == "layer_styles":
            continue
        df = pyogrio.read_dataframe(out, layer=name, use_arrow=True)
        for default in ((True, False) if k % 2 == 0 else (False, True)):
            t1 = time.perf_counter()
            if default:
                pyogrio.write_dataframe(df, again, layer=name, driver="GPKG", use_arrow=True)
                bare_write += time.perf_counter() - t1
            else:
                with gdal_config(GPKG_WRITE_OPTIONS):
                    pyogrio.write_dataframe(df, tuned, layer=name, driver="GPKG",
                                            use_arrow=True)
                tuned_write += time.perf_counter() - t1
        del df
    t1 = time.perf_counter()
    fd = os.open(tuned, os.O_RDONLY)  # as gridflow does before its rename
    os.fsync(fd)
    os.close(fd)
    tuned_write += time.perf_counter() - t1
    clean = build_network(load_config(cfg_path), Findings())
    fact = numeric_factorization_seconds(HydraulicSystem(clean.network))
    iters = sum(int(v) for k, v in info.items() if k.startswith("iterations_"))
    floor = bare_read + bare_write + iters * fact
    return {"links": clean.network.n_links, "nodes": clean.network.n_nodes, "total_s": total,
            "stages": stage, "iterations": iters, "factor_s": fact, "bare_read_s": bare_read,
            "bare_write_s": bare_write, "tuned_write_s": tuned_write, "floor_s": floor,
            "ratio": total / floor,
            "peak_mb": rss, "stage_peak_mb": peaks, "load_before": load0, "load_after": load()}


def main() -> None:
    args = [a for a in sys.argv[1:] if not a.startswith("--")]
    if "--one" in sys.argv:
        print(json.dumps(one(Path(args[0]))))
        return
    from synthetic_utility import write_utility

    sizes = [int(a) for a in args] or [100_000, 500_000]
    # --cache DIR: keep each size's utility GeoPackage there and reuse it on later runs
    cache = next((Path(a.split("=", 1)[1]) for a in sys.argv[1:] if a.startswith("--cache=")),
                 None)
    print(f"{'mains':>7} {'nodes':>8} {'links':>8} | {'read+cl':>7} {'demand':>6} "
          f"{'solve x3':>8} {'segm':>5} {'other':>5} {'write':>5} {'report':>6} {'total s':>7} |"
          f" {'iter':>4} {'read':>5} {'write':>5} {'solver':>6} {'floor':>6} {'ratio':>5} "
          f"{'w.ours':>6} "
          f"{'peak MB':>7} {'load':>7}")
    for n in sizes:
        with tempfile.TemporaryDirectory() as d:
            gis = Path(d) / "utility.gpkg"
            kept = cache / f"utility_{n}.gpkg" if cache is not None else None
            if kept is not None and kept.exists():
                gis.symlink_to(kept.resolve())
            else:
                write_utility(gis, n)
                if kept is not None:
                    kept.parent.mkdir(parents=True, exist_ok=True)
                    shutil.copyfile(gis, kept)
            out = subprocess.run([sys.executable, __file__, str(gis), "--one"],
                                 capture_output=True, text=True)
            if out.returncode:
                print(out.stderr[-3000:])
                continue
            r = json.loads(out.stdout.strip().splitlines()[-1])
            s = r["stages"]
            print(f"{n:>7} {r['nodes']:>8} {r['links']:>8} | {s['read_clean']:>7.1f} "
                  f"{s['demand']:>6.1f} {s['scenarios']:>8.1f} {s['segments']:>5.1f} "
                  f"{s['other']:>5.1f} {s['write']:>5.1f} {s['report']:>6.1f} "
                  f"{r['total_s']:>7.1f} | {r['iterations']:>4} {r['bare_read_s']:>5.1f} "
                  f"{r['bare_write_s']:>5.1f} {r['iterations'] * r['factor_s']:>6.2f} "
                  f"{r['floor_s']:>6.1f} {r['ratio']:>5.2f} "
                  f"{r.get('tuned_write_s', float('nan')):>6.1f} {r['peak_mb']:>7.0f} "
                  f"{r['load_before']:>3}/{r['load_after']:<3}", flush=True)
            p = r["stage_peak_mb"]
            print(f"{'':>7} peak MB by stage: " + ", ".join(
                f"{k} {v:.0f}" for k, v in p.items()), flush=True)


if __name__ == "__main__":
    main()
