"""Merge findings into the owner's asset GeoPackage inside the file's own SQLite transaction.

A GeoPackage is an SQLite database, and SQLite's atomic commit (rollback
journal or write-ahead log, whichever the file uses) is the guarantee: the
merge takes the write lock first (``BEGIN IMMEDIATE``, a bounded wait, then a
refusal naming the holder where the system tells), does every read and write
on that one connection, checks the result, and commits — or rolls back and
leaves the file as it was.  Another program's committed edit, in either
journal mode, is never lost, and two runs never interleave.

:func:`prepare_merge` stops just before the commit, so the caller can decide
the merge together with its other outputs (both or neither); ``commit`` or
``rollback`` ends it.  Each zone, cut by the assets it overlaps, becomes rows
keyed by source and scan: a rerun replaces its own rows, never duplicates them;
rows of other scans, other inspections and every other table stay as they were.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import hashlib
import json
import os
import sqlite3
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pyproj
import shapely
from shapely.geometry import MultiPolygon

from overlay.assets import gpkg_sql
from overlay.assets.elements import asset_table_sql
from overlay.errors import (
    CRSCheckError,
    OutputConflictError,
    RegistrationError,
    SiteFileError,
)
from overlay.geometry.crs import reproject
from overlay.outputs import palette, styles
from overlay.outputs.staging import glob_escape, part_path, remove_stale_parts
from overlay.quantities import area_field, defects

if TYPE_CHECKING:
    from overlay.assets.merge_postgis import OpenDbMerge
    from overlay.job import RunResult
    from overlay.zones.zone import Zone

SOURCE = "overlay"
STYLE_NAME = "overlay findings"
WAIT_S = 10.0  # how long a merge waits for another program's write lock before it refuses (exit 5)
KEEP_BACKUPS = 3
RESERVED_PREFIXES = ("gpkg_", "rtree_", "sqlite_", "gpkgext_")
KEY_FIELDS = ("source", "scan_id", "zone_id", "asset_id")
FIELDS = {  # the findings table we create; an existing one must have KEY_FIELDS, the rest is added if missing
    "asset_id": "TEXT", "source": "TEXT", "scan_id": "TEXT", "zone_id": "TEXT", "defect_id": "TEXT", "class": "TEXT",
    "threshold_db": "REAL", "affected_area_m2": "REAL", "basis": "TEXT", "peak_hz": "REAL", "depth_low_m": "REAL",
    "depth_high_m": "REAL", "confidence": "REAL", "inspected": "DATETIME", "method": "TEXT", "run_key": "TEXT",
}
GEOMETRY_TYPES = ("MULTIPOLYGON", "GEOMETRY", "MULTISURFACE")


FIELD_NOTES = {  # what each findings field means, for a database's column comments
    "asset_id": "the owner's asset the finding lies on", "source": "who wrote the row ('overlay' for this tool)",
    "scan_id": "the scan(s) the finding comes from; several, ';'-separated, where scans overlapped",
    "zone_id": "the zone or defect id in the run's outputs", "defect_id": "the defect (its lowest-class zone's id)",
    "class": "the highest class the defect reaches (basis outline) or the zone's class (basis contour)",
    "threshold_db": "that class's vibration energy ratio level, dB", "affected_area_m2": "area of this row's outline "
    "on the asset, m2 of the structure's surface", "basis": "outline: the estimated defect outline; contour: the "
    "class contour", "peak_hz": "peak frequency of the zone-averaged spectrum, Hz", "depth_low_m": "depth estimate, "
    "low end, m (order of magnitude only)", "depth_high_m": "depth estimate, high end, m (order of magnitude only)",
    "confidence": "0-1, the product of the zone's confidence factors", "inspected": "when the scan was made (UTC)",
    "method": "the inspection method", "run_key": "tool version and zone settings that produced the row (a hash)",
}


def area_note(class_name: str) -> str:
    return f"area of the {class_name} contour on this asset, m2 (information: never add across classes)"


@dataclass(frozen=True)
class MergeSummary:
    target: Path | str  # the GeoPackage, or the database as a person reads it
    layer: str
    added: int
    replaced: int
    kept: int
    backup: Path | None
    created: bool = False
    added_fields: tuple[str, ...] = ()


def run_key(result: "RunResult") -> str:
    """A key for what produced the rows: tool version and the settings that shape zones (no clock time)."""
    text = json.dumps({"version": result.tool_version, "settings": result.settings()}, sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def check_layer_name(name: str, asset_layer: str | None, *, source: str | None = None) -> None:
    """A findings layer may not be the asset layer nor a name the GeoPackage or SQLite reserve (exit 3)."""
    low = name.lower()
    if asset_layer is not None and low == asset_layer.lower():
        raise SiteFileError(f"findings layer {name!r} is the asset layer; name a layer of its own", source=source,
                            field="merge.findings_layer")
    if low.startswith(RESERVED_PREFIXES):
        raise SiteFileError(f"findings layer {name!r} starts with a prefix reserved by GeoPackage/SQLite "
                            f"({', '.join(RESERVED_PREFIXES)})", source=source, field="merge.findings_layer")


def findings_fields(result: "RunResult") -> dict[str, str]:
    """Our fields and their GeoPackage types: the fixed ones and one contour area per class."""
    return {**FIELDS, **{area_field(c.name): "REAL" for c in result.site.zones.classes}}


def findings_rows(result: "RunResult") -> tuple[list[dict[str, Any]], list[Any]]:
    """The rows this run contributes and their geometries (map CRS).

    With ``basis = "outline"``: one row per defect and asset — the defect's estimated outline
    cut by the asset, at the highest class the defect reaches, with every class's contour area
    on that asset beside it.  With ``basis = "contour"``: one row per class zone and asset.
    """
    spec = result.site.merge
    assert spec is not None
    key = run_key(result)
    areas = [area_field(c.name) for c in result.site.zones.classes]
    by_zone: dict[str, list[dict[str, Any]]] = {}
    for p in result.asset_pieces:
        by_zone.setdefault(p["zone_id"], []).append(p)
    rows, geoms = [], []

    def row(p: dict[str, Any], zone: "Zone", zone_id: str, cls: str, class_areas: dict[str, float | None]) -> None:
        level = next(c.threshold_db for c in result.site.zones.classes if c.name == cls)
        rows.append({
            "asset_id": p["asset_id"], "source": SOURCE, "scan_id": p["scan_id"], "zone_id": zone_id,
            "defect_id": p["defect_id"], "class": cls, "threshold_db": level,
            "affected_area_m2": round(p["area_m2"], 6), "basis": result.site.repair.basis,
            "peak_hz": _real(zone.peak_hz), "depth_low_m": _real(zone.depth_low_m), "depth_high_m": _real(zone.depth_high_m),
            "confidence": zone.confidence, "inspected": _datetime(zone.surveyed), "method": spec.method, "run_key": key,
            **{k: None if v is None else round(v, 6) for k, v in class_areas.items()},
        })
        geoms.append(p["geometry"])

    if result.site.repair.basis == "outline":
        for d in defects(result.zones, result.site.zones.classes):
            for p in by_zone.get(d.defect_id, []):  # the lowest-class zone's pieces: the outline cut by each asset
                on_asset = dict.fromkeys(areas, 0.0)
                for z in d.zones:
                    for q in by_zone.get(z.zone_id, []):
                        if q["asset_id"] == p["asset_id"]:
                            on_asset[area_field(z.class_name)] += q["contour_area_m2"]
                row(p, d.top, d.defect_id, d.highest_class, dict(on_asset))
    else:
        by_id = {z.zone_id: z for z in result.zones}
        for p in result.asset_pieces:
            z = by_id[p["zone_id"]]
            class_areas: dict[str, float | None] = dict.fromkeys(areas)
            class_areas[area_field(z.class_name)] = p["contour_area_m2"]
            row(p, z, z.zone_id, z.class_name, class_areas)
    return rows, geoms


def _datetime(text: str) -> str | None:
    """A scan's survey time as GeoPackage DATETIME text (UTC, milliseconds), None when unknown."""
    if not text:
        return None
    return gpkg_sql.timestamp(dt.datetime.fromisoformat(text.replace("Z", "+00:00")))


