"""Publishing result layers to a PostgreSQL/PostGIS schema, all at once.

:func:`publish_postgis` writes every layer into a staging schema ``<schema>_staging`` and then
swaps the sets by renaming schemas, all inside **one transaction**::

    DROP SCHEMA <schema>_previous CASCADE      -- the night before last
    ALTER SCHEMA <schema> RENAME TO <schema>_previous
    ALTER SCHEMA <schema>_staging RENAME TO <schema>

Map projects reading ``<schema>`` see last night's set until the commit and tonight's after it,
never a mix; on any failure the transaction rolls back and nothing has changed (not even a
staging schema is left). Last night's set stays in ``<schema>_previous``. Publishers of the same
schema queue on an advisory lock.

Each table has a ``fid`` primary key, a ``geom`` column typed with its geometry type and SRID
(so it appears in ``geometry_columns``) and a GiST spatial index. The default styles go into a
``layer_styles`` table inside the schema (the layout desktop GIS reads styles from), and, where
``public.layer_styles`` exists and may be written, gridflow's rows there are replaced in the same
transaction (desktop GIS finds styles through the search path). Who could
read the old schema (``USAGE``) gets ``USAGE`` on the new one and ``SELECT`` on its tables.

Rows go in by binary ``COPY``: the whole COPY stream is built with numpy from Arrow buffers
(:func:`copy_stream`), never a row at a time.
"""

from __future__ import annotations

import contextlib
import logging
import zlib
from collections.abc import Iterator, Mapping
from pathlib import Path

import numpy as np

from gridflow.config.database import DatabaseSpec, is_database, parse_database
from gridflow.errors import OutputError

__all__ = ["publish_postgis", "copy_frame", "copy_stream", "output_database",
           "check_database_output", "local_output_path"]

log = logging.getLogger("gridflow")

_HEADER = b"PGCOPY\n\xff\r\n\x00" + b"\x00\x00\x00\x00" + b"\x00\x00\x00\x00"
_TRAILER = b"\xff\xff"
#: rows per COPY chunk (bounds the index arrays built for a chunk)
CHUNK_ROWS = 50_000
_GEOM_NAMES = {0: "Point", 1: "LineString", 3: "Polygon", 4: "MultiPoint",
               5: "MultiLineString", 6: "MultiPolygon", 7: "GeometryCollection"}


