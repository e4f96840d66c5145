"""Reading the utility's GIS from a PostgreSQL/PostGIS database.

One snapshot per run
    Every layer of a database input is read on one connection inside one
    ``REPEATABLE READ, READ ONLY`` transaction (:func:`snapshots`): PostgreSQL takes the
    transaction's snapshot at its first query, and every later query of the transaction sees
    the database as of that moment. An editor committing while gridflow reads cannot hand the
    run a half-edited network; the run sees the data from before the commit, the next run sees
    it after. (A second program that must see the same data can adopt the snapshot: the run
    logs ``pg_export_snapshot()``'s id, usable with ``SET TRANSACTION SNAPSHOT`` while the read
    lasts.)

Bulk reads
    Each layer is one query in the binary protocol: the mapped columns and the geometry as WKB
    (``ST_AsBinary``), fetched in one go and parsed by shapely in one call; the ``where`` filter
    runs on the server. No row is fetched one at a time.

Names
    Layers are ``schema.table`` (tables, views, materialised views) or a bare table name found
    through the search path. Table and column names match exactly, else case-insensitively
    (a loader that folded ``MAIN_ID`` to ``main_id`` still matches the same config). Errors name
    the database, the table and the column.

Passwords never pass through here: libpq reads them from the password file, the service file
or ``PGPASSWORD``. Messages are scrubbed of ``PGPASSWORD``'s value all the same.
"""

from __future__ import annotations

import contextlib
import contextvars
import gc
import logging
import os
import re
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from gridflow.config.database import DatabaseSpec, is_database, parse_database
from gridflow.errors import ConfigError, InputError

__all__ = ["DatabaseSource", "Session", "snapshots", "connect", "database_of", "last_snapshots",
           "inspect_layer", "read_frame", "read_previous_flags", "scrub"]

log = logging.getLogger("gridflow")

#: seconds libpq waits for a server that does not answer (unless the spec sets connect_timeout)
CONNECT_TIMEOUT_S = 10

#: the snapshot each database input was last read in (input name -> pg_current_snapshot())
_LAST: dict[str, str] = {}

_sessions: contextvars.ContextVar[dict | None] = contextvars.ContextVar("gridflow_pg_sessions",
                                                                        default=None)


def scrub(text: str) -> str:
    """``text`` with any password taken out (PGPASSWORD's value, ``password=...``)."""
    pw = os.environ.get("PGPASSWORD")
    if pw:
        text = text.replace(pw, "***")
    return re.sub(r"(password\s*=\s*)('(?:[^'\\]|\\.)*'|\S+)", r"\1***", text, flags=re.I)


def _psycopg():
    try:
        import psycopg
    except ImportError:
        raise ConfigError("reading from or writing to a PostgreSQL database needs psycopg; "
                          "install it with pip install 'gridflow[postgis]'") from None
    return psycopg


@dataclass
class DatabaseSource:
    """A database input as the reader knows it; ``str()`` is what messages show."""

    spec: DatabaseSpec
    name: str = ""  # the config's input name
    dbname: str = ""
    where: str = ""  # host and port as connected

    def __str__(self) -> str:
        if self.dbname:
            return f"database {self.dbname!r} on {self.where}"
        return str(self.spec)


def connect(spec: DatabaseSpec, *, key: str, what: str = "input"):
    """Open a psycopg connection (no transaction yet).

    Raises
    ------
    InputError
        Naming the database (never a password): server unreachable, authentication failed,
        database missing.
    """
    psycopg = _psycopg()
    conninfo = spec.conninfo
    kw: dict[str, Any] = {"application_name": "gridflow"}
    if "connect_timeout" not in conninfo:
        kw["connect_timeout"] = CONNECT_TIMEOUT_S
    try:
        return psycopg.connect(conninfo, **kw)
    except psycopg.Error as exc:
        detail = scrub(str(exc).strip().replace("\n", " "))
        hint = ""
        if "password" in detail.lower() or "authentication" in detail.lower():
            hint = ("; check the user's entry in the password file (~/.pgpass), the service "
                    "file or PGPASSWORD")
        elif "connect" in detail.lower() or "timeout" in detail.lower():
            hint = "; is the server running and reachable from this machine?"
        raise InputError(f"cannot connect to the {what} {spec} ({key}): {detail}{hint}",
                         file=str(spec), key=key) from None


@dataclass
class Session:
    """One connection holding one read-only REPEATABLE READ transaction."""

    source: DatabaseSource
    conn: Any
    snapshot_id: str = ""
    tables: dict = field(default_factory=dict)

    def query(self, sql, params=(), *, binary: bool = False):
        with self.conn.cursor(binary=binary) as cur:
            cur.execute(sql, params)
            return cur.fetchall()


