"""A GeoPackage read and written through Python's own SQLite, on one connection.

The owner's asset register is merged inside its own SQLite transaction, and a
transaction is only as good as its lock.  SQLite's locks are POSIX locks: they
are dropped as soon as the same process closes *any* descriptor of the file —
which GDAL (with its own SQLite) does every time it opens and closes it.  So
while the merge holds the owner's file, nothing but this connection touches
it: this module reads features, writes geometry blobs and creates a feature
table with its R-tree index by plain SQL, following the OGC GeoPackage
encoding standard (12-128r18, §2.1.3 geometry blobs, Annex F.3 R-tree).
"""

from __future__ import annotations

import datetime as dt
import sqlite3
import struct
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable, Sequence

import pyproj
import shapely

APPLICATION_ID = 0x47504B47  # 'GPKG' (GeoPackage standard, Req 2)
RTREE_DEFINITION = "http://www.geopackage.org/spec120/#extension_rtree"
_ENVELOPE_DOUBLES = {0: 0, 1: 4, 2: 6, 3: 6, 4: 8}


def quote(name: str) -> str:
    """An SQL identifier, double-quoted (never a value spliced into SQL)."""
    return '"' + name.replace('"', '""') + '"'


def timestamp(when: dt.datetime | None = None) -> str:
    """GeoPackage DATETIME text, UTC with milliseconds: YYYY-MM-DDTHH:MM:SS.SSSZ (Req 15)."""
    when = (when or dt.datetime.now(dt.timezone.utc)).astimezone(dt.timezone.utc)
    return when.strftime("%Y-%m-%dT%H:%M:%S.") + f"{when.microsecond // 1000:03d}Z"


# --- geometry blobs -------------------------------------------------------------------------------

def geometry_blob(geom: Any, srs_id: int) -> bytes:
    """A GeoPackage geometry blob: 'GP', version 0, flags (little-endian, xy envelope), srs_id, envelope, WKB."""
    if geom is None or geom.is_empty:
        return b"GP\x00" + bytes([0b00010001]) + struct.pack("<i", srs_id) + shapely.to_wkb(geom, byte_order=1)
    x0, y0, x1, y1 = geom.bounds
    header = b"GP\x00" + bytes([0b00000011]) + struct.pack("<i4d", srs_id, x0, x1, y0, y1)
    return header + shapely.to_wkb(geom, output_dimension=2, byte_order=1)


def _split_blob(blob: bytes) -> tuple[int, bool, tuple[float, ...], bytes]:
    """(srs_id, empty flag, envelope, WKB) of a geometry blob; ValueError when it is not one."""
    if len(blob) < 8 or blob[:2] != b"GP":
        raise ValueError("not a GeoPackage geometry blob (no 'GP' magic)")
    flags = blob[3]
    order = "<" if flags & 1 else ">"
    code = (flags >> 1) & 0b111
    if code not in _ENVELOPE_DOUBLES:
        raise ValueError(f"invalid envelope code {code} in a geometry blob")
    n = _ENVELOPE_DOUBLES[code]
    srs_id = struct.unpack(order + "i", blob[4:8])[0]
    envelope = struct.unpack(order + f"{n}d", blob[8 : 8 + 8 * n]) if n else ()
    return srs_id, bool(flags & 0b10000), envelope, bytes(blob[8 + 8 * n :])


def parse_blob(blob: bytes | None) -> Any:
    """The shapely geometry of a GeoPackage geometry blob (None for NULL)."""
    if blob is None:
        return None
    return shapely.from_wkb(_split_blob(blob)[3])


def _bounds(blob: bytes | None) -> tuple[float, float, float, float] | None:
    if blob is None:
        return None
    _, empty, env, wkb = _split_blob(blob)
    if empty:
        return None
    if env:
        return env[0], env[2], env[1], env[3]
    g = shapely.from_wkb(wkb)
    return None if g.is_empty else g.bounds


def _is_empty(blob: bytes | None) -> int | None:
    if blob is None:
        return None
    _, empty, _, wkb = _split_blob(blob)
    return int(empty or shapely.from_wkb(wkb).is_empty)