def _real(v: float) -> float | None:
    return float(v) if np.isfinite(v) else None


def scans_of(value: object) -> set[str]:
    """The scans a row belongs to (a mosaic zone lists several, "S-101;S-106")."""
    return {s for s in str(value or "").split(";") if s}


def check_placement(result: "RunResult") -> None:
    """Before anything is removed: the zones must land on the assets they say they belong to.

    A wrong (but valid) CRS or placement puts every zone beside its asset; a merge would then
    replace good findings with none.
    """
    if result.assets is None or not result.zones:
        return
    ids = set(result.assets.ids)
    hits: dict[str, set[str]] = {}
    for p in result.asset_pieces:
        hits.setdefault(p["zone_id"], set()).add(p["asset_id"])
    if not hits:
        raise RegistrationError(
            f"none of the {len(result.zones)} zone(s) overlaps an asset of layer {result.assets.layer!r}; the map "
            "CRS or placement is likely wrong — nothing was merged", source=result.site.path, field="map")
    wrong = [z for z in result.zones if z.element in ids and z.element not in hits.get(z.zone_id, set())]
    if wrong:
        z = wrong[0]
        landed = ", ".join(sorted(hits.get(z.zone_id, set()))) or "no asset"
        raise RegistrationError(
            f"{len(wrong)} zone(s) do not touch the asset they belong to (e.g. {z.zone_id} of {z.element} lands on "
            f"{landed}); check the map placement and the scans' element ids — nothing was merged",
            source=result.site.path, field="map")