def _open_session(spec: DatabaseSpec, name: str) -> Session:
    psycopg = _psycopg()
    conn = connect(spec, key=f"inputs.{name}")
    conn.isolation_level = psycopg.IsolationLevel.REPEATABLE_READ
    conn.read_only = True
    info = conn.info
    host = info.host or "local socket"
    where = f"{host}:{info.port}" if not host.startswith("/") else f"socket {host}:{info.port}"
    src = DatabaseSource(spec, name=name, dbname=info.dbname, where=where)
    s = Session(src, conn)
    # the first query fixes the transaction's snapshot for every later read of the run
    s.snapshot_id, current = s.query("SELECT pg_export_snapshot(), pg_current_snapshot()")[0]
    _LAST[name] = f"{src}, snapshot {current}"
    log.info("reading %s in one read-only snapshot (%s)", src, s.snapshot_id)
    return s


@contextlib.contextmanager
def snapshots(cfg) -> Iterator[dict]:
    """Hold one read-only REPEATABLE READ transaction per database input while layers are
    read; nothing is held when no input is a database."""
    specs = {name: spec for name, spec in cfg.inputs.items() if is_database(spec)}
    _LAST.clear()
    sessions: dict[str, Session] = {}
    token = _sessions.set(sessions)
    try:
        for name, spec in specs.items():
            sessions[spec] = _open_session(parse_database(spec, f"inputs.{name}"), name)
        yield sessions
    finally:
        _sessions.reset(token)
        for s in sessions.values():
            with contextlib.suppress(Exception):
                s.conn.rollback()
            with contextlib.suppress(Exception):
                s.conn.close()


def last_snapshots() -> dict[str, str]:
    """Input name -> the database and snapshot (xmin:xmax:running) its layers were read in."""
    return dict(_LAST)


def _session(cfg, input_name: str) -> Session:
    spec = cfg.inputs[input_name]
    sessions = _sessions.get()
    if sessions is None or spec not in sessions:
        raise RuntimeError("database layers are read inside gridflow.io.postgis.snapshots()")
    return sessions[spec]


def database_of(info) -> DatabaseSource | None:
    """The database source of a layer info, or None for a file."""
    f = getattr(info, "file", None)
    return f if isinstance(f, DatabaseSource) else None


