"""The records of demand allocation: what it returns and what its steps hand each other."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, NamedTuple

import numpy as np

from gridflow.findings import Findings
from gridflow.network.model import Network

__all__ = ["Context", "DemandAllocation", "MeterResult", "ZoneCategoryTotal"]


class ZoneCategoryTotal(NamedTuple):
    """Average-day demand of one zone and category, by source [m3/s]."""

    zone: str
    category: str
    metered_m3s: float
    spread_m3s: float
    point_m3s: float

    @property
    def total_m3s(self) -> float:
        return self.metered_m3s + self.spread_m3s + self.point_m3s


@dataclass(frozen=True, eq=False)
class DemandAllocation:
    """Average-day demand placed on the network's nodes.

    Attributes
    ----------
    node_category_m3s : dict of str to ndarray
        Average-day demand per node [m3/s], one array (over the network's nodes) per category.
    totals : list of ZoneCategoryTotal
        Per zone and category: metered, spread and point demand [m3/s].
    node_id : ndarray of str
        The network's node ids (the arrays' order).
    categories : tuple of str
        Every category the config knows (mapped, default, non-revenue, point), whether or not
        it carries demand tonight.
    meter_id : ndarray
        The meters' ids, in the meter layer's order.
    meter_link_idx : ndarray of int64
        Position of the main each meter went to; -1 where it was not allocated.
    meter_to_share : ndarray
        Share of each meter's demand given to the main's ``to`` node (the rest goes to its
        ``from`` node); NaN where not allocated.
    meter_distance_m : ndarray
        Distance from the meter to its main [m]; for meters not allocated, to the nearest main
        of any kind (NaN where the meter has no location or there are no mains).
    meter_flow_m3s : ndarray
        Each meter's average-day consumption [m3/s]; NaN where unusable.
    meter_category : ndarray of str
        Each meter's category.
    counts : dict of str to int
        ``meters``, ``allocated``, ``unallocated``, ``bad_consumption``, ``replaced_by_point``.
    """

    node_category_m3s: dict[str, np.ndarray]
    totals: list[ZoneCategoryTotal]
    node_id: np.ndarray
    categories: tuple[str, ...] = ()
    meter_id: np.ndarray = field(default_factory=lambda: np.empty(0, dtype=object))
    meter_link_idx: np.ndarray = field(default_factory=lambda: np.empty(0, dtype=np.int64))
    meter_to_share: np.ndarray = field(default_factory=lambda: np.empty(0))
    meter_distance_m: np.ndarray = field(default_factory=lambda: np.empty(0))
    meter_flow_m3s: np.ndarray = field(default_factory=lambda: np.empty(0))
    meter_category: np.ndarray = field(default_factory=lambda: np.empty(0, dtype=object))
    counts: dict[str, int] = field(default_factory=dict)

    @property
    def node_demand_m3s(self) -> np.ndarray:
        """Average-day demand per node over all categories [m3/s]."""
        out = np.zeros(len(self.node_id))
        for arr in self.node_category_m3s.values():
            out += arr
        return out


@dataclass
class Context:
    cfg: Any
    net: Network
    findings: Findings
    length_unit: str
    length_factor: float
    meter_layer: str

    def length(self, metres: float) -> str:
        return f"{metres * self.length_factor:.1f} {self.length_unit}"


@dataclass
class MeterResult:
    meter_id: np.ndarray
    flow_m3s: np.ndarray          # NaN where unusable
    category_code: np.ndarray     # int index into categories
    categories: list[str]
    link_idx: np.ndarray          # -1 where not allocated
    to_share: np.ndarray          # NaN where not allocated
    distance_m: np.ndarray
    use: np.ndarray               # bool: counts as metered demand
    counts: dict[str, int]

    @classmethod
    def empty(cls) -> MeterResult:
        return cls(np.empty(0, dtype=object), np.empty(0), np.empty(0, dtype=np.int64), [],
                   np.empty(0, dtype=np.int64), np.empty(0), np.empty(0), np.empty(0, bool),
                   {"meters": 0, "allocated": 0, "unallocated": 0, "bad_consumption": 0,
                    "replaced_by_point": 0})

    @property
    def category_names(self) -> np.ndarray:
        if not self.categories:
            return np.empty(0, dtype=object)
        return np.asarray(self.categories, dtype=object)[self.category_code]
