"""What a run shows on the terminal: a progress bar on stderr, a short summary on stdout."""

from __future__ import annotations

import sys
from pathlib import Path

from gridflow.findings import Findings

__all__ = ["print_summary", "terminal_progress"]


def print_summary(out_path: Path, layers: dict, findings: Findings, report: bool,
                  published: str | None = None, *, units: str = "US") -> None:
    """A few lines on stdout for whoever ran the command: what was flagged, where it went."""
    from gridflow.units import out_field

    q_unit, q_factor = out_field("demand", units)
    q_word = {"gpm": "gpm", "lps": "L/s"}.get(q_unit, q_unit)
    print(f"gridflow run: {len(layers['findings'])} finding(s) "
          f"({findings.count(severity='error')} error, {findings.count(severity='warning')} "
          "warning)")
    info = layers.get("run_info")
    kv = dict(zip(info["key"], info["value"], strict=True)) if info is not None else {}
    for name in layers:
        if name.startswith("nodes_"):
            s = name[6:]
            n = _Counts(kv, s, layers[name], layers[f"pipes_{s}"])
            short = float(kv.get(f"{s}:undelivered_demand_m3s", "0") or 0)
            cut = kv.get(f"{s}:cut_off_nodes", "0")
            print(f"  {s}: {n('low_pressure')} low-pressure, {n('high_pressure')} "
                  f"high-pressure, {n('unsupplied')} unsupplied node(s); "
                  f"{n('high_velocity')} fast, {n('high_headloss')} high-loss pipe(s); "
                  f"{cut} node(s) cut off by shut devices, {short * q_factor:.3g} {q_word} of "
                  "demand not delivered")
    if "hydrants_fireflow" in layers:
        h = layers["hydrants_fireflow"]
        ins = h[h["in_service"] == 1]
        print(f"  fire flow: {int((ins['meets_required'] == 0).sum())} of {len(ins)} "
              "in-service hydrant(s) below their required flow"
              + (f"; {len(h) - len(ins)} out of service" if len(h) > len(ins) else ""))
    if "flow_tests" in layers:
        ft = layers["flow_tests"]
        col = next(c for c in ft.columns if c.startswith("residual_diff_"))
        err = ft.loc[ft["used"] == 1, col].abs()
        unit = col.rsplit("_", 1)[-1]
        print(f"  field flow tests: {len(err)} of {len(ft)} compared, residual error mean "
              f"{err.mean():.1f} {unit}, worst {err.max():.1f} {unit}; "
              f"{int(ft['out_of_tolerance'].sum())} out of tolerance")
    if "segments" in layers:
        from gridflow.io.deferred import attributes

        g = attributes(layers["segments"])
        print(f"  valve segments: {len(g)}, {int(g['oversized'].sum())} oversized, "
              f"{int((g['cut_off_segments'] > 0).sum())} whose closure cuts off others")
    if "changes" in layers:
        c = layers["changes"]
        print(f"  since the previous run: {int((c['change'] == 'new').sum())} new, "
              f"{int((c['change'] == 'resolved').sum())} resolved flag(s)")
    print(f"written: {published or out_path}"
          + (f" and {out_path.with_suffix('.html')}" if report else ""))
    print("Results are model estimates of the GIS as mapped; field flow tests, local codes and "
          "licensed engineers decide.")


class _Counts:
    """A scenario's flag counts: from the run record (``<scenario>:<flag>``) where it has
    them, else counted on the layers (built once, if deferred)."""

    def __init__(self, kv: dict, scenario: str, nodes, pipes) -> None:
        self.kv, self.scenario, self.layers = kv, scenario, {"nodes": nodes, "pipes": pipes}
        self.built: dict = {}

    def __call__(self, flag: str) -> int:
        key = f"{self.scenario}:{flag}"
        if key in self.kv:
            return int(self.kv[key])
        which = "pipes" if flag in ("high_velocity", "high_headloss") else "nodes"
        if which not in self.built:
            from gridflow.io.deferred import materialize

            self.built[which] = materialize(self.layers[which])
        df = self.built[which]
        return int((df["supplied"] == 0).sum()) if flag == "unsupplied" else int(df[flag].sum())


def terminal_progress(label: str):
    """A progress bar on stderr when it is a terminal; None (quiet) under a scheduler."""
    if not sys.stderr.isatty():
        return None

    def show(done: int, total: int) -> None:
        width = 30
        filled = int(width * done / max(total, 1))
        sys.stderr.write(f"\r{label} [{'#' * filled}{'.' * (width - filled)}] {done}/{total}")
        if done >= total:
            sys.stderr.write("\n")
        sys.stderr.flush()

    return show
