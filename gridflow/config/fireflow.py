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

#: hydrant body minor-loss K on a 6 in inlet: 2.5 psi at 500 gpm, the largest friction loss
#: AWWA C502 allows through a dry-barrel hydrant's pumper nozzle (from memory), as
#: K = h / (v^2 / 2g) with v = 500 gpm over a 6 in bore: 11.5
HYDRANT_K = 11.5


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
    velocity_limit: bool = opt(False, parse=P_BOOL,
                               doc="also reduce the draw so no main exceeds "
                                   "criteria.max_velocity_fire (off: such mains are only "
                                   "flagged)")
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
    lateral_length: float = opt(6.0, parse=quantity("length", minimum=0.0),
                                doc="hydrant lateral length where the hydrant has none "
                                    "('0 m' with hydrant_k 0: no lateral)")
    lateral_diameter: float = opt(6 * INCH, parse=quantity("length", minimum=0.0),
                                  doc="hydrant lateral diameter where the hydrant has none")
    lateral_c: float = opt(120.0, parse=P_FLOAT,
                           doc="Hazen-Williams C of hydrant laterals (Hazen-Williams runs)")
    lateral_roughness: float = opt(0.15e-3, parse=quantity("length", minimum=0.0),
                                   doc="absolute roughness of hydrant laterals (Darcy-Weisbach "
                                       "runs), e.g. '0.15 mm'")
    hydrant_k: float = opt(HYDRANT_K, parse=P_FLOAT,
                           doc="minor-loss K of the hydrant body (and lateral fittings), "
                               "referred to the lateral's diameter")
    batch_size: int = opt(100, parse=P_INT,
                          doc="largest number of hydrants per parallel task (smaller where "
                              "needed to give every worker at least 4 tasks)")
    progress_every: int = opt(10, parse=P_INT,
                              doc="log progress to the 'gridflow' logger every N batches")


@dataclass(frozen=True, kw_only=True)
class ReportSection:
    enabled: bool = opt(True, parse=P_BOOL, doc="write the HTML report beside the GeoPackage")
    hgl_path: list = opt(parse=list_of(P_STR), default_factory=list,
                         doc="node ids of the HGL profile path (default: a source to the "
                             "lowest-pressure node of the worst scenario)")
    worst_rows: int = opt(20, parse=P_INT, doc="rows in the worst-nodes and fastest-mains tables")
