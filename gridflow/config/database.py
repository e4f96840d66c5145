"""Database connections named in the config or on the command line.

An input in ``[inputs]`` (and ``--out`` / ``--previous``) may name a PostgreSQL/PostGIS database
instead of a file:

- a URI: ``postgresql://gis.example.org:5432/utility?sslmode=require``
- a libpq connection string: ``host=gis.example.org dbname=utility user=gridflow``
- a service from the user's service file: ``service=utility``

Passwords are never written in the config or on the command line: libpq finds them in the
password file (``~/.pgpass`` or ``PGPASSFILE``), the service file or ``PGPASSWORD``. A spec with
a password is refused.

For an output, the extra key ``schema`` names the schema the result layers are published to
(``service=utility schema=gridflow``; in a URI ``...?schema=gridflow``; default ``gridflow``).
It is taken out before the rest goes to libpq.

Parsing here needs no database driver: it decides what is a database and keeps the password
out; :mod:`gridflow.io.postgis` connects.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from urllib.parse import parse_qsl, urlencode, urlsplit, urlunsplit

from gridflow.errors import ConfigError

__all__ = ["DatabaseSpec", "is_database", "parse_database", "DEFAULT_SCHEMA"]

#: the schema results are published to when the output spec names none
DEFAULT_SCHEMA = "gridflow"

#: libpq connection keywords; a ``key=value`` string starting with one of them is a database
_LIBPQ_KEYS = frozenset("""host hostaddr port dbname user password passfile channel_binding
connect_timeout client_encoding options application_name fallback_application_name keepalives
keepalives_idle keepalives_interval keepalives_count tcp_user_timeout replication gssencmode
sslmode requiressl sslcompression sslcert sslkey sslpassword sslcertmode sslrootcert sslcrl
sslcrldir sslsni requirepeer ssl_min_protocol_version ssl_max_protocol_version krbsrvname
gsslib gssdelegation service target_session_attrs load_balance_hosts schema""".split())

_KV = re.compile(r"\s*([A-Za-z_]+)\s*=\s*('(?:[^'\\]|\\.)*'|[^\s']*)")
_SCHEMA_NAME = re.compile(r"[a-z_][a-z0-9_]{0,62}")


@dataclass(frozen=True)
class DatabaseSpec:
    """A database named by the user, without a password.

    ``conninfo`` goes to libpq as it is (the ``schema`` key taken out); ``schema`` is the output
    schema (only meaningful for ``--out`` and ``--previous``); ``display`` is what messages,
    logs and ``run_info`` show.
    """

    conninfo: str
    schema: str | None
    display: str

    def __str__(self) -> str:
        return self.display


def is_database(spec: object) -> bool:
    """True when ``spec`` names a PostgreSQL database rather than a file."""
    if not isinstance(spec, str):
        return False
    s = spec.strip()
    if s.startswith(("postgresql://", "postgres://")):
        return True
    if s[:3].upper() == "PG:":
        return True
    m = _KV.match(s)
    return m is not None and m.group(1).lower() in _LIBPQ_KEYS


def _unquote(v: str) -> str:
    if len(v) >= 2 and v[0] == v[-1] == "'":
        return re.sub(r"\\(.)", r"\1", v[1:-1])
    return v


def parse_database(spec: str, key: str) -> DatabaseSpec:
    """Split a database spec into the libpq part and the output schema; refuse passwords.

    Raises
    ------
    ConfigError
        Naming ``key``: a password in the spec, an unparsable spec, or a schema name that is
        not a plain lower-case identifier.
    """
    s = spec.strip()
    if s[:3].upper() == "PG:":
        s = s[3:].strip()
    schema: str | None = None
    password = False
    if s.startswith(("postgresql://", "postgres://")):
        parts = urlsplit(s)
        if parts.password is not None:
            password = True
        query = []
        for k, v in parse_qsl(parts.query, keep_blank_values=True):
            if k == "schema":
                schema = v
            elif k == "password":
                password = True
            else:
                query.append((k, v))
        netloc = parts.netloc
        if parts.password is not None:  # keep the password out of every message
            netloc = netloc.replace(f":{parts.password}@", "@", 1)
        conninfo = urlunsplit((parts.scheme, netloc, parts.path, urlencode(query), ""))
        pairs = [("host", parts.hostname or ""), ("port", str(parts.port or "")),
                 ("dbname", parts.path.lstrip("/"))] + query
    else:
        pairs = []
        pos = 0
        kept = []
        while pos < len(s):
            m = _KV.match(s, pos)
            if not m:
                if s[pos:].strip():
                    raise ConfigError(f"{key}: cannot read {_mask(s)!r} as a database "
                                      "connection (expected key=value pairs, e.g. "
                                      "'service=utility' or 'host=gis dbname=utility')", key=key)
                break
            k, v = m.group(1).lower(), m.group(2)
            pos = m.end()
            if k not in _LIBPQ_KEYS:
                raise ConfigError(f"{key}: unknown connection keyword {k!r} in a database "
                                  "connection", key=key)
            if k == "password":
                password = True
                continue
            if k == "schema":
                schema = _unquote(v)
                continue
            kept.append(f"{k}={v}")
            pairs.append((k, _unquote(v)))
        conninfo = " ".join(kept)
    if password:
        raise ConfigError(f"{key}: a database password does not belong in the config or on the "
                          "command line; put it in the password file (~/.pgpass or PGPASSFILE), "
                          "the service file, or the PGPASSWORD environment variable", key=key)
    if schema is not None and not _SCHEMA_NAME.fullmatch(schema):
        raise ConfigError(f"{key}: schema {schema!r} must be a lower-case name of letters, "
                          "digits and _ (it becomes a schema and <schema>_previous)", key=key)
    shown = [f"{k}={v}" for k, v in pairs if k in ("service", "host", "port", "dbname", "user")
             and v]
    display = f"database ({' '.join(shown) or 'libpq defaults'})"
    return DatabaseSpec(conninfo=conninfo, schema=schema, display=display)


def _mask(s: str) -> str:
    return re.sub(r"(password\s*=\s*)('(?:[^'\\]|\\.)*'|\S*)", r"\1***", s, flags=re.I)