def _quote(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


@dataclass(frozen=True)
class _Table:
    oid: int
    schema: str
    name: str
    columns: dict  # name -> (type name, typmod)
    geometry: str | None
    pk: tuple[str, ...]

    @property
    def qualified(self) -> str:
        return f"{_quote(self.schema)}.{_quote(self.name)}"

    @property
    def label(self) -> str:
        return f"{self.schema}.{self.name}"


def _find_table(s: Session, layer: str, role: str) -> _Table:
    if "." in layer:
        schema, name = layer.split(".", 1)
        rows = s.query("""SELECT c.oid, n.nspname, c.relname FROM pg_class c
            JOIN pg_namespace n ON n.oid = c.relnamespace
            WHERE c.relkind IN ('r', 'v', 'm', 'p', 'f') AND lower(n.nspname) = lower(%s)
              AND lower(c.relname) = lower(%s)""", (schema, name))
        exact = [r for r in rows if r[1] == schema and r[2] == name]
    else:
        rows = s.query("""SELECT c.oid, n.nspname, c.relname FROM pg_class c
            JOIN pg_namespace n ON n.oid = c.relnamespace
            WHERE c.relkind IN ('r', 'v', 'm', 'p', 'f')
              AND n.nspname = ANY (current_schemas(false)) AND lower(c.relname) = lower(%s)
            ORDER BY array_position(current_schemas(false), n.nspname::text)""", (layer,))
        exact = [r for r in rows if r[2] == layer]
    pick = exact[0] if exact else (rows[0] if len({(r[1], r[2]) for r in rows}) == 1 else None)
    if pick is None:
        avail = s.query("""SELECT f_table_schema || '.' || f_table_name FROM geometry_columns
            WHERE f_table_schema NOT IN ('pg_catalog', 'information_schema')
            ORDER BY 1 LIMIT 40""")
        what = ("several tables match it by case; write the name exactly" if rows else
                "not found (or not visible to this user)")
        raise InputError(f"{s.source}: table {layer!r} (layers.{role}.layer) {what}; layers "
                         f"with geometry there: {', '.join(r[0] for r in avail) or 'none'}",
                         file=str(s.source), layer=layer)
    oid, schema, name = pick
    cols = s.query("""SELECT a.attname, t.typname, a.atttypmod FROM pg_attribute a
        JOIN pg_type t ON t.oid = a.atttypid
        WHERE a.attrelid = %s AND a.attnum > 0 AND NOT a.attisdropped ORDER BY a.attnum""",
                   (oid,))
    columns = {c[0]: (c[1], c[2]) for c in cols}
    geoms = [c[0] for c in cols if c[1] == "geometry"]
    geometry = "geom" if "geom" in geoms else (geoms[0] if geoms else None)
    pk = s.query("""SELECT a.attname FROM pg_index i
        JOIN pg_attribute a ON a.attrelid = i.indrelid AND a.attnum = ANY (i.indkey)
        WHERE i.indrelid = %s AND i.indisprimary ORDER BY array_position(i.indkey, a.attnum)""",
                 (oid,))
    return _Table(oid, schema, name, columns, geometry, tuple(r[0] for r in pk))


def _column(t: _Table, fname: str) -> str | None:
    if fname in t.columns:
        return fname
    low = [c for c in t.columns if c.lower() == fname.lower()]
    return low[0] if len(low) == 1 else None


def inspect_layer(cfg, role: str, sec):
    """The :class:`~gridflow.io.layerinfo.LayerInfo` of a database layer (no features read).

    Raises
    ------
    InputError
        Naming database, table and column: a missing table or column, no geometry column,
        no SRID.
    """
    from gridflow.io.layerinfo import LayerInfo

    s = _session(cfg, sec.input)
    t = _find_table(s, sec.layer, role)
    s.tables[(sec.input, sec.layer)] = t
    src = s.source
    wanted = [("id", sec.id)] + list(sec.fields.items())
    for role_name, fname in wanted:
        if _column(t, fname) is None:
            k = "id" if role_name == "id" else f"fields.{role_name}"
            raise InputError(f"{src}: table {t.label!r} has no column {fname!r} "
                             f"(layers.{role}.{k}); its columns are: {', '.join(t.columns)}",
                             file=str(src), layer=t.label, field=fname)
    if t.geometry is None:
        raise InputError(f"{src}: table {t.label!r} has no geometry column; {role} need "
                         "geometry (a PostGIS geometry column)", file=str(src), layer=t.label)
    g = _quote(t.geometry)
    typmod = t.columns[t.geometry][1]
    srid, gtype = s.query("SELECT postgis_typmod_srid(%s), postgis_typmod_type(%s)",
                          (typmod, typmod))[0]
    if not srid:
        row = s.query(f"SELECT ST_SRID({g}) FROM {t.qualified} WHERE {g} IS NOT NULL LIMIT 1")
        srid = row[0][0] if row else 0
    crs = None
    if srid:
        ref = s.query("SELECT auth_name, auth_srid, srtext FROM spatial_ref_sys WHERE srid = %s",
                      (srid,))
        if ref:
            auth, code, wkt = ref[0]
            crs = f"{auth}:{code}" if auth and code else wkt
    if not crs:
        raise InputError(f"{src}: table {t.label!r} column {t.geometry!r} has no coordinate "
                         "reference system (SRID 0 or unknown); set one, e.g. with "
                         "UpdateGeometrySRID or ST_SetSRID in the view", file=str(src),
                         layer=t.label, field=t.geometry)
    bounds = None
    if role == "pipes":
        ext = s.query(f"SELECT ST_XMin(e), ST_YMin(e), ST_XMax(e), ST_YMax(e) FROM "
                      f"(SELECT ST_Extent({g}) AS e FROM {t.qualified}) q")[0]
        if ext[0] is not None:
            bounds = (float(ext[0]), float(ext[1]), float(ext[2]), float(ext[3]))
    return LayerInfo(role, src, sec.layer, crs, tuple(t.columns), str(gtype or "Geometry"),
                     -1, bounds)


_NUMERIC = {"int2", "int4", "int8", "float4", "float8", "numeric", "oid"}


def read_frame(cfg, role: str, info, columns: list[str], where: str | None, sec=None):
    """Read the mapped columns and the geometry of one database layer into a GeoDataFrame.

    One query, binary protocol, geometry as WKB parsed in one shapely call; ``where`` runs on
    the server; rows in primary-key order (else by the first column asked for), so runs are
    repeatable. ``sec`` is the role's layer section read (default: its first).
    """
    sec = sec if sec is not None else getattr(cfg.layers, role)
    s = _session(cfg, sec.input)
    t = s.tables.get((sec.input, sec.layer)) or _find_table(s, sec.layer, role)
    psycopg = _psycopg()
    real = [_column(t, c) or c for c in columns]
    sel = [f"{_quote(r)} AS {_quote(c)}" for r, c in zip(real, columns)]
    geom = t.geometry or ""
    sel.append(f"ST_AsBinary({_quote(geom)}) AS \"__gridflow_wkb\"")
    order = t.pk or (real[0],)
    sql = (f"SELECT {', '.join(sel)} FROM {t.qualified}"
           + (f" WHERE ({where})" if where else "")
           + f" ORDER BY {', '.join(_quote(c) for c in order)}")
    s.conn.execute("SAVEPOINT gridflow_read")
    gc_was_on = gc.isenabled()
    gc.disable()  # millions of fresh tuples would trigger full collections over and over
    try:
        return _fetch_frame(s, sql, columns, real, t, info)
    except psycopg.Error as exc:
        s.conn.execute("ROLLBACK TO SAVEPOINT gridflow_read")
        detail = scrub(str(exc).strip().splitlines()[0])
        base = info.key or f"layers.{role}"
        key = f"{base}.where" if where else base
        raise InputError(f"{info.file}: cannot read table {t.label!r} ({key}): {detail}",
                         file=str(info.file), layer=t.label) from None
    finally:
        if gc_was_on:
            gc.enable()


def _fetch_frame(s: Session, sql: str, columns: list[str], real: list[str], t: _Table, info):
    import geopandas as gpd
    import shapely

    with s.conn.cursor(binary=True) as cur:
        cur.execute(sql)
        rows = cur.fetchall()
    s.conn.execute("RELEASE SAVEPOINT gridflow_read")
    n = len(rows)
    cols = list(zip(*rows)) if n else [()] * (len(columns) + 1)
    data = {}
    for c, r, vals in zip(columns, real, cols[:-1]):
        typ = t.columns.get(r, ("text", -1))[0]
        arr = np.empty(n, dtype=object)
        arr[:] = vals
        ser = pd.Series(arr, dtype=object)
        if typ in _NUMERIC:
            if ser.isna().any() or typ in ("float4", "float8", "numeric"):
                ser = pd.Series(pd.to_numeric(ser, errors="coerce"), dtype=float)
            else:
                ser = ser.astype(np.int64)
        data[c] = ser
    wkb = np.empty(n, dtype=object)
    wkb[:] = cols[-1]
    geoms = shapely.from_wkb(wkb)
    return gpd.GeoDataFrame(pd.DataFrame(data, columns=columns),
                            geometry=gpd.GeoSeries(geoms, crs=info.crs).values, crs=info.crs)


def read_previous_flags(spec_text) -> set:
    """The flags of the results published in a database schema (read only), for the
    ``changes`` layer.

    Raises
    ------
    InputError
        Naming the database and schema when they cannot be read.
    """
    from gridflow.analysis.changes import FLAG_FIELDS, flag_set

    spec = parse_database(str(spec_text), "--previous")
    schema = spec.schema or "gridflow"
    conn = connect(spec, key="--previous", what="previous results in")
    try:
        conn.read_only = True
        tables = [r[0] for r in conn.execute(
            "SELECT c.relname FROM pg_class c JOIN pg_namespace n ON n.oid = c.relnamespace "
            "WHERE n.nspname = %s AND c.relkind IN ('r', 'v', 'm')", (schema,)).fetchall()]
        if not tables:
            raise InputError(f"previous results: schema {schema!r} in {spec} has no tables (or "
                             "does not exist); give the schema of last night's results "
                             "(--previous '... schema=NAME')", file=str(spec), layer=schema)
        layers = {}
        for name in tables:
            spec_f = next((v for p, v in FLAG_FIELDS.items() if name.startswith(p)), None)
            if spec_f is None:
                continue
            id_field, flags = spec_f
            have = {r[0] for r in conn.execute(
                "SELECT column_name FROM information_schema.columns WHERE table_schema = %s "
                "AND table_name = %s", (schema, name)).fetchall()}
            if id_field not in have:
                raise InputError(f"previous results: table {schema}.{name} in {spec} has no "
                                 f"column {id_field}", file=str(spec), layer=f"{schema}.{name}",
                                 field=id_field)
            extra = ["supplied"] if name.startswith("nodes_") else []
            extra += ["meets_required"] if name == "hydrants_fireflow" else []
            cols = [c for c in (id_field, *flags, *extra) if c in have]
            rows = conn.execute(f"SELECT {', '.join(_quote(c) for c in cols)} FROM "
                                f"{_quote(schema)}.{_quote(name)}").fetchall()
            layers[name] = pd.DataFrame(rows, columns=cols)
        return flag_set(layers)
    finally:
        with contextlib.suppress(Exception):
            conn.rollback()
        conn.close()
