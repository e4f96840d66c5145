"""A throwaway PostgreSQL/PostGIS server for the database tests (Debian's packages).

``initdb`` into a temporary folder, ``pg_ctl`` on 127.0.0.1 and a free port (and a socket in
that folder), password authentication over TCP, the password in a private password file that
libpq finds through ``PGPASSFILE``. Running as root, the server runs as the ``postgres`` user
(PostgreSQL refuses root). The sample GIS is loaded into schema ``gis`` of database
``millbrook`` with the GeoPackage's feature ids as primary keys.
"""

from __future__ import annotations

import glob
import os
import shutil
import socket
import subprocess
import tempfile
from dataclasses import dataclass
from pathlib import Path

SUPERUSER = "gridflow_test"
PASSWORD = "s3cret-millbrook-7"  # only in the password file, never in a config
DBNAME = "millbrook"


@dataclass
class Server:
    folder: Path
    port: int
    passfile: Path
    bin: Path
    run_as: str | None
    old_passfile: str | None = None

    @property
    def conninfo(self) -> str:
        return f"host=127.0.0.1 port={self.port} dbname={DBNAME} user={SUPERUSER}"

    def connect(self, **kw):
        import psycopg

        return psycopg.connect(self.conninfo, **kw)


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _bin() -> Path:
    found = sorted(glob.glob("/usr/lib/postgresql/*/bin/initdb"),
                   key=lambda p: int(Path(p).parts[-3]) if Path(p).parts[-3].isdigit() else 0)
    if not found:
        raise RuntimeError("PostgreSQL server binaries not found under /usr/lib/postgresql: "
                           "scripts/test.sh installs Debian's postgresql and postgis packages "
                           "(as root)")
    b = Path(found[-1]).parent
    ext = glob.glob(str(b.parents[2] / "share" / "postgresql" / b.parent.name / "extension"
                        / "postgis.control"))
    if not ext and not glob.glob("/usr/share/postgresql/*/extension/postgis.control"):
        raise RuntimeError("PostGIS is not installed: scripts/test.sh installs Debian's "
                           "postgresql-postgis package (as root)")
    return b


def _run(cmd: list[str], run_as: str | None, **kw) -> subprocess.CompletedProcess:
    if run_as:
        cmd = ["runuser", "-u", run_as, "--", *cmd]
    return subprocess.run(cmd, check=True, capture_output=True, text=True, **kw)


def start() -> Server:
    b = _bin()
    run_as = "postgres" if os.geteuid() == 0 else None
    folder = Path(tempfile.mkdtemp(prefix="gridflow-pg-"))
    data = folder / "data"
    pwfile = folder / "initpw"
    pwfile.write_text(PASSWORD + "\n")
    if run_as:
        shutil.chown(folder, user=run_as)
        shutil.chown(pwfile, user=run_as)
    _run([str(b / "initdb"), "-D", str(data), "-U", SUPERUSER, f"--pwfile={pwfile}",
          "--auth-host=scram-sha-256", "--auth-local=scram-sha-256", "-E", "UTF8",
          "--locale=C"], run_as)
    pwfile.unlink()
    port = free_port()
    opts = f"-p {port} -k {folder} -c listen_addresses=127.0.0.1 -c fsync=off"
    _run([str(b / "pg_ctl"), "-D", str(data), "-o", opts, "-l", str(folder / "server.log"),
          "-w", "-t", "60", "start"], run_as)
    passfile = folder / "pgpass"  # read by this process's libpq: owned by us, mode 0600
    passfile.write_text(f"127.0.0.1:{port}:*:{SUPERUSER}:{PASSWORD}\n")
    passfile.chmod(0o600)
    srv = Server(folder, port, passfile, b, run_as, os.environ.get("PGPASSFILE"))
    os.environ["PGPASSFILE"] = str(passfile)
    import psycopg

    with psycopg.connect(f"host=127.0.0.1 port={port} dbname=postgres user={SUPERUSER}",
                         autocommit=True) as c:
        c.execute(f"CREATE DATABASE {DBNAME}")
    with srv.connect(autocommit=True) as c:
        c.execute("CREATE EXTENSION postgis")
    return srv


def stop(srv: Server) -> None:
    try:
        _run([str(srv.bin / "pg_ctl"), "-D", str(srv.folder / "data"), "-m", "immediate",
              "-w", "stop"], srv.run_as)
    finally:
        shutil.rmtree(srv.folder, ignore_errors=True)
        if srv.old_passfile is None:
            os.environ.pop("PGPASSFILE", None)
        else:
            os.environ["PGPASSFILE"] = srv.old_passfile


def load_gpkg(srv: Server, gpkg: Path, schema: str = "gis") -> list[str]:
    """Copy every layer of a GeoPackage into ``schema`` (feature ids kept as ``fid``)."""
    import pyogrio
    from pyproj import CRS

    from gridflow.io.publish import copy_frame

    names = [str(n) for n in pyogrio.list_layers(gpkg)[:, 0]]
    with srv.connect() as conn:
        conn.execute(f'CREATE SCHEMA "{schema}"')
        for name in names:
            gdf = pyogrio.read_dataframe(gpkg, layer=name, fid_as_index=True, use_arrow=True)
            gdf.index.name = "fid"
            gdf = gdf.reset_index()
            crs = getattr(gdf, "crs", None)  # attribute tables have none
            srid = CRS.from_user_input(crs).to_epsg() if crs is not None else 0
            copy_frame(conn, schema, name, gdf, srid=int(srid or 0), pk="fid")
        conn.commit()
    return names
