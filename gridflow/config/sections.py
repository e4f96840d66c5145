"""Config sections owned by the run as a whole: ``[run]``, ``[criteria]``, ``[solver]``.

Stage-specific sections live beside the stage's parser: ``layers`` (reading and topology),
``demand`` and ``scenarios``, ``fireflow``, ``report``.
"""

from __future__ import annotations

from dataclasses import dataclass

from gridflow.config.schema import P_BOOL, P_FLOAT, P_INT, P_STR, one_of, opt, quantity
from gridflow.units import FT, M_HEAD_PER_PSI

__all__ = ["RunSection", "CriteriaSection", "SolverSection"]

PSI = M_HEAD_PER_PSI


@dataclass(frozen=True, kw_only=True)
class RunSection:
    name: str = opt("gridflow run", parse=P_STR, doc="a name for the run, shown in the report")
    units: str = opt("US", parse=one_of("US", "SI"),
                     doc="output unit system: US (psi, gpm, ft, in) or SI (kPa, L/s, m, mm)")
    crs: str = opt("", parse=P_STR,
                   doc="target projected CRS (e.g. 'EPSG:26916'); empty: the pipes' CRS, or a "
                       "local UTM zone if that is geographic")
    headloss_model: str = opt("hazen-williams", parse=one_of("hazen-williams", "darcy-weisbach"),
                              doc="friction formula for every pipe")
    output: str = opt("gridflow_results.gpkg", parse=P_STR,
                      doc="output GeoPackage, relative to the config file (--out overrides)")
    snap_tolerance: float = opt(0.5, parse=quantity("length", minimum=0.0),
                                doc="pipe ends closer than this are joined, e.g. '0.5 m'")


@dataclass(frozen=True, kw_only=True)
class CriteriaSection:
    """Flag thresholds. Defaults and their sources are in the README."""

    min_pressure: float = opt(35 * PSI, parse=quantity("pressure"),
                              doc="minimum normal working pressure (low_pressure flag)")
    min_pressure_any: float = opt(20 * PSI, parse=quantity("pressure"),
                                  doc="minimum pressure under any condition incl. fire flow")
    max_pressure: float = opt(100 * PSI, parse=quantity("pressure"),
                              doc="maximum distribution pressure (high_pressure flag)")
    max_static_pressure: float = opt(80 * PSI, parse=quantity("pressure"),
                                     doc="static pressure above which services need a regulator")
    max_velocity: float = opt(5 * FT, parse=quantity("velocity", minimum=0.0),
                              doc="maximum velocity at normal demand (high_velocity flag)")
    max_velocity_fire: float = opt(10 * FT, parse=quantity("velocity", minimum=0.0),
                                   doc="maximum velocity under fire flow: the fastest main "
                                       "of each fire draw is flagged above it (a limit on the "
                                       "draw with fireflow.velocity_limit)")
    max_unit_headloss: float = opt(0.010, parse=quantity("ratio", minimum=0.0),
                                   doc="maximum unit head loss (high_headloss flag), "
                                       "e.g. '10 ft/kft'")


@dataclass(frozen=True, kw_only=True)
class SolverSection:
    max_iter: int = opt(200, parse=P_INT,
                        doc="Newton iterations in all (statuses are checked every 10)")
    flow_tolerance: float = opt(1e-6, parse=P_FLOAT,
                                doc="largest mass imbalance at a node at convergence [m3/s]")
    head_tolerance: float = opt(1e-4, parse=P_FLOAT,
                                doc="largest head-loss residual on a link at convergence [m]")
    pressure_driven: bool = opt(False, parse=P_BOOL,
                                doc="deliver demand by pressure (Wagner et al. 1988) instead of "
                                    "in full")
    pdd_min_pressure: float = opt(0.0, parse=quantity("pressure"),
                                  doc="pressure below which a node delivers nothing")
    pdd_required_pressure: float = opt(20 * PSI, parse=quantity("pressure"),
                                       doc="pressure at which a node delivers its full demand")
    max_status_rounds: int = opt(30, parse=P_INT,
                                 doc="rounds of pump, check-valve and pressure-reducing-valve "
                                     "status changes allowed")
    flow_relative_tolerance: float = opt(
        1e-9, parse=P_FLOAT,
        doc="mass tolerance relative to the largest link flow or total demand (the absolute "
            "flow_tolerance is the floor)")
    pump_shutoff_ratio: float = opt(
        1.25, parse=P_FLOAT,
        doc="shut-off head / design head assumed for a pump given by one design point without "
            "a shut_off_head field (1.25: common practice for radial centrifugal pumps)")
