"""The nightly job: read, clean, allocate, solve every scenario, flag, fire flow, write.

Exit codes (the contract): 0 done; 2 unusable config or input (nothing written); 3 a scenario did
not converge (diagnostics written to ``<stem>.diagnostics.gpkg`` beside the output, whose
previous version is left as it was: findings name the worst node and link); 1 unexpected.
"""

from __future__ import annotations

import datetime as _dt
import functools
import logging
import os
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

from gridflow import __version__
from gridflow.config import Config, load_config
from gridflow.errors import ConfigError, ConvergenceError, InputError, OutputError, TopologyError
from gridflow.findings import Findings
from gridflow.hydraulics import HydraulicResult, HydraulicSystem, SolveOptions
from gridflow.io.atomic import OutputSet
from gridflow.jobs.check import file_sha256
from gridflow.jobs.console import print_summary, terminal_progress
from gridflow.jobs.signals import stop_on_signals
from gridflow.memory import release_memory, resident_mb
from gridflow.network import NODE_JUNCTION, Network

__all__ = ["run_job", "solve_options", "verify_solution", "require_solvable",
           "check_output_path", "diagnostics_path", "shut_zone_findings"]

log = logging.getLogger("gridflow")


def solve_options(cfg: Config) -> SolveOptions:
    s = cfg.solver
    return SolveOptions(max_iter=s.max_iter, flow_tolerance=s.flow_tolerance,
                        mass_relative_tolerance=s.flow_relative_tolerance,
                        max_status_rounds=s.max_status_rounds,
                        head_tolerance=s.head_tolerance, pressure_driven=s.pressure_driven,
                        pdd_min_pressure=s.pdd_min_pressure,
                        pdd_required_pressure=s.pdd_required_pressure)


def verify_solution(system: HydraulicSystem, r: HydraulicResult) -> tuple[float, float, int, int]:
    """Recheck a solution on the values about to be written.

    Returns the largest mass imbalance [m3/s] over supplied unknown-head nodes, the largest
    head-loss residual [m] over open links between supplied nodes, and the worst node and
    link positions, by the same residual function the solvers use
    (:func:`gridflow.hydraulics.assembly.residuals`). A non-finite head or flow at a supplied
    node or open link counts as an infinite residual there.
    """
    res = system.residuals(r)
    return res.max_mass, res.max_error, res.worst_node, res.worst_link


def diagnostics_path(out_path: Path) -> Path:
    """Where a run that does not converge writes: ``<stem>.diagnostics.gpkg`` beside the output
    (the output itself, last night's results, stays as it was)."""
    return out_path.with_name(f"{out_path.stem}.diagnostics.gpkg")


def shut_zone_findings(name: str, system: HydraulicSystem, r: HydraulicResult, findings,
                       link_geoms, meter_link_idx: np.ndarray | None = None) -> tuple[int, float]:
    """A warning per zone that the input connects to a fixed head but the solution leaves dry
    because a device is shut, at the device(s); returns (nodes, undelivered demand m3/s)."""
    net = system.net
    n_nodes, undelivered = 0, 0.0
    for z in system.shut_zones(r):
        inz = np.zeros(net.n_nodes, dtype=bool)
        inz[z.nodes] = True
        meters = 0
        if meter_link_idx is not None and len(meter_link_idx):
            ok = meter_link_idx >= 0
            li = meter_link_idx[ok]
            meters = int(np.sum(inz[net.from_idx[li]] | inz[net.to_idx[li]]))
        devices = [str(net.link_id[k]) for k in z.devices] or ["(none found)"]
        msg = (f"scenario {name}: {len(z.nodes)} node(s) and {meters} meter(s) are connected to "
               f"a source or tank by links open in the GIS but get no supply because "
               f"{', '.join(devices)} shut; {z.required_m3s * 1000:.3g} L/s of demand is not "
               "delivered")
        for k in (z.devices if len(z.devices) else [int(z.nodes[0])]):
            layer = f"pipes_{name}" if len(z.devices) else f"nodes_{name}"
            fid = net.link_id[k] if len(z.devices) else net.node_id[k]
            geom = link_geoms[k] if len(z.devices) else None
            findings.add("supply_cut_by_device", "warning", layer, fid, msg, geom)
        log.warning(msg)
        n_nodes += len(z.nodes)
        undelivered += z.required_m3s
    return n_nodes, undelivered