def _register_functions(con: sqlite3.Connection) -> None:
    """The SQL functions the standard's triggers call (Annex F.3 R-tree; F.7/F.8 type and SRS triggers)."""

    def bound(k: int):
        return lambda blob: None if (b := _bounds(blob)) is None else b[k]

    for name, k in (("ST_MinX", 0), ("ST_MinY", 1), ("ST_MaxX", 2), ("ST_MaxY", 3)):
        con.create_function(name, 1, bound(k), deterministic=True)
    con.create_function("ST_IsEmpty", 1, _is_empty, deterministic=True)
    con.create_function("ST_SRID", 1, lambda b: None if b is None else _split_blob(b)[0], deterministic=True)
    con.create_function("ST_GeometryType", 1, lambda b: None if b is None else parse_blob(b).geom_type.upper(),
                        deterministic=True)
    con.create_function("GPKG_IsAssignable", 2, _is_assignable, deterministic=True)


_GENERAL = {"GEOMETRY": None, "GEOMCOLLECTION": {"MULTIPOINT", "MULTILINESTRING", "MULTIPOLYGON", "GEOMETRYCOLLECTION"},
            "CURVE": {"LINESTRING"}, "SURFACE": {"POLYGON"}, "MULTICURVE": {"MULTILINESTRING"},
            "MULTISURFACE": {"MULTIPOLYGON"}}


def _is_assignable(expected: str | None, actual: str | None) -> int:
    if expected is None or actual is None:
        return 0
    e, a = expected.upper(), actual.upper()
    allowed = _GENERAL.get(e, set())
    return int(e == a or allowed is None or a in allowed or (e == "GEOMETRYCOLLECTION" and a == "GEOMCOLLECTION"))


# --- connection -----------------------------------------------------------------------------------

def connect(path: Path, wait_s: float) -> sqlite3.Connection:
    """An autocommit connection with the standard's trigger functions; waits up to ``wait_s`` for a lock."""
    con = sqlite3.connect(path, timeout=wait_s, isolation_level=None)
    _register_functions(con)
    return con


def version(con: sqlite3.Connection) -> int:
    """``PRAGMA user_version``: 10200, 10300, 10400 … (0 for files of GeoPackage 1.0/1.1)."""
    return int(con.execute("PRAGMA user_version").fetchone()[0])


def is_geopackage(con: sqlite3.Connection) -> bool:
    app = int(con.execute("PRAGMA application_id").fetchone()[0])
    return app in (APPLICATION_ID, 0x47503130, 0x47503131)  # 'GPKG', and 1.0 'GP10' / 1.1 'GP11'