@dataclass
class OpenMerge:
    """A merge written inside the owner's open transaction, waiting for ``commit`` or ``rollback``."""

    con: sqlite3.Connection
    summary: MergeSummary
    _done: bool = field(default=False, repr=False)

    def commit(self) -> MergeSummary:
        try:
            self.con.execute("COMMIT")
        except sqlite3.Error as exc:
            self.rollback()
            raise OutputConflictError(f"the merge could not be committed ({exc}); the file is as it was",
                                      source=self.summary.target) from exc
        self._close()
        return self.summary

    def rollback(self) -> None:
        if self._done:
            return
        with contextlib.suppress(sqlite3.Error):
            self.con.execute("ROLLBACK")
        self._close()
        if self.summary.backup is not None:  # the backup of a merge that did not happen is not needed
            with contextlib.suppress(FileNotFoundError):
                self.summary.backup.unlink()

    def _close(self) -> None:
        self._done = True
        self.con.close()


def prepare_merge(result: "RunResult", *, replace_findings: bool = False, wait_s: float | None = None,
                  now: dt.datetime | None = None) -> "OpenMerge | OpenDbMerge":
    """Lock the owner's file, check, back it up and write this run's findings — everything but the commit.
    (An asset register in PostgreSQL goes to overlay.assets.merge_postgis, under the same rules.)

    Refuses (nothing changed) when the file is locked past ``wait_s`` (exit 5), when the findings
    layer is not ours to write (exit 3), when the asset layer changed since the run read it (exit 5),
    when the zones miss their assets (exit 4), and when a scan would lose more findings than it
    gains unless ``replace_findings`` (exit 5).
    """
    site = result.site
    spec, elements = site.merge, site.elements
    assert spec is not None and elements is not None and result.assets is not None
    if elements.database is not None:
        from overlay.assets.merge_postgis import prepare_merge_postgis

        return prepare_merge_postgis(result, replace_findings=replace_findings, wait_s=wait_s)
    assert elements.source is not None
    target, name = elements.source, spec.findings_layer
    check_layer_name(name, result.assets.layer, source=str(site.path))
    check_placement(result)
    remove_stale_parts(target.parent, f".{target.name}.")
    wait_s = WAIT_S if wait_s is None else wait_s
    con = gpkg_sql.connect(target, wait_s)
    try:
        _begin(con, target, wait_s)
        summary = _write(con, result, target, name, replace_findings, spec.backup, spec.keep_backups, now)
        _check(con, target)
    except BaseException:
        with contextlib.suppress(sqlite3.Error):
            con.execute("ROLLBACK")
        con.close()
        raise
    return OpenMerge(con, summary)