def _q(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def output_database(target, key: str = "--out") -> DatabaseSpec | None:
    """The database spec of an output, or None when it is a file path."""
    if target is None or not is_database(str(target)):
        return None
    return parse_database(str(target), key)


def local_output_path(spec: DatabaseSpec, cfg) -> Path:
    """Where the log and the HTML report of a database run go: beside ``[run] output`` when
    that is a file, else ``<schema>.gpkg``'s place in the config's folder (no GeoPackage is
    written; the log and report take its name)."""
    if not is_database(cfg.run.output):
        return cfg.resolve(cfg.run.output)
    return cfg.base_dir / f"{spec.schema or 'gridflow'}.gpkg"


def check_database_output(spec: DatabaseSpec, cfg) -> str:
    """Refuse a schema that is an input's, or a system schema; returns the schema name."""
    schema = spec.schema or "gridflow"
    if schema in ("public", "information_schema") or schema.startswith("pg_"):
        raise OutputError(f"output schema {schema!r} is not gridflow's to replace; name a schema "
                          f"of its own (--out '... schema=gridflow')", file=str(spec),
                          layer=schema)
    ours = {schema, f"{schema}_previous", f"{schema}_staging"}
    from gridflow.config.layers import ROLES, layer_sections

    for role, sec in ((r, sc) for r in ROLES for sc in layer_sections(cfg.layers, r)):
        if not is_database(cfg.inputs.get(sec.input)):
            continue
        layer_schema = sec.layer.split(".", 1)[0].lower() if "." in sec.layer else "public"
        if layer_schema in ours:
            raise OutputError(f"output schema {schema!r} holds the input layer {sec.layer!r} "
                              f"(layers.{role}): gridflow never writes to an input; choose "
                              "another schema", file=str(spec), layer=schema)
    return schema


# ---- the binary COPY stream ----------------------------------------------------------------

def _fixed(values: np.ndarray, null: np.ndarray, be_dtype: str):
    return ("fixed", np.ascontiguousarray(values.astype(be_dtype)).view(np.uint8)
            .reshape(len(values), -1), null)


def _varlen(arr):
    """Arrow string/binary array -> ('var', large_binary array, null mask)."""
    import pyarrow as pa

    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks()
    null = arr.is_null().to_numpy(zero_copy_only=False)
    return ("var", arr.cast(pa.large_binary()), null)


def _encode_column(values, kind: str):
    """One column as a COPY field: kind 'int8', 'float8', 'text' or 'bytes'."""
    import pandas as pd
    import pyarrow as pa

    if kind == "int8":
        s = pd.Series(values)
        null = s.isna().to_numpy()
        v = s.fillna(0).to_numpy(dtype=np.int64)
        return _fixed(v, null, ">i8")
    if kind == "float8":
        v = np.asarray(pd.Series(values).to_numpy(dtype=float, na_value=np.nan), dtype=float)
        return _fixed(np.where(np.isfinite(v), v, 0.0), ~np.isfinite(v), ">f8")
    if kind == "text":
        obj = pd.Series(values, dtype=object)
        try:
            arr = pa.array(obj.to_numpy(), type=pa.large_string(), from_pandas=True)
        except (pa.ArrowInvalid, pa.ArrowTypeError):  # mixed values: as text
            arr = pa.array(obj.where(obj.isna(), obj.astype(str)).to_numpy(),
                           type=pa.large_string(), from_pandas=True)
        return _varlen(arr)
    arr = pa.array(np.asarray(values, dtype=object), type=pa.large_binary(), from_pandas=True)
    return _varlen(arr)


def _binary_column(raw: np.ndarray):
    """An (n, w) uint8 array as an Arrow large_binary array of w-byte values (no copy of
    the values into Python objects)."""
    import pyarrow as pa

    n, w = raw.shape
    fixed = pa.FixedSizeBinaryArray.from_buffers(
        pa.binary(w), n, [None, pa.py_buffer(np.ascontiguousarray(raw))])
    return fixed.cast(pa.large_binary())


def copy_stream(fields: list, n: int) -> bytes:
    """The tuples of a binary COPY stream for ``n`` rows (no header or trailer).

    ``fields`` holds encoded columns (:func:`_encode_column`). Each row is an int16 field
    count, then per field an int32 length (-1 for NULL) and the bytes. Every piece is an Arrow
    binary column (length prefixes and fixed-width values laid out with numpy); one
    element-wise join in Arrow's compute kernels concatenates them row by row, and its data
    buffer is the stream.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    if n == 0:
        return b""
    minus_one = pa.scalar(np.array(-1, ">i4").tobytes(), pa.large_binary())
    parts = [_binary_column(np.frombuffer(np.full(n, len(fields), ">i2").tobytes(),
                                          np.uint8).reshape(n, 2))]
    for kind, payload, null in fields:
        if kind == "fixed":
            w = payload.shape[1]
            prefix = np.frombuffer(np.full(n, w, ">i4").tobytes(), np.uint8).reshape(n, 4)
            col = _binary_column(np.hstack([prefix, payload]))
            if null.any():
                col = pc.if_else(pa.array(null), minus_one, col)
            parts.append(col)
        else:
            lens = pc.binary_length(payload).to_numpy(zero_copy_only=False)
            lens = np.where(null, -1, np.nan_to_num(lens, nan=0)).astype(">i4")
            parts.append(_binary_column(lens.view(np.uint8).reshape(n, 4)))
            parts.append(pc.fill_null(payload, pa.scalar(b"", pa.large_binary()))
                         if null.any() else payload)
    rows = pc.binary_join_element_wise(*parts, pa.scalar(b"", pa.large_binary()))
    bufs = rows.buffers()
    off = np.frombuffer(bufs[1], dtype=np.int64)[rows.offset:rows.offset + n + 1]
    return memoryview(bufs[2])[int(off[0]):int(off[-1])].tobytes()


def _layout(df, crs_srid: int):
    """Column names, SQL types and COPY kinds of a frame; the geometry last as ``geom``."""
    import geopandas as gpd
    import shapely

    cols, types, kinds = [], [], []
    geom_col = df.geometry.name if isinstance(df, gpd.GeoDataFrame) and \
        df.geometry.name in df else None
    for c in df.columns:
        if c == geom_col:
            continue
        k = df[c].dtype.kind
        if k in "iub":
            t, kind = "bigint", "int8"
        elif k == "f":
            t, kind = "double precision", "float8"
        else:
            t, kind = "text", "text"
        cols.append(str(c))
        types.append(t)
        kinds.append(kind)
    gtype = None
    if geom_col is not None:
        g = np.asarray(df.geometry.values, dtype=object)
        present = ~(shapely.is_missing(g) | shapely.is_empty(g))
        ids = set(shapely.get_type_id(g[present]).tolist())
        zs = shapely.has_z(g[present])
        z = "Z" if present.any() and zs.all() else ""
        if len(ids) == 1 and ids.pop() in _GEOM_NAMES and (zs.all() or not zs.any()):
            name = _GEOM_NAMES[int(shapely.get_type_id(g[present][0]))]
            gtype = f"geometry({name}{z}, {crs_srid})"
        elif not zs.any() or zs.all():
            gtype = f"geometry(Geometry{z}, {crs_srid})"
        else:
            gtype = "geometry"
    return cols, types, kinds, geom_col, gtype


def copy_frame(conn, schema: str, table: str, df, *, srid: int, pk: str = "fid",
               index: bool = True) -> int:
    """Create ``schema.table`` and fill it from a (Geo)DataFrame by binary COPY; returns rows.

    A ``fid`` primary key (1..n) comes first unless ``pk`` is a column of the frame; the
    geometry (if any) becomes ``geom`` with a GiST index.
    """
    import shapely

    cols, types, kinds, geom_col, gtype = _layout(df, srid)
    n = len(df)
    own_pk = pk not in cols
    defs = ([f"{_q(pk)} bigint PRIMARY KEY"] if own_pk else []) + \
        [f"{_q(c)} {t}" + (" PRIMARY KEY" if c == pk else "") for c, t in zip(cols, types)]
    names = ([pk] if own_pk else []) + cols
    if geom_col is not None:
        defs.append(f"geom {gtype}")
        names.append("geom")
    conn.execute(f"CREATE TABLE {_q(schema)}.{_q(table)} ({', '.join(defs)})")
    geoms = None
    if geom_col is not None:
        g = np.asarray(df.geometry.values, dtype=object)
        geoms = shapely.to_wkb(shapely.set_srid(g, srid), include_srid=True)
    sql = (f"COPY {_q(schema)}.{_q(table)} ({', '.join(_q(c) for c in names)}) "
           "FROM STDIN (FORMAT BINARY)")
    with conn.cursor() as cur, cur.copy(sql) as cp:
        cp.write(_HEADER)
        for a in range(0, max(n, 1), CHUNK_ROWS):
            b = min(n, a + CHUNK_ROWS)
            if b <= a:
                break
            fields = []
            if own_pk:
                fields.append(_encode_column(np.arange(a + 1, b + 1), "int8"))
            for c, kind in zip(cols, kinds):
                fields.append(_encode_column(df[c].iloc[a:b].to_numpy(), kind))
            if geoms is not None:
                fields.append(_encode_column(geoms[a:b], "bytes"))
            cp.write(copy_stream(fields, b - a))
        cp.write(_TRAILER)
    if geom_col is not None and index:
        conn.execute(f"CREATE INDEX {_q(f'{table}_geom_idx')} ON {_q(schema)}.{_q(table)} "
                     "USING gist (geom)")
    return n


def _srid(crs) -> int:
    if crs is None:
        return 0
    from pyproj import CRS

    code = CRS.from_user_input(crs).to_epsg()
    return int(code) if code else 0


def _styles(conn, staging: str, schema: str, dbname: str, layers: list[str]) -> int:
    from gridflow.io.styles import style_for, style_xml

    conn.execute(f"""CREATE TABLE {_q(staging)}.layer_styles (
        id serial PRIMARY KEY, f_table_catalog varchar, f_table_schema varchar,
        f_table_name varchar, f_geometry_column varchar, stylename text, styleqml xml,
        stylesld xml, useasdefault boolean, description text, owner varchar(63),
        ui xml, update_time timestamp DEFAULT CURRENT_TIMESTAMP, type varchar)""")
    rows = []
    for name in layers:
        found = style_for(name)
        if found is not None:
            kind, rules = found
            rows.append((dbname, schema, name, "geom", f"gridflow {name}",
                         style_xml(kind, rules), True, STYLE_DESCRIPTION, None))
    if rows:
        with conn.cursor() as cur:
            cur.executemany(
                f"INSERT INTO {_q(staging)}.layer_styles (f_table_catalog, f_table_schema, "
                "f_table_name, f_geometry_column, stylename, styleqml, useasdefault, "
                "description, type) VALUES (%s, %s, %s, %s, %s, %s::xml, %s, %s, %s)", rows)
    return len(rows)


#: marks the rows gridflow owns in a shared ``public.layer_styles``
STYLE_DESCRIPTION = "gridflow default style: what needs action stands out"
_STYLE_COLS = ("f_table_catalog, f_table_schema, f_table_name, f_geometry_column, stylename, "
               "styleqml, useasdefault, description")


def _share_styles(conn, schema: str, previous: str, dbname: str) -> bool:
    """Mirror the published sets' styles into ``public.layer_styles`` when that table exists
    and may be written (desktop GIS looks for styles there through the search path); inside
    the publishing transaction, so it changes with the swap. Returns whether it did."""
    ok = conn.execute("SELECT to_regclass('public.layer_styles') IS NOT NULL AND "
                      "has_table_privilege('public.layer_styles', 'INSERT') AND "
                      "has_table_privilege('public.layer_styles', 'DELETE')").fetchone()[0]
    if not ok:
        return False
    conn.execute("DELETE FROM public.layer_styles WHERE f_table_catalog = %s AND "
                 "f_table_schema IN (%s, %s) AND description = %s",
                 (dbname, schema, previous, STYLE_DESCRIPTION))
    for sch in (schema, previous):
        if conn.execute("SELECT to_regclass(%s)", (f"{_q(sch)}.layer_styles",)).fetchone()[0]:
            conn.execute(f"INSERT INTO public.layer_styles ({_STYLE_COLS}) SELECT {_STYLE_COLS} "
                         f"FROM {_q(sch)}.layer_styles")
    return True


def _copy_grants(conn, old: str, new: str) -> None:
    """Who could use the old schema may use the new one and read its tables."""
    rows = conn.execute("""SELECT CASE WHEN a.grantee = 0 THEN 'PUBLIC'
            ELSE quote_ident(pg_get_userbyid(a.grantee)) END
        FROM pg_namespace n, aclexplode(n.nspacl) a
        WHERE n.nspname = %s AND a.privilege_type = 'USAGE' AND a.grantee <> n.nspowner""",
                        (old,)).fetchall()
    for (who,) in rows:
        conn.execute(f"GRANT USAGE ON SCHEMA {_q(new)} TO {who}")
        conn.execute(f"GRANT SELECT ON ALL TABLES IN SCHEMA {_q(new)} TO {who}")


def _swap(conn, schema: str, staging: str, previous: str) -> None:
    """Rename the sets: current -> previous, staging -> current (inside the transaction)."""
    exists = conn.execute("SELECT 1 FROM pg_namespace WHERE nspname = %s",
                          (schema,)).fetchone() is not None
    conn.execute(f"DROP SCHEMA IF EXISTS {_q(previous)} CASCADE")
    if exists:
        conn.execute(f"ALTER SCHEMA {_q(schema)} RENAME TO {_q(previous)}")
        has_styles = conn.execute("SELECT to_regclass(%s)",
                                  (f"{_q(previous)}.layer_styles",)).fetchone()[0]
        if has_styles is not None:
            conn.execute(f"UPDATE {_q(previous)}.layer_styles SET f_table_schema = %s",
                         (previous,))
    conn.execute(f"ALTER SCHEMA {_q(staging)} RENAME TO {_q(schema)}")


@contextlib.contextmanager
def _transaction(conn) -> Iterator[None]:
    try:
        yield
        conn.commit()
    except BaseException:
        with contextlib.suppress(Exception):
            conn.rollback()
        raise


def publish_postgis(spec: DatabaseSpec, layers: Mapping[str, object], *, crs,
                    styles: bool = True) -> str:
    """Publish result layers to ``spec``'s schema in one transaction; returns a description.

    Raises
    ------
    OutputError
        Naming the database and schema: cannot connect, or the user lacks a privilege
        (CREATE on the database, ownership of the schema being replaced).
    """
    import psycopg

    from gridflow.io.deferred import materialize
    from gridflow.io.postgis import connect, scrub

    schema = spec.schema or "gridflow"
    staging, previous = f"{schema}_staging", f"{schema}_previous"
    try:
        conn = connect(spec, key="--out", what="output")
    except Exception as exc:  # the same message, as an output error
        raise OutputError(getattr(exc, "message", str(exc)), file=str(spec),
                          layer=schema) from None
    srid = _srid(crs)
    step = "starting"
    try:
        with _transaction(conn):
            dbname = conn.info.dbname
            step = "waiting for another publisher of the schema"
            conn.execute("SELECT pg_advisory_xact_lock(%s)",
                         (zlib.crc32(f"gridflow:{schema}".encode()) - 2**31,))
            step = f"creating the staging schema {staging}"
            conn.execute(f"DROP SCHEMA IF EXISTS {_q(staging)} CASCADE")
            conn.execute(f"CREATE SCHEMA {_q(staging)}")
            total = 0
            for name, layer in layers.items():
                step = f"writing {staging}.{name}"
                total += copy_frame(conn, staging, name, materialize(layer), srid=srid)
            if styles:
                step = "storing the layer styles"
                _styles(conn, staging, schema, dbname, list(layers))
            step = "granting read access as on the old schema"
            _copy_grants(conn, schema, staging)
            step = f"swapping {staging} in as {schema}"
            _swap(conn, schema, staging, previous)
            if styles:
                step = "sharing the styles in public.layer_styles"
                _share_styles(conn, schema, previous, dbname)
            step = "committing"
        for name in layers:
            with contextlib.suppress(Exception):
                conn.execute(f"ANALYZE {_q(schema)}.{_q(name)}")
                conn.commit()
    except psycopg.Error as exc:
        detail = scrub(str(exc).strip().splitlines()[0] if str(exc).strip() else repr(exc))
        raise OutputError(f"publishing to schema {schema!r} in {spec} failed while {step}: "
                          f"{detail}; the previous results are unchanged", file=str(spec),
                          layer=schema) from None
    finally:
        conn.close()
    where = f"schema {schema!r} of database {dbname!r}"
    log.info("published %d layer(s), %d rows, to %s (last night's set in %s)", len(layers),
             total, where, previous)
    return where
