"""The owner's asset register in PostgreSQL/PostGIS: the connection and the asset table.

The site file names the database by a libpq connection string, a URI or a
service (``service=owner_gis``); libpq fills what it leaves out from the
``PG*`` environment variables, the service file and ``~/.pgpass``.  A password
in the site file is refused: site files travel with reports.  Everything goes
through psycopg 3 with parameters for values and quoted identifiers for names;
geometries cross as WKB.  The SRID of the geometry column gives the CRS, which
then goes through the same checks as every other frame change.
"""

from __future__ import annotations

import hashlib
from typing import TYPE_CHECKING, Any

import numpy as np
import pyproj
import shapely

from overlay.errors import OutputConflictError, SiteFileError

if TYPE_CHECKING:
    import psycopg

    from overlay.assets.elements import AssetTable
    from overlay.settings import Elements

CONNECT_TIMEOUT_S = 10


def _psycopg() -> Any:
    try:
        import psycopg
    except ImportError as exc:  # an optional dependency: only owners with a database need it
        raise SiteFileError("a PostgreSQL asset register needs psycopg 3: pip install 'overlay[postgis]'",
                            field="elements.database") from exc
    return psycopg


def check_conninfo(conninfo: str) -> str | None:
    """What is wrong with a connection string for a site file (None: nothing)."""
    psycopg = _psycopg()
    try:
        parts = psycopg.conninfo.conninfo_to_dict(conninfo)
    except psycopg.ProgrammingError as exc:
        return f"not a PostgreSQL connection string or URI ({str(exc).strip()})"
    if parts.get("password"):
        return ("holds a password: keep it out of the site file (use ~/.pgpass, a service file or the "
                "PGPASSWORD environment variable)")
    return None


def describe_database(conninfo: str) -> str:
    """The database as a person reads it: service or name and host, never a secret."""
    psycopg = _psycopg()
    try:
        parts = psycopg.conninfo.conninfo_to_dict(conninfo)
    except psycopg.ProgrammingError:
        return "PostgreSQL database"
    if parts.get("service"):
        return f"PostgreSQL service {parts['service']!r}"
    host = parts.get("host") or "the default host"
    port = f":{parts['port']}" if parts.get("port") else ""
    return f"PostgreSQL database {parts.get('dbname') or '(default)'!r} on {host}{port}"


def connect(elements: "Elements", application: str = "overlay") -> "psycopg.Connection":
    """A connection in a transaction of its own (not autocommit); errors name the database, not a secret."""
    psycopg = _psycopg()
    assert elements.database is not None
    try:
        return psycopg.connect(elements.database, application_name=application, connect_timeout=CONNECT_TIMEOUT_S)
    except psycopg.Error as exc:
        raise SiteFileError(f"cannot connect to {describe_database(elements.database)} ({str(exc).strip()})",
                            field="elements.database") from exc


def table_name(schema: str, table: str) -> Any:
    """``schema.table`` as a quoted SQL identifier."""
    from psycopg import sql

    return sql.Identifier(schema, table)


def lock_key(schema: str, table: str) -> int:
    """A 64-bit advisory-lock key for a table, the same in every process and on every machine."""
    digest = hashlib.sha256(f"overlay findings {schema}.{table}".encode()).digest()
    return int.from_bytes(digest[:8], "big", signed=True)


def geometry_column(con: "psycopg.Connection", schema: str, table: str, source: str,
                    field: str = "elements.layer") -> tuple[str, str, int] | None:
    """(column, geometry type, SRID) of a table's one geometry column; None when the table does not exist."""
    found = con.execute("SELECT f_geometry_column, type, srid FROM geometry_columns "
                        "WHERE f_table_schema = %s AND f_table_name = %s", (schema, table)).fetchall()
    if not found:
        exists = con.execute("SELECT 1 FROM information_schema.tables WHERE table_schema = %s AND table_name = %s",
                             (schema, table)).fetchone()
        if exists:
            raise SiteFileError(f"table {schema}.{table} has no geometry column", source=source, field=field)
        return None
    if len(found) > 1:
        raise SiteFileError(f"table {schema}.{table} has {len(found)} geometry columns "
                            f"({', '.join(r[0] for r in found)}); one is needed", source=source, field=field)
    column, kind, srid = found[0]
    return str(column), str(kind).upper(), int(srid)