def _released(stage: str) -> None:
    """Free memory back to the system after a large stage; the resident size to the log."""
    release_memory()
    log.debug("memory after %s: %.0f MB resident", stage, resident_mb())


def _attach_log_file(log_path: Path) -> logging.Handler | None:
    try:
        handler = logging.FileHandler(log_path, mode="w", encoding="utf-8")
    except OSError:
        return None
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s %(message)s"))
    handler.setLevel(logging.DEBUG)
    logging.getLogger("gridflow").addHandler(handler)
    return handler


def output_paths(out_path: Path) -> dict[str, Path]:
    """Every file a run may write for the target ``out_path``, by what it is."""
    stem = out_path.stem
    return {"output GeoPackage": out_path,
            "report": out_path.with_suffix(".html"),
            "log file": out_path.with_suffix(".log"),
            "log of a failed run": out_path.with_name(f"{stem}.failed.log"),
            "diagnostics file": out_path.with_name(f"{stem}.diagnostics.gpkg")}


def _input_sha256(cfg: Config, name: str, p: str) -> str:
    path = cfg.resolve(p)
    try:
        return file_sha256(path)
    except OSError as exc:
        what = "does not exist" if isinstance(exc, FileNotFoundError) else \
            f"cannot be read ({exc.strerror})"
        raise InputError(f"input file {path} (inputs.{name}) {what}", file=str(path),
                         key=f"inputs.{name}") from None


def require_solvable(cfg: Config, clean) -> None:
    """Stop before solving a network that can only give wrong answers.

    Raises
    ------
    TopologyError
        No source or tank reached the network (nothing fixes the heads).
    InputError
        No junction has a known elevation: every pressure would be made up.
    """
    net = clean.network
    if not net.is_fixed.any():
        roles = [r for r in ("sources", "tanks") if getattr(cfg.layers, r) is not None]
        where = (f"the features of layers.{' and layers.'.join(roles)} were all left out "
                 "(gridflow check lists why)" if roles else
                 "map layers.sources or layers.tanks in the config")
        raise TopologyError(f"the network has no source or tank, so no head is known and "
                            f"nothing can be solved: {where}",
                            layer=", ".join(getattr(cfg.layers, r).layer for r in roles) or None)
    guessed = getattr(clean, "elevation_guessed", None)
    junction = net.node_kind == NODE_JUNCTION
    if guessed is not None and junction.any() and np.all(guessed[junction]):
        sec = cfg.layers.nodes
        src = cfg.elevation.source
        if src == "attribute" and sec is not None and "elevation" in sec.fields:
            path = cfg.resolve(cfg.inputs[sec.input])
            raise InputError(f"{path}: layer {sec.layer!r}, field {sec.fields['elevation']!r}: "
                             "no junction has an elevation, so every pressure would be made "
                             "up; fill the field or set [elevation] source", file=str(path),
                             layer=sec.layer, field=sec.fields["elevation"])
        raise InputError(f"no junction has an elevation (elevation.source = {src!r}), so "
                         "every pressure would be made up; map layers.nodes.fields.elevation, "
                         "digitise mains with Z, or give a DEM", key="elevation.source")


def check_output_path(out_path: Path, cfg: Config, previous: str | Path | None = None,
                      extra: dict[str, Path] | None = None) -> dict[str, Path]:
    """Check every output of the run against every input before anything is read or written.

    Inputs (config, input files, DEM, ``--previous``) must be regular files; no output (nor
    ``extra`` ones, e.g. temporaries) may be an input by path, symlink or hard link, nor a
    folder, nor sit in a folder that cannot be written. ``--previous`` may be the output
    GeoPackage itself (it is read before anything is written). Returns the outputs.
    """
    from gridflow.io.paths import check_outputs, input_paths

    outputs = output_paths(out_path)
    inputs = input_paths(cfg, previous)
    gpkg_inputs = {k: v for k, v in inputs.items() if not k.startswith("previous")}
    check_outputs({"output GeoPackage": out_path}, gpkg_inputs)
    rest = {k: v for k, v in outputs.items() if k != "output GeoPackage"}
    check_outputs({**rest, **(extra or {})}, inputs)
    check_outputs(outputs, {})
    return outputs