def merge_findings(result: "RunResult", *, replace_findings: bool = False, wait_s: float | None = None) -> MergeSummary:
    """Prepare and commit at once, for a caller that decides no other output with the merge."""
    return prepare_merge(result, replace_findings=replace_findings, wait_s=wait_s).commit()


def _begin(con: sqlite3.Connection, target: Path, wait_s: float) -> None:
    try:
        con.execute("BEGIN IMMEDIATE")
    except sqlite3.OperationalError as exc:
        holder = lock_holder(target)
        who = f" by {holder}" if holder else " by another program"
        raise OutputConflictError(f"the GeoPackage is locked{who} (waited {wait_s:g} s: {exc}); close its edit "
                                  "session and rerun", source=target) from exc
    if not gpkg_sql.is_geopackage(con):
        raise SiteFileError("not a GeoPackage (application_id is not 'GPKG')", source=target, field="elements.source")


def _write(con: sqlite3.Connection, result: "RunResult", target: Path, name: str, replace: bool, backup: bool,
           keep: int, now: dt.datetime | None) -> MergeSummary:
    site = result.site
    src = str(target)
    assert site.elements is not None and result.assets is not None
    assets = asset_table_sql(con, site.elements, src)
    if not assets.same_as(result.assets):
        raise OutputConflictError("the asset layer changed while the run went on (another program edited it); "
                                  "rerun to split the zones by the assets as they are now", source=target,
                                  field=assets.layer)
    layers = gpkg_sql.layers(con)
    existing = {k.lower(): v for k, v in layers.items()}.get(name.lower())
    if existing is None and name.lower() in {t.lower() for t in gpkg_sql.table_names(con)}:
        raise SiteFileError(f"the file already has a table {name!r} that is not a feature layer; name another "
                            "findings layer", source=src, field="merge.findings_layer")
    asset_layer = {k.lower(): v for k, v in layers.items()}[assets.layer.lower()]
    rows, geoms = findings_rows(result)
    created, added_fields = False, ()
    fields = findings_fields(result)
    if existing is None:
        layer, created = gpkg_sql.create_feature_table(
            con, name, fields, "MULTIPOLYGON", asset_layer.srs_id,
            "findings of acoustic non-contact scans (written by overlay)"), True
    else:
        layer = existing
        _check_shape(con, layer, src)
        added_fields = tuple(gpkg_sql.add_columns(con, layer.table, fields))
    geoms = into_crs(geoms, result.crs, layer.crs, src)
    scans = {s.scan_id for s in result.scans}
    own = [(fid, sid) for fid, sid in con.execute(
        f"SELECT {gpkg_sql.quote(layer.fid)}, scan_id FROM {gpkg_sql.quote(layer.table)} WHERE source = ?", (SOURCE,))
        if scans_of(sid) & scans]
    if not replace:
        refuse_losses(own, rows, scans, target, layer.table)
    total = con.execute(f"SELECT count(*) FROM {gpkg_sql.quote(layer.table)}").fetchone()[0]
    copy = make_backup(target, keep, now) if backup else None
    for k in range(0, len(own), 500):
        chunk = [fid for fid, _ in own[k:k + 500]]
        con.execute(f"DELETE FROM {gpkg_sql.quote(layer.table)} WHERE {gpkg_sql.quote(layer.fid)} IN "
                    f"({', '.join('?' for _ in chunk)})", chunk)
    added = gpkg_sql.insert_features(con, layer, rows, [as_multi(g) for g in geoms])
    gpkg_sql.touch_contents(con, layer)
    style = findings_style(result)
    gpkg_sql.put_style(con, layer, STYLE_NAME, styles.qml(style), styles.sld(style, layer.table),
                       "findings by highest class, in the colours of overlay's drawing and report")
    return MergeSummary(target, layer.table, added, len(own), total - len(own), copy, created, added_fields)


