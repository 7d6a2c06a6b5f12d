"""Merge findings into the owner's PostGIS asset register inside one database transaction.

The same rules as the GeoPackage merge (overlay.assets.merge), with PostgreSQL's own
guarantees: one transaction from the first read to the commit (DDL included, so
a findings table created by a merge that fails is gone again); an advisory lock
keyed on the findings table, so a second run waits a bounded time and then
refuses (exit 5) instead of interleaving; the asset table read again and
compared with what the run split the zones by (an edit after that comparison is
the same as an edit after the commit); rows of this source and these scans
replaced, every other row untouched.  Values travel as parameters, names as
quoted identifiers, geometries as WKB; COMMENT ON takes no parameters, so its
text is a quoted literal built by psycopg.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import time
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import shapely

from overlay.assets.merge import (
    GEOMETRY_TYPES,
    KEY_FIELDS,
    SOURCE,
    WAIT_S,
    MergeSummary,
    as_multi,
    check_layer_name,
    check_placement,
    findings_fields,
    findings_rows,
    into_crs,
    refuse_losses,
    scans_of,
)
from overlay.assets.postgis import (
    asset_table_pg,
    columns,
    connect,
    describe_database,
    geometry_column,
    lock_key,
    srid_crs,
    table_name,
)
from overlay.errors import CRSCheckError, OutputConflictError, SiteFileError

if TYPE_CHECKING:
    import psycopg

    from overlay.job import RunResult

PG_TYPES = {"TEXT": "text", "REAL": "double precision", "DATETIME": "timestamp with time zone"}
COMPATIBLE = {  # an existing column of these types can hold our values
    "text": {"text", "character varying", "character"},
    "double precision": {"double precision", "real", "numeric"},
    "timestamp with time zone": {"timestamp with time zone", "timestamp without time zone"},
}
POLL_S = 0.05


@dataclass
class OpenDbMerge:
    """A merge written inside the owner's open transaction, waiting for ``commit`` or ``rollback``."""

    con: "psycopg.Connection"
    summary: MergeSummary
    _done: bool = field(default=False, repr=False)

    def commit(self) -> MergeSummary:
        import psycopg

        try:
            self.con.commit()
        except psycopg.Error as exc:
            self.rollback()
            raise OutputConflictError(f"the merge could not be committed ({str(exc).strip()}); the database is as it "
                                      "was", source=str(self.summary.target)) from exc
        self._close()
        return self.summary

    def rollback(self) -> None:
        if self._done:
            return
        with contextlib.suppress(Exception):
            self.con.rollback()
        self._close()

    def _close(self) -> None:
        self._done = True
        with contextlib.suppress(Exception):
            self.con.close()


def prepare_merge_postgis(result: "RunResult", *, replace_findings: bool = False,
                          wait_s: float | None = None) -> OpenDbMerge:
    """Lock, check and write this run's findings into the database — everything but the commit.

    Refuses (nothing changed) when another merge holds the findings table past ``wait_s`` or a row
    to replace stays locked (exit 5), when the findings table has the wrong shape (exit 3), when
    the asset table changed since the run read it (exit 5), when the zones miss their assets
    (exit 4), and when a scan would lose more findings than it gains unless ``replace_findings``.
    """
    import psycopg

    site = result.site
    spec, elements = site.merge, site.elements
    assert spec is not None and elements is not None and result.assets is not None
    check_layer_name(spec.findings_layer, elements.layer, source=str(site.path))
    check_placement(result)
    wait_s = WAIT_S if wait_s is None else wait_s
    con = connect(elements, "overlay merge")
    try:
        con.execute("SELECT set_config('lock_timeout', %s, true)", (f"{int(wait_s * 1000)}ms",))
        _lock(con, elements.schema, spec.findings_layer, wait_s, elements.where)
        summary = _write(con, result, replace_findings)
    except BaseException as exc:
        with contextlib.suppress(Exception):
            con.rollback()
        con.close()
        if isinstance(exc, psycopg.errors.LockNotAvailable):
            raise OutputConflictError(f"a table of the merge stays locked by another session (waited {wait_s:g} s: "
                                      f"{str(exc).strip()}); nothing was changed", source=elements.where) from exc
        if isinstance(exc, psycopg.Error):
            raise OutputConflictError(f"the database refused the merge ({str(exc).strip()}); rolled back, nothing "
                                      "was changed", source=elements.where) from exc
        raise
    return OpenDbMerge(con, summary)