def run_job(config_path: str | Path, *, out: str | Path | None = None,
            previous: str | Path | None = None, workers: int | None = None,
            scheduler: str | None = None) -> int:
    """Run the nightly job; returns 0 or raises a :class:`GridflowError` (see exit codes)."""
    from gridflow.io.publish import check_database_output, local_output_path, output_database

    t_start = time.perf_counter()
    started = _dt.datetime.now(_dt.UTC)
    cfg = load_config(config_path)
    db_out = output_database(out or cfg.run.output, "--out" if out else "run.output")
    out_path = Path(out) if out else cfg.resolve(cfg.run.output)
    if db_out is not None:  # published to a database schema; the log and report stay local
        check_database_output(db_out, cfg)
        out_path = local_output_path(db_out, cfg)
    if not out or db_out is not None:  # the output folder (e.g. out/) is made on first use
        try:
            out_path.parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise OutputError(f"cannot make the output folder {out_path.parent}: "
                              f"{exc.strerror}", file=str(out_path)) from None
    outputs = check_output_path(out_path, cfg, previous)
    if workers is not None and not 1 <= workers <= 1024:
        raise ConfigError(f"--workers {workers} is out of range; valid: 1 to 1024",
                          key="--workers")
    if scheduler and cfg.fireflow.enabled:
        # fail in seconds, not after the scenarios: is the cluster there and runnable?
        from gridflow.analysis.fireflow import connect_scheduler

        connect_scheduler(scheduler).close()
    with OutputSet(outputs.values()) as outs, stop_on_signals():
        check_output_path(out_path, cfg, previous, extra={
            f"temporary file for the {k}": outs.temp(v) for k, v in outputs.items()})
        return _run(cfg, out_path, outputs, outs, previous, workers, scheduler, t_start,
                    started, db_out)


