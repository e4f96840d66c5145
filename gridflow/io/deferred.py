"""Result layers built when they are written, one at a time.

A run at the scale of a large utility holds a node and a pipe layer per scenario; as
GeoDataFrames (text ids as Python strings, a dozen float columns, the geometry) they cost far
more than the SI arrays they are made from. :class:`DeferredLayer` keeps only how to build the
layer; writers (:func:`gridflow.io.write.write_layers`, the PostGIS publisher) call
:func:`materialize` on each layer in turn and let it go once written, so at most one large
layer exists at a time. The built frame is the same as building it up front.
"""

from __future__ import annotations

from collections.abc import Callable

__all__ = ["DeferredLayer", "RowGeometry", "materialize", "attributes"]


class RowGeometry:
    """A layer's geometry made on demand, a few rows at a time.

    ``geom[rows]`` (``rows`` a slice or an array of positions) makes and returns those rows'
    geometries (an object array of shapely geometries, None where a row has none);
    ``present`` says which rows have one, without making any.

    Parameters
    ----------
    make : callable
        ``make(rows)`` as above.
    present : ndarray of bool
        Per row, whether it has a geometry.
    """

    __slots__ = ("_make", "present")

    def __init__(self, make: Callable[[object], object], present) -> None:
        self._make = make
        self.present = present

    def __getitem__(self, rows):
        return self._make(rows)

    def __len__(self) -> int:
        return len(self.present)


class DeferredLayer:
    """A layer described by a function that builds its (Geo)DataFrame on each call.

    Parameters
    ----------
    build : callable
        No arguments; returns the layer's frame. Called once per use (write, publish,
        comparison with the previous run): nothing is cached.
    rows : int
        The layer's row count, known without building it.
    attributes : DataFrame, optional
        The layer's fields without its geometry, where they are small enough to hold: what
        summaries and the report read, without building the layer.
    geometry : RowGeometry or array, optional
        The rows' geometries, by slice (``geometry[start:stop]``; a :class:`RowGeometry`
        makes them on each call). With ``attributes``, writers stream the layer in parts
        without ever holding all of its geometry (:func:`gridflow.io.write.write_layers`).
    crs : optional
        The geometry's CRS (with ``geometry``).
    geometry_type : str
        The layer's geometry type as ``pyogrio`` names it (with ``geometry``), e.g.
        ``"MultiLineString Z"``; ``"Unknown"`` where rows have several types or none.
    parts : callable, optional
        No arguments; returns ``(fields, geometry, geometry_type)``: the layer's fields as a
        ``pyarrow.Table`` typed as the built frame's fields convert to Arrow (text, numbers),
        its geometry by rows (the column after the fields) and the type as above. Called
        once per write, in place of ``build``, by writers that take a layer in parts
        (:func:`gridflow.io.write.write_layers`): the same file, without the frame.
    """

    __slots__ = ("_build", "rows", "attributes", "geometry", "crs", "geometry_type", "parts")

    def __init__(self, build: Callable[[], object], rows: int, attributes=None, *,
                 geometry=None, crs=None, geometry_type: str = "Unknown",
                 parts: Callable[[], tuple] | None = None) -> None:
        if geometry is not None and attributes is None:
            raise ValueError("a DeferredLayer with a geometry function needs its attributes")
        self._build = build
        self.rows = int(rows)
        self.attributes = attributes
        self.geometry = geometry
        self.crs = crs
        self.geometry_type = geometry_type
        self.parts = parts

    def build(self):
        """The layer's frame, built now."""
        return self._build()

    def __len__(self) -> int:
        return self.rows

    def __repr__(self) -> str:
        return f"DeferredLayer(rows={self.rows})"


def materialize(layer):
    """``layer`` itself, or the frame of a :class:`DeferredLayer` built now."""
    return layer.build() if isinstance(layer, DeferredLayer) else layer


def attributes(layer):
    """A layer's fields: the held ``attributes`` of a :class:`DeferredLayer` (built when it
    has none), else the layer itself."""
    if isinstance(layer, DeferredLayer):
        return layer.attributes if layer.attributes is not None else layer.build()
    return layer