def _lock(con: "psycopg.Connection", schema: str, table: str, wait_s: float, where: str) -> None:
    """The findings table's advisory lock for this transaction, waiting at most ``wait_s``."""
    key = lock_key(schema, table)
    deadline = time.monotonic() + wait_s
    while not con.execute("SELECT pg_try_advisory_xact_lock(%s)", (key,)).fetchone()[0]:
        if time.monotonic() >= deadline:
            holder = _holder(con, key)
            raise OutputConflictError(f"another merge into {schema}.{table} is running{holder} (waited {wait_s:g} s); "
                                      "rerun when it is done", source=where)
        time.sleep(POLL_S)


def _holder(con: "psycopg.Connection", key: int) -> str:
    """Who holds an advisory lock (a 64-bit key is classid = high 32 bits, objid = low 32 bits, objsubid 1)."""
    row = con.execute(
        "SELECT a.pid, a.application_name, a.client_addr::text FROM pg_locks l JOIN pg_stat_activity a ON a.pid = l.pid "
        "WHERE l.locktype = 'advisory' AND l.granted AND l.classid = %s::bigint::oid AND l.objid = %s::bigint::oid "
        "AND l.objsubid = 1", ((key >> 32) & 0xFFFFFFFF, key & 0xFFFFFFFF)).fetchone()
    if row is None:
        return ""
    return f" (server process {row[0]}, {row[1] or 'no application name'}{', from ' + row[2] if row[2] else ''})"


def _write(con: "psycopg.Connection", result: "RunResult", replace: bool) -> MergeSummary:
    from psycopg import sql

    site = result.site
    spec, elements = site.merge, site.elements
    assert spec is not None and elements is not None and elements.layer is not None and result.assets is not None
    where, schema, name = elements.where, elements.schema, spec.findings_layer
    if not asset_table_pg(con, elements).same_as(result.assets):
        raise OutputConflictError("the asset table changed while the run went on (another session edited it); "
                                  "rerun to split the zones by the assets as they are now", source=where,
                                  field=f"{schema}.{elements.layer}")
    asset_srid = geometry_column(con, schema, elements.layer, where)
    assert asset_srid is not None
    fields = findings_fields(result)
    found = geometry_column(con, schema, name, where, "merge.findings_layer")
    created, added_fields = False, ()
    if found is None:
        geom, srid = "geom", asset_srid[2]
        _create(con, schema, name, fields, srid, result)
        created = True
    else:
        geom, _, srid = found
        _check_shape(con, schema, name, found, where)
        added_fields = tuple(_add_columns(con, schema, name, fields, where))
    rows, geoms = findings_rows(result)
    geoms = into_crs(geoms, result.crs, srid_crs(con, srid), where)
    t = table_name(schema, name)
    scans = {s.scan_id for s in result.scans}
    own = [(tid, sid) for tid, sid in con.execute(
        sql.SQL("SELECT ctid, scan_id FROM {} WHERE source = %s FOR UPDATE").format(t), (SOURCE,))
        if scans_of(sid) & scans]
    if not replace:
        refuse_losses(own, rows, scans, where, f"{schema}.{name}")
    total = con.execute(sql.SQL("SELECT count(*) FROM {}").format(t)).fetchone()[0]
    if own:
        con.execute(sql.SQL("DELETE FROM {} WHERE ctid = ANY(%s::tid[])").format(t), ([str(tid) for tid, _ in own],))
    names = list(fields)
    insert = sql.SQL("INSERT INTO {t} ({cols}, {g}) VALUES ({vals}, ST_Multi(ST_GeomFromWKB(%s, %s)))").format(
        t=t, cols=sql.SQL(", ").join(map(sql.Identifier, names)), g=sql.Identifier(geom),
        vals=sql.SQL(", ").join(sql.Placeholder() for _ in names))
    params = [[_value(r.get(n), fields[n]) for n in names] + [shapely.to_wkb(as_multi(g)), srid]
              for r, g in zip(rows, geoms)]
    with con.cursor() as cur:
        cur.executemany(insert, params)
    return MergeSummary(describe_database(elements.database or ""), f"{schema}.{name}", len(rows), len(own),
                        total - len(own), None, created, added_fields)