def _run(cfg: Config, out_path: Path, outputs: dict[str, Path], outs: OutputSet,
         previous, workers, scheduler, t_start: float, started, db_out) -> int:
    from gridflow.analysis.changes import compare_flags, flag_set, read_previous_flags
    from gridflow.analysis.flags import node_flags, pipe_flags
    from gridflow.config.database import is_database, parse_database
    from gridflow.demand import allocate, run_info_rows, scenario_network
    from gridflow.io.deferred import DeferredLayer
    from gridflow.io.postgis import last_snapshots
    from gridflow.io.postgis import read_previous_flags as pg_previous_flags
    from gridflow.io.publish import publish_postgis
    from gridflow.io.write import write_layers
    from gridflow.jobs.stages import scenario_layer_parts, scenario_layers
    from gridflow.topology import build_network

    log_path = outputs["log file"]
    handler = _attach_log_file(outs.temp(log_path))
    done = False
    try:
        prev_flags = (None if not previous else pg_previous_flags(previous)
                      if is_database(previous) else read_previous_flags(previous))
        system_units = cfg.run.units
        findings = Findings(keep_routine=False)  # routine facts: counts only (run_info)
        info: list[tuple[str, str]] = [
            ("name", cfg.run.name), ("tool_version", __version__), ("config", str(cfg.path)),
            ("config_sha256", cfg.sha256), ("unit_system", system_units),
            ("headloss_model", cfg.run.headloss_model),
        ]
        for name, p in cfg.inputs.items():
            if is_database(p):  # the database (never a password) and the snapshot read
                info.append((f"input_database:{name}", str(parse_database(p, name))))
                continue
            info.append((f"input_sha256:{name}", _input_sha256(cfg, name, p)))

        t0 = time.perf_counter()
        log.info("reading and cleaning the GIS")
        clean = build_network(cfg, findings)
        require_solvable(cfg, clean)
        info += [(f"input_snapshot:{k}", v) for k, v in last_snapshots().items()]
        _released("reading and cleaning")
        info.append(("seconds_read_clean", f"{time.perf_counter() - t0:.2f}"))
        log.info("network: %d nodes, %d links", clean.network.n_nodes, clean.network.n_links)
        t0 = time.perf_counter()
        alloc = allocate(cfg, clean, findings)
        # the meters' points served the allocation (kept per meter in ``alloc``); a
        # utility's million meters as points are not carried through the rest of the run
        clean.meters = clean.meters.iloc[:0]
        info += run_info_rows(alloc, cfg.run.units)
        _released("demand allocation")
        info.append(("seconds_demand", f"{time.perf_counter() - t0:.2f}"))

        opts = solve_options(cfg)
        layers: dict[str, object] = {}
        # per scenario, its network and result; not its system (link laws, components): only
        # the last one is kept, for its shared factorization pattern
        results: dict[str, tuple[Network, HydraulicResult]] = {}
        rating = getattr(clean.links, "pressure_rating_m", None)
        rating = None if rating is None else np.asarray(rating, dtype=float)
        failure: ConvergenceError | None = None
        shared: HydraulicSystem | None = None  # one symbolic analysis for every scenario
        for name in cfg.scenarios:
            t0 = time.perf_counter()
            net = scenario_network(cfg, clean, alloc, name)
            system = HydraulicSystem(net, opts, share=shared)
            shared = system
            try:
                r = system.solve()
            except ConvergenceError as exc:
                r = exc.fields["result"]
                worst = list(net.node_id[system.residuals(r).worst_nodes(10)])
                findings.add_many("not_converged", "error", f"nodes_{name}", worst,
                                  [f"scenario {name}: {r.message}"] * len(worst),
                                  list(clean.nodes.geometry.values[net.node_index(worst)]))
                failure = ConvergenceError(f"scenario {name} did not converge: {r.message}",
                                           node_id=exc.fields.get("node_id"),
                                           link_id=exc.fields.get("link_id"))
                info.append((f"{name}:converged", "0"))
                break
            _released(f"scenario {name}")
            mass, headres, wn, wl = verify_solution(system, r)
            cut_nodes, cut_m3s = shut_zone_findings(
                name, system, r, findings, clean.links.geometry.values,
                getattr(alloc, "meter_link_idx", None))
            r.message += (f"; {cut_nodes} node(s) cut off by shut devices"
                          if cut_nodes else "")
            info += [(f"iterations_{name}", str(r.iterations)),
                     (f"{name}:status_rounds", str(r.status_rounds)),
                     (f"{name}:solve_status", r.status),
                     (f"{name}:undelivered_demand_m3s", f"{r.undelivered_m3s:.6g}"),
                     (f"{name}:cut_off_nodes", str(cut_nodes)),
                     (f"{name}:cut_off_demand_m3s", f"{cut_m3s:.6g}"),
                     (f"{name}:mass_residual_m3s", f"{mass:.3e}"),
                     (f"{name}:head_residual_m", f"{headres:.3e}"),
                     (f"{name}:converged", "1"),
                     (f"{name}:seconds", f"{time.perf_counter() - t0:.2f}")]
            mtol = max(opts.flow_tolerance, r.mass_tolerance_m3s)
            if not (mass <= 10 * mtol and headres <= 10 * opts.head_tolerance):
                msg = (f"scenario {name}: the solution failed its check (mass imbalance "
                       f"{mass:.3g} m3/s at node {net.node_id[wn]}, head-loss residual "
                       f"{headres:.3g} m on link {net.link_id[wl]}); its results are not written")
                findings.add("solution_check_failed", "error", f"nodes_{name}", net.node_id[wn],
                             msg, clean.nodes.geometry.values[wn])
                findings.add("solution_check_failed", "error", f"pipes_{name}", net.link_id[wl],
                             msg, clean.links.geometry.values[wl])
                failure = ConvergenceError(msg, node_id=net.node_id[wn], link_id=net.link_id[wl])
                break
            # the flags the layers carry, counted on the same arrays; the layers themselves
            # are built one at a time when written (a GeoDataFrame per scenario held to the
            # end costs several times the arrays at the scale of a large utility)
            nflags = node_flags(net, r, cfg.criteria)
            pflags = pipe_flags(net, r, cfg.criteria)
            for flag in ("low_pressure", "high_pressure", "negative_pressure"):
                info.append((f"{name}:{flag}", str(int(nflags[flag].sum()))))
            info.append((f"{name}:unsupplied", str(int((nflags["supplied"] == 0).sum()))))
            for flag in ("high_velocity", "high_headloss"):
                info.append((f"{name}:{flag}", str(int(pflags[flag].sum()))))
            del nflags, pflags
            for which, rows in (("nodes", net.n_nodes), ("pipes", net.n_links)):
                layers[f"{which}_{name}"] = DeferredLayer(
                    functools.partial(scenario_layers, cfg, clean, net, r, which=which), rows,
                    crs=clean.crs,
                    parts=functools.partial(scenario_layer_parts, cfg, clean, net, r,
                                            which=which))
            results[name] = (net, r)
            del system
            log.info("scenario %s: %s", name, r.message)

        shared = None  # the symbolic analysis: no more systems are built from here on
        if failure is None and cfg.fireflow.enabled and len(clean.hydrants):
            layers["hydrants_fireflow"] = _fireflow(cfg, clean, results, opts, workers,
                                                    scheduler, findings, info)

        if failure is None:
            from gridflow.jobs.flowtests import flow_tests_step

            ft, _ = flow_tests_step(cfg, clean, alloc, opts, findings, info, previous=previous,
                                    workers=workers, scheduler=scheduler)
            if ft is not None:
                layers["flow_tests"] = ft
        if failure is None and cfg.segments.enabled:
            from gridflow.jobs.segments import segments_step

            t0 = time.perf_counter()
            seg_name = cfg.segments.scenario if cfg.segments.scenario in results else \
                next(iter(results))
            s_net, s_base = results[seg_name]
            layers["segments"] = segments_step(
                cfg, clean, alloc, s_net, s_base, opts, workers=workers, scheduler=scheduler,
                findings=findings, info=info, progress=terminal_progress("segment closures"))
            _released("valve segments")
            info.append(("seconds_segments", f"{time.perf_counter() - t0:.2f}"))
        del alloc  # the meters' allocation served the scenarios, flow tests and segments

        # the layer holds what someone should look at; routine facts become counts
        findings_gdf = findings.to_geodataframe(crs=clean.crs, routine=False)
        layers["findings"] = findings_gdf
        routine = findings.routine_counts()
        info += [(f"routine:{k}", str(v)) for k, v in routine.items()]
        if prev_flags is not None:
            changes = compare_flags(flag_set(layers), prev_flags)
            layers["changes"] = changes
            n_new = int((changes["change"] == "new").sum())
            n_res = int((changes["change"] == "resolved").sum())
            info += [("changes_new", str(n_new)), ("changes_resolved", str(n_res))]
            log.info("since the previous run: %d new flag(s), %d resolved", n_new, n_res)
        info += [("findings", str(len(findings_gdf))),
                 ("started_utc", started.isoformat(timespec="seconds")),
                 ("ended_utc", _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds")),
                 ("seconds_total", f"{time.perf_counter() - t_start:.2f}")]
        layers["run_info"] = pd.DataFrame(info, columns=["key", "value"])
        if failure is not None:
            # last night's outputs stay as they are; what went wrong goes beside them
            diag = outputs["diagnostics file"]
            outs.write(diag, lambda tmp: write_layers(tmp, layers, styles=True))
            outs.commit([diag])
            log.info("wrote %s", diag)
            failure.message += f"; diagnostics in {diag} (the previous output is kept)"
            failure.args = (failure.message,)
            raise failure
        published = None
        _released("the analyses")
        # what the report takes from the GIS layers: node coordinates, the drawn segments
        parts = _report_parts(clean, layers) if cfg.report.enabled else None
        if db_out is None:
            gpkg = outputs["output GeoPackage"]
            outs.write(gpkg, lambda tmp: write_layers(tmp, layers, styles=True))
            log.info("wrote %s", gpkg)
            from gridflow.jobs.layers import forget_text_columns

            forget_text_columns()  # the layers' id columns: not needed by the report
            if parts is not None:
                _let_go_of_geometry(clean, layers)
            _released("writing the GeoPackage")
        if cfg.report.enabled:
            html = outputs["report"]
            outs.write(html, lambda tmp: _report(cfg, tmp, clean, results, layers, info,
                                                  routine, rating, parts))
            log.info("wrote %s", html)
            _released("the report")
        if handler is not None:
            logging.getLogger("gridflow").removeHandler(handler)
            handler.close()
            handler = None
            outs.adopt(log_path)
        if db_out is not None:  # one transaction; the local report and log follow it
            published = publish_postgis(db_out, layers, crs=clean.crs)
        outs.commit()
        done = True
        print_summary(out_path, layers, findings, cfg.report.enabled, published,
                      units=cfg.run.units)
        return 0
    finally:
        if handler is not None:
            logging.getLogger("gridflow").removeHandler(handler)
            handler.close()
        tmp_log = outs.temp(log_path)
        if not done and tmp_log.exists():
            failed = outputs["log of a failed run"]
            try:
                os.replace(tmp_log, failed)
                print(f"log of the failed run: {failed}", file=sys.stderr)
            except OSError:
                pass


def _fireflow(cfg, clean, results, opts, workers, scheduler, findings, info):
    from gridflow.jobs.stages import fireflow_layer

    name = cfg.fireflow.scenario
    net, base = results[name]
    t0 = time.perf_counter()
    ff, layer = fireflow_layer(cfg, clean, net, base, opts, workers=workers,
                               scheduler=scheduler, progress=terminal_progress("fire flow"))
    below = ff.attrs.get("base_below_minimum", [])
    if len(below):
        idx = net.node_index(below)
        findings.add_many("below_minimum_before_fire", "warning", f"nodes_{name}", list(below),
                          f"pressure is below the fire-flow system minimum in scenario {name} "
                          "before any fire draw; not counted as limiting each hydrant",
                          list(clean.nodes.geometry.values[idx]))
    summary = ff.attrs["summary"]
    info += [("fireflow:scenario", name), ("fireflow:hydrants", str(summary["hydrants"])),
             ("fireflow:out_of_service", str(summary["out_of_service"])),
             ("fireflow:failing", str(summary["hydrants"] - summary["meets_required"])),
             ("fireflow:required_not_achievable", str(summary["required_not_achievable"])),
             ("fireflow:high_velocity", str(summary["high_velocity"])),
             ("fireflow:full_newton_fallback", str(summary["fallback"])),
             ("fireflow:status_variant", str(summary["status_variant"])),
             ("fireflow:factorizations", str(summary["factorizations"])),
             ("fireflow:seconds", f"{time.perf_counter() - t0:.2f}")]
    return layer


def _report_parts(clean, layers) -> dict:
    """What the report takes from the GIS layers, made before they are let go: the node
    coordinates and the segments' fields with the geometry of the segments the map draws."""
    import geopandas as gpd
    import shapely

    from gridflow.io.deferred import DeferredLayer, materialize
    from gridflow.report.interactive import segments_to_draw

    geoms = clean.nodes.geometry.values
    xy = shapely.get_coordinates(geoms)
    xy = xy if len(xy) == len(geoms) else None
    seg = layers.get("segments")
    if isinstance(seg, DeferredLayer) and seg.geometry is not None:
        # the map draws a few hundred segments: their geometry is made for those alone
        attrs = seg.attributes
        drawn = segments_to_draw(attrs, seg.geometry.present)
        geom = np.full(len(attrs), None, dtype=object)
        geom[drawn] = seg.geometry[drawn]
        seg = gpd.GeoDataFrame(attrs.copy(deep=False), geometry=gpd.GeoSeries(
            geom, crs=seg.crs), crs=seg.crs)
    else:
        seg = materialize(seg)
    return {"node_xy": xy, "segments": seg}


def _let_go_of_geometry(clean, layers) -> None:
    """Drop the nodes' and links' geometry once the GeoPackage is written (the report has
    its parts): at the scale of a large utility, shapely objects for millions of features.
    The scenario layers cannot be built again after this."""
    from gridflow.io.deferred import DeferredLayer

    for name in ("nodes", "links"):
        frame = getattr(clean, name)
        setattr(clean, name, pd.DataFrame(frame.drop(columns=frame.geometry.name)))
    seg = layers.get("segments")
    if isinstance(seg, DeferredLayer) and seg.geometry is not None:
        layers["segments"] = seg.attributes


def _report(cfg, html, clean, results, layers, info, routine, rating, parts):
    """The HTML report, from the results in memory (SI arrays, typed criteria)."""
    from gridflow.report import ReportData, ScenarioData, write_report
    from gridflow.report.fireflow import in_service, limiting_nodes_table
    from gridflow.report.flowtests import flow_tests_table
    from gridflow.report.segments import segments_table

    scenarios = [ScenarioData.solved(name, net, r, cfg.criteria)
                 for name, (net, r) in results.items()]
    xy = parts["node_xy"]
    if xy is not None and len(xy) != scenarios[0].network.n_nodes:
        xy = None
    data = ReportData(scenarios=scenarios, criteria=cfg.criteria, units=cfg.run.units,
                      name=cfg.run.name, node_xy=xy,
                      crs=clean.crs.name if clean.crs is not None else "",
                      pressure_rating_m=rating,
                      hydrants=in_service(layers.get("hydrants_fireflow")),
                      findings=layers.get("findings"), changes=layers.get("changes"),
                      flow_tests=layers.get("flow_tests"), segments=parts["segments"],
                      routine=routine, run_info=list(info),
                      hgl_path=cfg.report.hgl_path or None, worst_rows=cfg.report.worst_rows)
    write_report(html, data, extra_tables=[limiting_nodes_table, flow_tests_table,
                                           segments_table])