def table_names(con: sqlite3.Connection) -> set[str]:
    return {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type IN ('table', 'view')")}


def columns(con: sqlite3.Connection, table: str) -> dict[str, str]:
    """Column name → declared type, in table order."""
    return {r[1]: (r[2] or "").upper() for r in con.execute(f"PRAGMA table_info({quote(table)})")}


@dataclass(frozen=True)
class Layer:
    """A feature table as gpkg_contents and gpkg_geometry_columns describe it."""

    table: str
    geometry_column: str
    geometry_type: str
    srs_id: int
    crs: pyproj.CRS | None
    fid: str


def layers(con: sqlite3.Connection) -> dict[str, Layer]:
    """Every feature table of the file by name (case as written in gpkg_contents)."""
    rows = con.execute(
        "SELECT c.table_name, g.column_name, g.geometry_type_name, g.srs_id FROM gpkg_contents c "
        "JOIN gpkg_geometry_columns g ON g.table_name = c.table_name WHERE c.data_type = 'features'").fetchall()
    out = {}
    for table, geom, gtype, srs_id in rows:
        out[table] = Layer(table, geom, str(gtype).upper(), int(srs_id), srs_crs(con, int(srs_id)), _fid(con, table))
    return out


def _fid(con: sqlite3.Connection, table: str) -> str:
    for r in con.execute(f"PRAGMA table_info({quote(table)})"):
        if r[5] == 1 and (r[2] or "").upper() == "INTEGER":
            return str(r[1])
    return "rowid"


def srs_crs(con: sqlite3.Connection, srs_id: int) -> pyproj.CRS | None:
    """The CRS of a gpkg_spatial_ref_sys row (None for the undefined systems -1 and 0)."""
    row = con.execute("SELECT organization, organization_coordsys_id, definition FROM gpkg_spatial_ref_sys "
                      "WHERE srs_id = ?", (srs_id,)).fetchone()
    if row is None or srs_id in (-1, 0):
        return None
    org, code, definition = row
    if str(org).upper() == "EPSG" and code and int(code) > 0:
        return pyproj.CRS.from_epsg(int(code))
    return pyproj.CRS.from_user_input(definition)


def read_features(con: sqlite3.Connection, layer: Layer, fields: Sequence[str]) -> tuple[list[tuple], list[Any]]:
    """(rows of ``fields``, shapely geometries) of a feature table, in fid order."""
    cols = ", ".join(quote(f) for f in fields)
    sql = f"SELECT {cols + ', ' if cols else ''}{quote(layer.geometry_column)} FROM {quote(layer.table)} " \
          f"ORDER BY {quote(layer.fid)}"
    rows, geoms = [], []
    for r in con.execute(sql):
        rows.append(tuple(r[:-1]))
        geoms.append(parse_blob(r[-1]))
    return rows, geoms


# --- writing --------------------------------------------------------------------------------------

def _rtree_triggers(table: str, geom: str, fid: str, gpkg_version: int) -> list[str]:
    """The R-tree triggers of Annex F.3: the 1.4 set (update5–7) for 1.4 files, the older set before."""
    t, g, i, r = quote(table), quote(geom), quote(fid), quote(f"rtree_{table}_{geom}")
    values = f"VALUES (NEW.{i}, ST_MinX(NEW.{g}), ST_MaxX(NEW.{g}), ST_MinY(NEW.{g}), ST_MaxY(NEW.{g}))"
    name = lambda suffix: quote(f"rtree_{table}_{geom}_{suffix}")  # noqa: E731
    new_ok = f"(NEW.{g} NOTNULL AND NOT ST_IsEmpty(NEW.{g}))"
    new_empty = f"(NEW.{g} ISNULL OR ST_IsEmpty(NEW.{g}))"
    common = [
        f"CREATE TRIGGER {name('insert')} AFTER INSERT ON {t} WHEN {new_ok} "
        f"BEGIN INSERT OR REPLACE INTO {r} {values}; END",
        f"CREATE TRIGGER {name('update2')} AFTER UPDATE OF {g} ON {t} WHEN OLD.{i} = NEW.{i} AND {new_empty} "
        f"BEGIN DELETE FROM {r} WHERE id = OLD.{i}; END",
        f"CREATE TRIGGER {name('update4')} AFTER UPDATE ON {t} WHEN OLD.{i} != NEW.{i} AND {new_empty} "
        f"BEGIN DELETE FROM {r} WHERE id IN (OLD.{i}, NEW.{i}); END",
        f"CREATE TRIGGER {name('delete')} AFTER DELETE ON {t} WHEN OLD.{g} NOT NULL "
        f"BEGIN DELETE FROM {r} WHERE id = OLD.{i}; END",
    ]
    moved = (f"AFTER UPDATE ON {t} WHEN OLD.{i} != NEW.{i} AND {new_ok} "
             f"BEGIN DELETE FROM {r} WHERE id = OLD.{i}; INSERT OR REPLACE INTO {r} {values}; END")
    if gpkg_version >= 10400:
        old_ok = f"(OLD.{g} NOTNULL AND NOT ST_IsEmpty(OLD.{g}))"
        old_empty = f"(OLD.{g} ISNULL OR ST_IsEmpty(OLD.{g}))"
        return common + [
            f"CREATE TRIGGER {name('update5')} {moved}",
            f"CREATE TRIGGER {name('update6')} AFTER UPDATE OF {g} ON {t} WHEN OLD.{i} = NEW.{i} AND {new_ok} "
            f"AND {old_ok} BEGIN UPDATE {r} SET minx = ST_MinX(NEW.{g}), maxx = ST_MaxX(NEW.{g}), "
            f"miny = ST_MinY(NEW.{g}), maxy = ST_MaxY(NEW.{g}) WHERE id = NEW.{i}; END",
            f"CREATE TRIGGER {name('update7')} AFTER UPDATE OF {g} ON {t} WHEN OLD.{i} = NEW.{i} AND {new_ok} "
            f"AND {old_empty} BEGIN INSERT INTO {r} {values}; END",
        ]
    return common + [
        f"CREATE TRIGGER {name('update1')} AFTER UPDATE OF {g} ON {t} WHEN OLD.{i} = NEW.{i} AND {new_ok} "
        f"BEGIN INSERT OR REPLACE INTO {r} {values}; END",
        f"CREATE TRIGGER {name('update3')} {moved}",
    ]


def create_feature_table(con: sqlite3.Connection, table: str, fields: dict[str, str], geometry_type: str,
                         srs_id: int, description: str = "") -> Layer:
    """A new feature table with typed fields, registered in gpkg_contents and gpkg_geometry_columns, and
    its R-tree spatial index with the triggers of the file's own GeoPackage version."""
    geom, fid = "geom", "fid"
    body = ", ".join([f"{quote(fid)} INTEGER PRIMARY KEY AUTOINCREMENT NOT NULL", f"{quote(geom)} {geometry_type}"]
                     + [f"{quote(n)} {t}" for n, t in fields.items()])
    con.execute(f"CREATE TABLE {quote(table)} ({body})")
    con.execute("INSERT INTO gpkg_contents (table_name, data_type, identifier, description, last_change, srs_id) "
                "VALUES (?, 'features', ?, ?, ?, ?)", (table, table, description, timestamp(), srs_id))
    con.execute("INSERT INTO gpkg_geometry_columns (table_name, column_name, geometry_type_name, srs_id, z, m) "
                "VALUES (?, ?, ?, ?, 0, 0)", (table, geom, geometry_type, srs_id))
    con.execute(f"CREATE VIRTUAL TABLE {quote(f'rtree_{table}_{geom}')} USING rtree(id, minx, maxx, miny, maxy)")
    for sql in _rtree_triggers(table, geom, fid, version(con)):
        con.execute(sql)
    con.execute("CREATE TABLE IF NOT EXISTS gpkg_extensions (table_name TEXT, column_name TEXT, "
                "extension_name TEXT NOT NULL, definition TEXT NOT NULL, scope TEXT NOT NULL, "
                "CONSTRAINT ge_tce UNIQUE (table_name, column_name, extension_name))")
    con.execute("INSERT INTO gpkg_extensions VALUES (?, ?, 'gpkg_rtree_index', ?, 'write-only')",
                (table, geom, RTREE_DEFINITION))
    return Layer(table, geom, geometry_type, srs_id, srs_crs(con, srs_id), fid)


def add_columns(con: sqlite3.Connection, table: str, fields: dict[str, str]) -> list[str]:
    """Add the fields a table lacks (ALTER TABLE ADD COLUMN keeps every row and column as it is)."""
    have = {c.lower() for c in columns(con, table)}
    added = [n for n in fields if n.lower() not in have]
    for n in added:
        con.execute(f"ALTER TABLE {quote(table)} ADD COLUMN {quote(n)} {fields[n]}")
    return added


def insert_features(con: sqlite3.Connection, layer: Layer, rows: Iterable[dict[str, Any]], geoms: Iterable[Any]) -> int:
    """Insert rows (field → value) with their geometries; the file's own triggers keep its index."""
    n = 0
    for row, g in zip(rows, geoms):
        names = [layer.geometry_column, *row]
        sql = (f"INSERT INTO {quote(layer.table)} ({', '.join(quote(c) for c in names)}) "
               f"VALUES ({', '.join('?' for _ in names)})")
        con.execute(sql, [geometry_blob(g, layer.srs_id), *row.values()])
        n += 1
    return n


def touch_contents(con: sqlite3.Connection, layer: Layer) -> None:
    """gpkg_contents' extent and last_change after a change of the table's rows (Req 13, 15)."""
    ext = con.execute(f"SELECT min(ST_MinX(g)), min(ST_MinY(g)), max(ST_MaxX(g)), max(ST_MaxY(g)) FROM "
                      f"(SELECT {quote(layer.geometry_column)} AS g FROM {quote(layer.table)})").fetchone()
    con.execute("UPDATE gpkg_contents SET last_change = ?, min_x = ?, min_y = ?, max_x = ?, max_y = ? "
                "WHERE table_name = ?", (timestamp(), *ext, layer.table))


# --- schema extension (field titles and descriptions) and layer styles ------------------------------

SCHEMA_DEFINITION = "http://www.geopackage.org/spec/#extension_schema"


def describe_columns(con: sqlite3.Connection, docs: dict[str, dict[str, tuple[str, str]]],
                     enums: dict[tuple[str, str], Sequence[str]] | None = None,
                     ranges: dict[tuple[str, str], tuple[float, float]] | None = None) -> None:
    """Field titles and descriptions through the schema extension (GeoPackage standard, Annex F.9):
    both of its tables with their gpkg_extensions rows (Req 141), and value constraints (enum, range)."""
    con.execute("CREATE TABLE IF NOT EXISTS gpkg_data_columns (table_name TEXT NOT NULL, column_name TEXT NOT NULL, "
                "name TEXT, title TEXT, description TEXT, mime_type TEXT, constraint_name TEXT, "
                "CONSTRAINT pk_gdc PRIMARY KEY (table_name, column_name), CONSTRAINT gdc_tn UNIQUE (table_name, name))")
    con.execute("CREATE TABLE IF NOT EXISTS gpkg_data_column_constraints (constraint_name TEXT NOT NULL, "
                "constraint_type TEXT NOT NULL, value TEXT, min NUMERIC, min_is_inclusive BOOLEAN, max NUMERIC, "
                "max_is_inclusive BOOLEAN, description TEXT, "
                "CONSTRAINT gdcc_ntv UNIQUE (constraint_name, constraint_type, value))")
    con.execute("CREATE TABLE IF NOT EXISTS gpkg_extensions (table_name TEXT, column_name TEXT, "
                "extension_name TEXT NOT NULL, definition TEXT NOT NULL, scope TEXT NOT NULL, "
                "CONSTRAINT ge_tce UNIQUE (table_name, column_name, extension_name))")
    for table in ("gpkg_data_columns", "gpkg_data_column_constraints"):
        con.execute("INSERT OR IGNORE INTO gpkg_extensions VALUES (?, NULL, 'gpkg_schema', ?, 'read-write')",
                    (table, SCHEMA_DEFINITION))
    names: dict[tuple[str, str], str] = {}
    for (table, col), values in (enums or {}).items():
        names[table, col] = name = f"{table}_{col}_values"
        con.execute("DELETE FROM gpkg_data_column_constraints WHERE constraint_name = ?", (name,))
        for v in values:
            con.execute("INSERT INTO gpkg_data_column_constraints (constraint_name, constraint_type, value) "
                        "VALUES (?, 'enum', ?)", (name, v))
    for (table, col), (lo, hi) in (ranges or {}).items():
        names[table, col] = name = f"{table}_{col}_range"
        con.execute("DELETE FROM gpkg_data_column_constraints WHERE constraint_name = ?", (name,))
        con.execute("INSERT INTO gpkg_data_column_constraints (constraint_name, constraint_type, min, "
                    "min_is_inclusive, max, max_is_inclusive) VALUES (?, 'range', ?, 1, ?, 1)", (name, lo, hi))
    for table, cols in docs.items():
        present = columns(con, table)
        for col, (title, text) in cols.items():
            if col in present:
                con.execute("INSERT OR REPLACE INTO gpkg_data_columns (table_name, column_name, name, title, "
                            "description, constraint_name) VALUES (?, ?, ?, ?, ?, ?)",
                            (table, col, col, title, text, names.get((table, col))))


STYLE_TABLE = "layer_styles"


def put_style(con: sqlite3.Connection, layer: Layer, name: str, qml: str, sld: str, description: str) -> bool:
    """Store a layer's style in ``layer_styles`` (the table QGIS reads default styles from; created as
    QGIS creates it and registered as an attributes table); it becomes the layer's default unless
    someone else's default style is there already.  True when ours is the default."""
    if STYLE_TABLE not in table_names(con):
        con.execute(f'CREATE TABLE "{STYLE_TABLE}" ("id" INTEGER PRIMARY KEY AUTOINCREMENT NOT NULL, '
                    '"f_table_catalog" TEXT(256), "f_table_schema" TEXT(256), "f_table_name" TEXT(256), '
                    '"f_geometry_column" TEXT(256), "styleName" TEXT(30), "styleQML" TEXT, "styleSLD" TEXT, '
                    '"useAsDefault" BOOLEAN, "description" TEXT, "owner" TEXT(30), "ui" TEXT(30), '
                    "\"update_time\" DATETIME DEFAULT (strftime('%Y-%m-%dT%H:%M:%fZ','now')))")
        con.execute("INSERT INTO gpkg_contents (table_name, data_type, identifier, description, last_change) "
                    "VALUES (?, 'attributes', ?, 'default layer styles', ?)", (STYLE_TABLE, STYLE_TABLE, timestamp()))
    con.execute(f'DELETE FROM "{STYLE_TABLE}" WHERE f_table_name = ? AND styleName = ?', (layer.table, name))
    others = con.execute(f'SELECT count(*) FROM "{STYLE_TABLE}" WHERE f_table_name = ? AND useAsDefault',
                         (layer.table,)).fetchone()[0]
    con.execute(f'INSERT INTO "{STYLE_TABLE}" (f_table_catalog, f_table_schema, f_table_name, f_geometry_column, '
                'styleName, styleQML, styleSLD, useAsDefault, description, owner, update_time) '
                "VALUES ('', '', ?, ?, ?, ?, ?, ?, ?, '', ?)",
                (layer.table, layer.geometry_column, name, qml, sld, int(others == 0), description, timestamp()))
    return others == 0
