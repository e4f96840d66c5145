"""Config sections ``[fireflow]`` and ``[report]``."""

from __future__ import annotations

from dataclasses import dataclass

from gridflow.config.schema import (
    P_BOOL,
    P_FLOAT,
    P_INT,
    P_STR,
    list_of,
    opt,
    quantity,
    table_of,
)
from gridflow.units import GPM as _GPM
from gridflow.units import INCH, M_HEAD_PER_PSI

__all__ = ["FireflowSection", "ReportSection"]

GPM = _GPM


@dataclass(frozen=True, kw_only=True)
class FireflowSection:
    enabled: bool = opt(True, parse=P_BOOL, doc="run the fire-flow sweep")
    scenario: str = opt("max_day", parse=P_STR, doc="base scenario the fire draw is added to")
    residual_pressure: float = opt(20 * M_HEAD_PER_PSI, parse=quantity("pressure"),
                                   doc="residual pressure at the hydrant for available flow")
    system_wide: bool = opt(True, parse=P_BOOL,
                            doc="also keep every other supplied node in the zone above "
                                "system_minimum")
    system_minimum: float = opt(20 * M_HEAD_PER_PSI, parse=quantity("pressure"),
                                doc="minimum pressure elsewhere in the zone during fire flow")
    max_velocity: float = opt(0.0, parse=quantity("velocity", minimum=0.0),
                              doc="optional pipe velocity limit during fire flow ('0 m/s': off)")
    pressure_driven: bool = opt(False, parse=P_BOOL,
                                doc="pressure-driven demand at the other nodes during fire flow")
    default_required: float = opt(1500 * GPM, parse=quantity("flow", minimum=0.0),
                                  doc="required fire flow where no attribute, land use or zone "
                                      "default applies")
    required_by_land_use: dict = opt(parse=table_of(quantity("flow", minimum=0.0)),
                                     default_factory=dict,
                                     doc="required fire flow by land-use code")
    required_by_zone: dict = opt(parse=table_of(quantity("flow", minimum=0.0)),
                                 default_factory=dict, doc="required fire flow by zone")
    lateral_length: float = opt(0.0, parse=quantity("length", minimum=0.0),
                                doc="default hydrant lateral length ('0 m': no lateral)")
    lateral_diameter: float = opt(6 * INCH, parse=quantity("length", minimum=0.0),
                                  doc="default hydrant lateral diameter")
    lateral_c: float = opt(120.0, parse=P_FLOAT,
                           doc="Hazen-Williams C of hydrant laterals (Hazen-Williams runs)")
    lateral_roughness: float = opt(0.15e-3, parse=quantity("length", minimum=0.0),
                                   doc="absolute roughness of hydrant laterals (Darcy-Weisbach "
                                       "runs), e.g. '0.15 mm'")
    hydrant_k: float = opt(0.0, parse=P_FLOAT, doc="minor-loss K of hydrant and lateral fittings")
    batch_size: int = opt(100, parse=P_INT, doc="hydrants per parallel task")
    progress_every: int = opt(10, parse=P_INT,
                              doc="log progress to the 'gridflow' logger every N batches")


@dataclass(frozen=True, kw_only=True)
class ReportSection:
    enabled: bool = opt(True, parse=P_BOOL, doc="write the HTML report beside the GeoPackage")
    hgl_path: list = opt(parse=list_of(P_STR), default_factory=list,
                         doc="node ids of the HGL profile path (default: a source to the "
                             "lowest-pressure node of the worst scenario)")
    worst_rows: int = opt(20, parse=P_INT, doc="rows in the worst-nodes and fastest-mains tables")
