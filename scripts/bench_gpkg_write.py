"""Benchmark GeoPackage write settings on layers shaped like a run's result layers.

Writes N points and N 3-vertex lines, each with 12 attribute columns (two text, nine float,
one int), to a fresh GeoPackage with ``pyogrio.write_dataframe(use_arrow=True)``, once per
setting, in the same process, repeated ``--rounds`` times in alternating order:

- ``default``: GDAL's defaults (the floor a naive writer pays);
- one GDAL config option or layer option at a time (``OGR_SQLITE_SYNCHRONOUS=OFF``,
  ``OGR_SQLITE_JOURNAL=OFF``, ``OGR_SQLITE_CACHE=<MB>``, ``SPATIAL_INDEX=NO``, a larger page);
- ``gridflow``: the settings of :func:`gridflow.io.write.write_layers` (including its fsync).

Each figure is the median seconds (wall and CPU of all the process's threads) of the rounds for
both layers, with the machine's load average beside it (the machine is shared: compare ratios
to ``default`` in the same run; under load, CPU seconds are the steadier figure).

    python scripts/bench_gpkg_write.py [N] [--rounds=3] [--only=default,sync_off,...]
"""

from __future__ import annotations

import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))


def frames(n: int, seed: int = 7):
    import geopandas as gpd
    import numpy as np
    import pandas as pd
    import shapely

    rng = np.random.default_rng(seed)  # seeded: the same layers every run
    xy = rng.uniform(0, 50_000, size=(n, 2))
    ids = pd.array([f"N{k:08d}" for k in range(n)], dtype="str")
    cols = {"node_id": ids,
            "kind": np.asarray(["junction", "tank", "source"], dtype=object)[
                rng.integers(0, 3, n)]}
    for j in range(9):
        cols[f"value_{j}"] = rng.normal(size=n)
    cols["flag"] = rng.integers(0, 2, n).astype(np.int32)
    pts = gpd.GeoDataFrame(cols, geometry=shapely.points(xy), crs="EPSG:32631")
    coords = np.repeat(xy, 3, axis=0) + rng.normal(scale=30, size=(3 * n, 2))
    lines = shapely.linestrings(coords, indices=np.repeat(np.arange(n), 3))
    lin = gpd.GeoDataFrame(dict(cols), geometry=lines, crs="EPSG:32631")
    lin = lin.rename(columns={"node_id": "pipe_id"})
    return {"points": pts, "lines": lin}


def settings():
    """name -> (GDAL config options, layer creation options, use gridflow's writer)."""
    return {
        "default": ({}, {}, False),
        "sync_off": ({"OGR_SQLITE_SYNCHRONOUS": "OFF"}, {}, False),
        "journal_off": ({"OGR_SQLITE_JOURNAL": "OFF"}, {}, False),
        "journal_memory": ({"OGR_SQLITE_JOURNAL": "MEMORY"}, {}, False),
        "cache_32": ({"OGR_SQLITE_CACHE": "32"}, {}, False),
        "cache_512": ({"OGR_SQLITE_CACHE": "512"}, {}, False),
        "page_64k": ({"OGR_SQLITE_PRAGMA": "page_size=65536"}, {}, False),
        "no_threaded_rtree": ({"OGR_GPKG_ALLOW_THREADED_RTREE": "NO"}, {}, False),
        "no_spatial_index": ({}, {"SPATIAL_INDEX": "NO"}, False),
        "sync_off+cache": ({"OGR_SQLITE_SYNCHRONOUS": "OFF", "OGR_SQLITE_CACHE": "512"}, {},
                           False),
        "all_three": ({"OGR_SQLITE_SYNCHRONOUS": "OFF", "OGR_SQLITE_CACHE": "32",
                       "OGR_SQLITE_JOURNAL": "OFF"}, {}, False),
        "gridflow": ({}, {}, True),
    }


def _cpu() -> float:
    """This process's CPU seconds, all threads (GDAL builds the spatial index in one)."""
    t = os.times()
    return t.user + t.system


def write_once(layers, path: Path, config: dict, layer_options: dict, ours: bool) -> float:
    import pyogrio

    if ours:
        from gridflow.io.write import write_layers

        t, c = time.perf_counter(), _cpu()
        write_layers(path, layers)
        return time.perf_counter() - t, _cpu() - c
    old = {k: pyogrio.get_gdal_config_option(k) for k in config}
    pyogrio.set_gdal_config_options(config)
    try:
        t, c = time.perf_counter(), _cpu()
        for name, df in layers.items():
            pyogrio.write_dataframe(df, path, layer=name, driver="GPKG", use_arrow=True,
                                    layer_options=layer_options or None)
        return time.perf_counter() - t, _cpu() - c
    finally:
        pyogrio.set_gdal_config_options(old)


def main() -> None:
    args = [a for a in sys.argv[1:] if not a.startswith("--")]
    n = int(args[0]) if args else 1_000_000
    rounds = next((int(a.split("=")[1]) for a in sys.argv if a.startswith("--rounds=")), 3)
    only = next((a.split("=")[1].split(",") for a in sys.argv if a.startswith("--only=")), None)
    chosen = {k: v for k, v in settings().items() if only is None or k in only}
    layers = frames(n)
    times: dict[str, list[float]] = {k: [] for k in chosen}
    cpus: dict[str, list[float]] = {k: [] for k in chosen}
    loads: dict[str, list[float]] = {k: [] for k in chosen}
    with tempfile.TemporaryDirectory(dir=os.environ.get("BENCH_DIR")) as d:
        for r in range(rounds):
            order = list(chosen) if r % 2 == 0 else list(reversed(chosen))
            for k in order:
                cfg, lopt, ours = chosen[k]
                path = Path(d) / f"{k}_{r}.gpkg"
                loads[k].append(os.getloadavg()[0])
                wall, cpu = write_once(layers, path, cfg, lopt, ours)
                times[k].append(wall)
                cpus[k].append(cpu)
                path.unlink()
                print(f"  round {r} {k}: {wall:.2f} s, cpu {cpu:.2f} s (load {loads[k][-1]:.1f})",
                      file=sys.stderr, flush=True)
    base = statistics.median(times["default"]) if "default" in times else float("nan")
    cbase = statistics.median(cpus["default"]) if "default" in cpus else float("nan")
    print(f"{n} points + {n} 3-vertex lines, 12 attribute columns, {rounds} rounds")
    print(f"{'setting':<20} {'median s':>8} {'min s':>6} {'/default':>8} {'cpu s':>6} "
          f"{'/default':>8} {'load':>9}")
    for k in chosen:
        med, cmed = statistics.median(times[k]), statistics.median(cpus[k])
        print(f"{k:<20} {med:>8.2f} {min(times[k]):>6.2f} {med / base:>8.2f} {cmed:>6.2f} "
              f"{cmed / cbase:>8.2f} {min(loads[k]):>4.1f}-{max(loads[k]):<4.1f}")


if __name__ == "__main__":
    main()