def findings_style(result: "RunResult") -> styles.LayerStyle:
    """The findings layer drawn by class in the palette every output shares."""
    cls = palette.for_site(result.site)
    return styles.LayerStyle("findings by class", attr="class", categories=styles.class_categories(
        [(c.name, c.threshold_db, cls[c.name].rgb) for c in result.site.zones.classes]))


def as_multi(g: Any) -> MultiPolygon:
    """Findings are MultiPolygons (a piece cut by an asset can fall apart, or come with a shared edge as a line)."""
    return MultiPolygon([p for p in shapely.get_parts(g) if p.geom_type == "Polygon"])


def _check_shape(con: sqlite3.Connection, layer: gpkg_sql.Layer, src: str) -> None:
    """An existing findings layer must be able to hold our rows: key fields present, polygon geometry."""
    have = {c.lower() for c in gpkg_sql.columns(con, layer.table)}
    missing = [k for k in KEY_FIELDS if k not in have]
    if missing:
        raise SiteFileError(f"the existing layer {layer.table!r} has no field {missing[0]!r}, so it is not a findings "
                            "layer of this tool; name another findings layer", source=src,
                            field="merge.findings_layer")
    if layer.geometry_type not in GEOMETRY_TYPES:
        raise SiteFileError(f"the existing layer {layer.table!r} holds {layer.geometry_type} geometries; findings "
                            "need MULTIPOLYGON", source=src, field="merge.findings_layer")


def into_crs(geoms: list[Any], src_crs: pyproj.CRS | None, dst_crs: pyproj.CRS | None, source: str) -> list[Any]:
    """The findings in the CRS of the findings layer, through our transformation check."""
    if not geoms or src_crs is None or dst_crs is None or src_crs.equals(dst_crs):
        if (src_crs is None) != (dst_crs is None):
            raise CRSCheckError("the findings layer and the map frame do not both have a CRS", source=source,
                                field="map.crs")
        return geoms
    moved, _, _ = reproject(np.asarray(geoms, dtype=object), src_crs, dst_crs, source=source)
    return list(moved)


def refuse_losses(own: list[tuple[Any, object]], rows: list[dict[str, Any]], scans: set[str], target: Path | str,
                  table: str) -> None:
    """A rerun may replace a scan's findings, not lose them silently: more removed than added is refused."""
    removed: dict[str, int] = {}
    for _, sid in own:
        for s in scans_of(sid) & scans:
            removed[s] = removed.get(s, 0) + 1
    added: dict[str, int] = {}
    for r in rows:
        for s in scans_of(r["scan_id"]):
            added[s] = added.get(s, 0) + 1
    losing = sorted(s for s in removed if removed[s] > added.get(s, 0))
    if losing:
        s = losing[0]
        raise OutputConflictError(
            f"the merge would remove {removed[s]} earlier finding(s) of scan {s} and add {added.get(s, 0)} "
            f"({len(losing)} scan(s) like this); if the zones really went (new thresholds, a repaired surface), "
            "merge again with replace_findings (command line: --replace-findings)", source=target, field=table)


def _check(con: sqlite3.Connection, target: Path) -> None:
    """SQLite's own checks of the changed file, before the commit (GeoPackage standard, Req 6 and 7)."""
    ok = con.execute("PRAGMA integrity_check").fetchone()[0]
    bad_keys = con.execute("PRAGMA foreign_key_check").fetchall()
    if ok != "ok" or bad_keys:
        raise OutputConflictError(f"the merged file failed SQLite's checks ({ok}; foreign keys {bad_keys[:3]}); "
                                  "rolled back, the file is as it was", source=target)