def columns(con: "psycopg.Connection", schema: str, table: str) -> dict[str, str]:
    """Column name → PostgreSQL data type, in table order."""
    rows = con.execute("SELECT column_name, data_type FROM information_schema.columns WHERE table_schema = %s "
                       "AND table_name = %s ORDER BY ordinal_position", (schema, table)).fetchall()
    return {str(n): str(t) for n, t in rows}


def srid_crs(con: "psycopg.Connection", srid: int) -> pyproj.CRS | None:
    """The CRS of an SRID as the database defines it (authority code where there is one, else its WKT)."""
    if srid <= 0:
        return None
    row = con.execute("SELECT auth_name, auth_srid, srtext FROM spatial_ref_sys WHERE srid = %s", (srid,)).fetchone()
    if row is None:
        return None
    auth, code, wkt = row
    if auth and code:
        return pyproj.CRS.from_authority(auth, code)
    return pyproj.CRS.from_wkt(wkt)


def asset_table_pg(con: "psycopg.Connection", elements: "Elements") -> "AssetTable":
    """The asset table read on an open connection, ordered by id (so two reads compare exactly)."""
    from psycopg import sql

    from overlay.assets.elements import AssetTable

    src, schema, table = elements.where, elements.schema, elements.layer
    assert table is not None
    geom = geometry_column(con, schema, table, src)
    if geom is None:
        there = [r[0] for r in con.execute("SELECT f_table_name FROM geometry_columns WHERE f_table_schema = %s "
                                           "ORDER BY 1", (schema,))]
        raise SiteFileError(f"no table {schema}.{table} with geometries; schema {schema} has "
                            f"{', '.join(there) or 'none'}", source=src, field="elements.layer")
    have = columns(con, schema, table)
    if elements.id_field not in have:
        raise SiteFileError(f"no field {elements.id_field!r}; the table has {', '.join(have)}", source=src,
                            field="elements.id_field")
    rows = con.execute(sql.SQL("SELECT {id}::text, ST_AsBinary({g}) FROM {t} ORDER BY 1").format(
        id=sql.Identifier(elements.id_field), g=sql.Identifier(geom[0]), t=table_name(schema, table))).fetchall()
    outlines = shapely.from_wkb([bytes(r[1]) if r[1] is not None else None for r in rows])
    return AssetTable(table, tuple(str(r[0]) for r in rows), np.asarray(outlines, dtype=object),
                      srid_crs(con, geom[2]))


def read_assets(elements: "Elements") -> "AssetTable":
    """The asset table, read in a read-only transaction of its own."""
    psycopg = _psycopg()
    with connect(elements) as con:
        try:
            con.execute("SET TRANSACTION READ ONLY")
            return asset_table_pg(con, elements)
        except psycopg.errors.LockNotAvailable as exc:
            raise OutputConflictError(f"the asset table is locked ({str(exc).strip()})", source=elements.where) from exc
        except psycopg.Error as exc:
            raise SiteFileError(f"cannot read the asset table ({str(exc).strip()})", source=elements.where,
                                field="elements") from exc


def check_register(elements: "Elements") -> None:
    """Before a long run: the database answers and holds the asset table with its id field."""
    psycopg = _psycopg()
    with connect(elements) as con:
        try:
            if geometry_column(con, elements.schema, elements.layer or "", elements.where) is None:
                raise SiteFileError(f"no table {elements.schema}.{elements.layer} with geometries",
                                    source=elements.where, field="elements.layer")
            if elements.id_field not in columns(con, elements.schema, elements.layer or ""):
                raise SiteFileError(f"no field {elements.id_field!r} in {elements.schema}.{elements.layer}",
                                    source=elements.where, field="elements.id_field")
        except psycopg.Error as exc:
            raise SiteFileError(f"cannot read the asset table ({str(exc).strip()})", source=elements.where,
                                field="elements") from exc
