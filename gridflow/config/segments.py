"""Config section ``[segments]``: valve segments and shutdown criticality."""

from __future__ import annotations

from dataclasses import dataclass

from gridflow.config.schema import P_BOOL, P_INT, P_STR, list_of, opt, quantity
from gridflow.units import FT

__all__ = ["SegmentsSection"]


@dataclass(frozen=True, kw_only=True)
class SegmentsSection:
    """Valve segments (the parts isolation valves bound) and what closing each one takes out.

    Size bounds are common practice (no single source): a segment longer than about a quarter
    of a mile of main, or serving more than about a hundred customers, points at a missing or
    unmapped valve. Valve spacing of at most 500 ft in commercial districts and 800 ft
    elsewhere is recommended by the Recommended Standards for Water Works (from memory).
    """

    enabled: bool = opt(True, parse=P_BOOL, doc="find valve segments and write the segments "
                                                "layer")
    inoperable_valves: list = opt(parse=list_of(P_STR), default_factory=list,
                                  doc="ids of isolation valves known not to close (their "
                                      "segments merge)")
    max_length: float = opt(1500 * FT, parse=quantity("length", minimum=0.0),
                            doc="a segment with more main than this is a finding ('0 m': no "
                                "limit)")
    max_meters: int = opt(100, parse=P_INT, doc="a segment serving more meters than this is a "
                                                "finding (0: no limit)")
    criticality: bool = opt(False, parse=P_BOOL,
                            doc="close each segment's valves, solve, and count what is lost "
                                "(one solve per segment: hours at 100k mains on two cores)")
    scenario: str = opt("average_day", parse=P_STR,
                        doc="scenario the closures are solved in (default: average_day, else the "
                            "first scenario)")
    batch_size: int = opt(50, parse=P_INT, doc="segments per parallel task (at most)")