def _value(v: Any, kind: str) -> Any:
    """A findings value as psycopg passes it: DATETIME text (GeoPackage form) as an aware datetime."""
    if kind == "DATETIME" and isinstance(v, str):
        return dt.datetime.fromisoformat(v.replace("Z", "+00:00"))
    return v


def _create(con: "psycopg.Connection", schema: str, name: str, fields: dict[str, str], srid: int,
            result: "RunResult") -> None:
    """The findings table with typed columns, a spatial index and a comment on every column."""
    from psycopg import sql

    from overlay.assets.merge import FIELD_NOTES, area_note
    from overlay.quantities import area_field

    t = table_name(schema, name)
    cols = sql.SQL(", ").join(sql.SQL("{} {}").format(sql.Identifier(n), sql.SQL(PG_TYPES[k])) for n, k in fields.items())
    con.execute(sql.SQL("CREATE TABLE {t} (fid bigint GENERATED ALWAYS AS IDENTITY PRIMARY KEY, "
                        "geom geometry(MultiPolygon, {srid}) NOT NULL, {cols})").format(
        t=t, srid=sql.Literal(srid), cols=cols))
    con.execute(sql.SQL("CREATE INDEX {i} ON {t} USING GIST (geom)").format(
        i=sql.Identifier(f"{name}_geom_idx"[:63]), t=t))
    con.execute(sql.SQL("COMMENT ON TABLE {} IS {}").format(
        t, sql.Literal("findings of acoustic non-contact scans (written by overlay)")))
    notes = {**FIELD_NOTES, **{area_field(c.name): area_note(c.name) for c in result.site.zones.classes}}
    notes["geom"] = "the finding's outline, cut by the asset it lies on"
    for n, text in notes.items():
        if n in fields or n == "geom":
            con.execute(sql.SQL("COMMENT ON COLUMN {}.{} IS {}").format(t, sql.Identifier(n), sql.Literal(text)))


def _check_shape(con: "psycopg.Connection", schema: str, name: str, geom: tuple[str, str, int], where: str) -> None:
    """An existing findings table must hold our rows: key fields present, polygons, a CRS."""
    have = {k.lower(): v for k, v in columns(con, schema, name).items()}
    missing = [k for k in KEY_FIELDS if k not in have]
    if missing:
        raise SiteFileError(f"the existing table {schema}.{name} has no column {missing[0]!r}, so it is not a "
                            "findings table of this tool; name another findings_layer", source=where,
                            field="merge.findings_layer")
    if geom[1] not in GEOMETRY_TYPES:
        raise SiteFileError(f"the existing table {schema}.{name} holds {geom[1]} geometries in {geom[0]!r}; findings "
                            "need MULTIPOLYGON", source=where, field="merge.findings_layer")
    if geom[2] <= 0:
        raise CRSCheckError(f"the existing table {schema}.{name} has no SRID on {geom[0]!r}", source=where,
                            field="merge.findings_layer")


def _add_columns(con: "psycopg.Connection", schema: str, name: str, fields: dict[str, str], where: str) -> list[str]:
    """Our columns the table lacks are added; one of the wrong type is refused, naming it (exit 3)."""
    from psycopg import sql

    have = {k.lower(): v for k, v in columns(con, schema, name).items()}
    added = []
    for n, kind in fields.items():
        want = PG_TYPES[kind]
        if n.lower() in have:
            if have[n.lower()] not in COMPATIBLE[want]:
                raise SiteFileError(f"column {n!r} of {schema}.{name} is {have[n.lower()]}; findings need {want}",
                                    source=where, field="merge.findings_layer")
            continue
        con.execute(sql.SQL("ALTER TABLE {} ADD COLUMN {} {}").format(table_name(schema, name), sql.Identifier(n),
                                                                       sql.SQL(want)))
        added.append(n)
    return added