# --- backups --------------------------------------------------------------------------------------

def backup_name(target: Path, now: dt.datetime) -> Path:
    """``<name>.before-overlay-<UTC time>.gpkg``; a second backup within the same second gets a counter."""
    stamp = now.astimezone(dt.timezone.utc).strftime("%Y%m%dT%H%M%SZ")
    path = target.with_name(f"{target.stem}.before-overlay-{stamp}{target.suffix}")
    k = 2
    while path.exists():
        path = target.with_name(f"{target.stem}.before-overlay-{stamp}-{k}{target.suffix}")
        k += 1
    return path


def backups_of(target: Path) -> list[Path]:
    """This file's backups, oldest first (the legacy name of early versions counts as the oldest)."""
    legacy = target.with_name(f"{target.stem}.before-overlay{target.suffix}")
    stamped = sorted(target.parent.glob(f"{glob_escape(target.stem)}.before-overlay-*{target.suffix}"), key=_made)
    return ([legacy] if legacy.exists() else []) + stamped


def _made(backup: Path) -> tuple[str, int]:
    """(UTC stamp, counter): a second backup within one second ("…Z-2") sorts after the first ("…Z")."""
    stamp, _, counter = backup.stem.rpartition(".before-overlay-")[2].partition("-")
    return stamp, int(counter) if counter.isdigit() else 1


def make_backup(target: Path, keep: int, now: dt.datetime | None = None) -> Path:
    """A copy of the owner's file as it is now, through SQLite's online backup API (WAL content included).

    Called while our connection holds the write lock and has written nothing: a second
    connection of the same SQLite library reads the committed state without dropping that lock.
    Retention: the oldest backup (the owner's original before this tool first wrote) is kept
    forever, of the others the newest ``keep``.
    """
    final = backup_name(target, now or dt.datetime.now(dt.timezone.utc))
    part = part_path(target, "backup")
    reader = sqlite3.connect(target)
    try:
        copy = sqlite3.connect(part)
        try:
            reader.backup(copy)
        finally:
            copy.close()
        os.replace(part, final)
    finally:
        reader.close()
        with contextlib.suppress(FileNotFoundError):
            part.unlink()
    old = backups_of(target)
    for extra in old[1:-keep] if keep > 0 else old[1:]:
        if extra != final:
            extra.unlink()
    return final


# --- who holds the lock -------------------------------------------------------------------------

def lock_holder(path: Path) -> str | None:
    """The process holding a POSIX lock on the file or its WAL index, from /proc/locks (Linux), as text."""
    try:
        inodes = {(os.stat(p).st_dev, os.stat(p).st_ino) for p in (path, Path(f"{path}-shm")) if p.exists()}
        lines = Path("/proc/locks").read_text().splitlines()
    except OSError:
        return None
    pid = locking_pid(lines, inodes, os.getpid())
    if pid is None:
        return None
    try:
        comm = Path(f"/proc/{pid}/comm").read_text().strip()
    except OSError:
        comm = "?"
    return f"process {pid} ({comm})"


def locking_pid(lines: list[str], inodes: set[tuple[int, int]], me: int) -> int | None:
    """The first other process with a lock on one of ``inodes`` in /proc/locks lines (proc(5): ``1: POSIX
    ADVISORY WRITE <pid> <major>:<minor>:<inode> <start> <end>``, device numbers in hex).  Open file
    description locks (OFDLCK) belong to no process: their pid is -1."""
    for line in lines:
        parts = line.split()
        if len(parts) < 6 or parts[1] not in ("POSIX", "OFDLCK"):
            continue
        try:
            pid = int(parts[4])
            major, minor, ino = parts[5].split(":")
            dev = os.makedev(int(major, 16), int(minor, 16))
        except ValueError:
            continue
        if (dev, int(ino)) in inodes and pid not in (me, -1):
            return pid
    return None
