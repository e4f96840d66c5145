"""What inspecting a mapped layer finds, before any feature is read (file or database)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

__all__ = ["LayerInfo"]


@dataclass(frozen=True)
class LayerInfo:
    """What inspecting a mapped layer found (no features read)."""

    role: str
    file: Any  # a Path; for a database input a gridflow.io.postgis.DatabaseSource
    layer: str
    crs: str | None
    fields: tuple[str, ...]
    geometry_type: str | None
    features: int
    total_bounds: tuple[float, float, float, float] | None = None
    key: str = ""  # config key of the layer section (layers.valves or layers.valves[1])
    index: int = 0  # position among the role's layer sections
