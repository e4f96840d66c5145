"""The ``check`` job: read and clean the GIS, write the findings and the cleaned network."""

from __future__ import annotations

import datetime as _dt
import hashlib
import logging
from pathlib import Path

import numpy as np
import pandas as pd

from gridflow import __version__
from gridflow.findings import Findings
from gridflow.jobs.layers import roughness_out
from gridflow.network import LINK_PIPE, STATUS_NAMES, VALVE_NAMES
from gridflow.units import out_field

__all__ = ["check_job", "network_layers", "file_sha256"]

log = logging.getLogger("gridflow")


def file_sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:  # read-only
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def network_layers(clean, units: str):
    """``nodes_network`` and ``pipes_network`` GeoDataFrames (no results), in output units."""
    net = clean.network
    el, fe = out_field("elevation", units)
    hd, fh = out_field("head", units)
    ln, fl = out_field("length", units)
    dm, fd = out_field("diameter", units)
    pr, fp = out_field("pressure", units)
    nodes = clean.nodes.copy()
    nodes["fixed_head"] = net.is_fixed.astype(np.int32)
    nodes[f"elevation_{el}"] = net.elevation_m * fe
    nodes[f"fixed_head_{hd}"] = net.fixed_head_m * fh
    nodes = nodes[["node_id", "kind", "fixed_head", "zone", f"elevation_{el}",
                   f"fixed_head_{hd}", "geometry"]]
    links = clean.links.copy()
    links["from_node"] = net.node_id[net.from_idx]
    links["to_node"] = net.node_id[net.to_idx]
    links[f"length_{ln}"] = net.length_m * fl
    links[f"diameter_{dm}"] = net.diameter_m * fd
    links["roughness"] = np.where(net.link_kind == LINK_PIPE, roughness_out(net, units), np.nan)
    links["roughness_model"] = net.headloss_model
    links["minor_loss_k"] = net.minor_k
    links["status"] = np.asarray(STATUS_NAMES, dtype=object)[net.status]
    links["valve_type"] = np.asarray(VALVE_NAMES, dtype=object)[net.valve_type]
    links["zone"] = net.zone[net.from_idx]
    links[f"pressure_rating_{pr}"] = links.pop("pressure_rating_m") * fp
    cols = ["pipe_id", "kind", "from_node", "to_node", f"length_{ln}", f"diameter_{dm}",
            "roughness", "roughness_model", "minor_loss_k", "status", "valve_type", "zone",
            "material", "install_year", f"pressure_rating_{pr}", "geometry"]
    return nodes, links[cols]


def check_job(config_path, out=None) -> int:
    """Load the config, build the network, write findings and the cleaned network.

    Writes ``findings``, ``nodes_network``, ``pipes_network`` and ``run_info`` to the output
    GeoPackage (``out`` or ``[run] output``) and prints a summary. Returns 0: findings are
    results, not failures.

    Raises
    ------
    ConfigError, InputError, OutputError
        Unusable config, input or output path (exit code 2); nothing is written.
    """
    from gridflow.config import load_config
    from gridflow.io.publish import check_database_output, output_database, publish_postgis
    from gridflow.io.write import write_geopackage
    from gridflow.topology import build_network

    start = _dt.datetime.now(_dt.UTC)
    cfg = load_config(config_path)
    out_path = Path(out) if out else cfg.resolve(cfg.run.output)
    from gridflow.io.paths import check_outputs, input_paths

    # before anything is read: inputs are regular files, the output is none of them
    check_outputs({"output GeoPackage": out_path}, input_paths(cfg))
    findings = Findings()
    clean = build_network(cfg, findings)
    nodes, links = network_layers(clean, cfg.run.units)
    fgdf = findings.to_geodataframe(crs=clean.crs)
    end = _dt.datetime.now(_dt.UTC)
    info = [("tool", "gridflow"), ("tool_version", __version__), ("command", "check"),
            ("config", str(Path(config_path))), ("config_sha256", cfg.sha256),
            ("start_time", start.isoformat(timespec="seconds")),
            ("end_time", end.isoformat(timespec="seconds")), ("unit_system", cfg.run.units),
            ("crs", clean.crs.to_string()), ("nodes", str(clean.network.n_nodes)),
            ("links", str(clean.network.n_links)), ("hydrants", str(len(clean.hydrants))),
            ("findings", str(len(findings)))]
    for sev in ("error", "warning", "info"):
        info.append((f"findings_{sev}", str(findings.count(severity=sev))))
    for p in clean.inputs:
        info.append((f"input_sha256:{p}", file_sha256(p)))
    run_info = pd.DataFrame(info, columns=["key", "value"])
    layers = {"findings": fgdf, "nodes_network": nodes, "pipes_network": links,
              "run_info": run_info}
    db_out = output_database(out or cfg.run.output, "--out" if out else "run.output")
    written = str(out_path)
    if db_out is not None:  # published to a database schema, in one transaction
        check_database_output(db_out, cfg)
        written = publish_postgis(db_out, layers, crs=clean.crs)
    else:
        write_geopackage(out_path, layers,
                         inputs=[*clean.inputs, *([cfg.path] if cfg.path else [])], styles=True)
    kinds = pd.Series(findings.kind, dtype=object)
    print(f"gridflow check: {clean.network.n_nodes} nodes, {clean.network.n_links} links, "
          f"{len(clean.hydrants)} hydrants, {len(set(clean.network.zone))} zones")
    print(f"findings: {findings.count(severity='error')} error, "
          f"{findings.count(severity='warning')} warning, {findings.count(severity='info')} info")
    for k, c in kinds.value_counts().sort_index().items():
        print(f"  {k}: {c}")
    print(f"written: {written}")
    print("Results are model estimates of the GIS as mapped; field tests, local codes and "
          "licensed engineers decide.")
    return 0
