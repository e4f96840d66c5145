"""Benchmark the HTML report inside a default run, on the synthetic utility of synthetic_utility.py.

For each size, two runs in fresh processes on the same GeoPackage: the default run (report on)
and the same run with the report off. Printed per size: the whole run, the report's own time
(between the run's "wrote <gpkg>" and "wrote <html>" log records) and its share of the run,
peak memory of both runs (ru_maxrss) and the report's extra, the HTML file's size, and the
page's load and map-ready time in headless chromium (DevTools protocol over a pipe; skipped if
chromium is missing).

    python scripts/bench_report.py 100000 500000

Targets: the report under 10 % of a default run at 500k mains, and no more than 10 % extra peak
memory.
"""

from __future__ import annotations

import json
import logging
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE))


class _Stamps(logging.Handler):
    def __init__(self) -> None:
        super().__init__(logging.INFO)
        self.t: dict[str, float] = {}

    def emit(self, record: logging.LogRecord) -> None:
        msg = record.getMessage()
        if msg.startswith("wrote ") and msg.endswith(".gpkg"):
            self.t["gpkg"] = time.perf_counter()
        elif msg.startswith("wrote ") and msg.endswith(".html"):
            self.t["html"] = time.perf_counter()


def one(gis: Path, n: int, report: bool) -> dict:
    from synthetic_utility import config_text

    from gridflow.jobs.run import run_job

    stamps = _Stamps()
    logging.getLogger("gridflow").addHandler(stamps)
    logging.getLogger("gridflow").setLevel(logging.INFO)
    d = Path(tempfile.mkdtemp(dir=gis.parent))
    cfg = d / "utility.toml"
    cfg.write_text(config_text(gis, fireflow=False, report=report))
    out = d / "out.gpkg"
    t0 = time.perf_counter()
    run_job(cfg, out=out)
    total = time.perf_counter() - t0
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    r = {"mains": n, "total_s": total, "peak_mb": rss, "report": report}
    if report:
        r["report_s"] = stamps.t["html"] - stamps.t["gpkg"]
        html = out.with_suffix(".html")
        r["html_mb"] = html.stat().st_size / 1e6
        r["html"] = str(html)
    return r


def render(html: Path) -> tuple[float, float] | None:
    """Seconds to the load event and to the map drawn, in headless chromium."""
    from tests.report.cdp import CHROMIUM, Browser

    if not CHROMIUM.exists():
        return None
    with tempfile.TemporaryDirectory() as prof:
        b = Browser(Path(prof))
        try:
            b.page("Page.enable")
            t0 = time.perf_counter()
            b.page("Page.navigate", url=html.as_uri())
            b.wait_event("Page.loadEventFired", timeout=300)
            load = time.perf_counter() - t0
            b.js("new Promise(r => requestAnimationFrame(() => requestAnimationFrame(r)))")
            ready = time.perf_counter() - t0
            assert b.js("typeof window.gridflowMap") == "object"
        finally:
            b.close()
    return load, ready


def main() -> None:
    if "--one" in sys.argv:
        gis, n, rep = Path(sys.argv[2]), int(sys.argv[3]), sys.argv[4] == "on"
        print(json.dumps(one(gis, n, rep)))
        return
    from synthetic_utility import write_utility

    sizes = [int(a) for a in sys.argv[1:]] or [100_000, 500_000]
    print(f"{'mains':>7} {'run s':>7} {'report s':>8} {'share':>6} | {'run off s':>9} | "
          f"{'peak MB':>8} {'off MB':>7} {'extra':>6} | {'html MB':>7} {'load s':>6} "
          f"{'map s':>6}")
    for n in sizes:
        with tempfile.TemporaryDirectory() as d:
            gis = Path(d) / "utility.gpkg"
            write_utility(gis, n)
            res = {}
            for mode in ("off", "on"):
                out = subprocess.run([sys.executable, __file__, "--one", str(gis), str(n), mode],
                                     capture_output=True, text=True)
                if out.returncode:
                    print(out.stderr[-2000:])
                    break
                res[mode] = json.loads(out.stdout.strip().splitlines()[-1])
            else:
                on, off = res["on"], res["off"]
                times = render(Path(on["html"]))
                load, ready = times if times else (float("nan"), float("nan"))
                print(f"{n:>7} {on['total_s']:>7.1f} {on['report_s']:>8.2f} "
                      f"{on['report_s'] / on['total_s']:>6.1%} | {off['total_s']:>9.1f} | "
                      f"{on['peak_mb']:>8.0f} {off['peak_mb']:>7.0f} "
                      f"{on['peak_mb'] / off['peak_mb'] - 1:>6.1%} | {on['html_mb']:>7.2f} "
                      f"{load:>6.2f} {ready:>6.2f}", flush=True)


if __name__ == "__main__":
    main()
