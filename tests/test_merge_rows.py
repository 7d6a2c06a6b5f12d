"""The merge's row logic on a small owner GeoPackage written by GDAL (pyogrio), fast enough to run
for every mutant of overlay.assets.merge: which rows a run contributes, what they hold, what a
rerun replaces, what it refuses, backups, and who holds a lock.

Outside references: the GeoPackage standard (OGC 12-128r18: Req 15 DATETIME text, MULTIPOLYGON
geometry type names), SQLite's documentation (BEGIN IMMEDIATE takes the write lock; a rolled-back
transaction leaves the file as it was), the Linux proc(5) page for /proc/locks, and pyproj for the
reprojection.  The expected areas are rectangle arithmetic, worked in the comments.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import multiprocessing
import os
import sqlite3
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pyproj
import pytest
import shapely
from shapely.geometry import GeometryCollection, LineString, MultiPolygon, box

from overlay.assets import gpkg_sql
from overlay.assets import merge as m
from overlay.assets.elements import element_layer, read_asset_table, split_by_assets
from overlay.errors import CRSCheckError, OutputConflictError, RegistrationError, SiteFileError
from overlay.settings import Elements, MergeSpec, RepairSpec, Site, ZoneSpec
from tests.zones_by_hand import CLASSES, zone

CRS = pyproj.CRS.from_epsg(25832)
X0, Y0 = 512000.0, 5712000.0  # somewhere in UTM zone 32
WHEN = "2026-05-04T10:20:30Z"


def owner_file(path: Path, foreign: bool = True) -> Path:
    """Two 10 m × 10 m assets side by side, written by GDAL; optionally another inspection's finding."""
    import geopandas as gpd
    import pyogrio

    assets = gpd.GeoDataFrame({"asset_id": ["A-1", "A-2"]},
                              geometry=[box(X0, Y0, X0 + 10, Y0 + 10), box(X0 + 10, Y0, X0 + 20, Y0 + 10)], crs=CRS)
    pyogrio.write_dataframe(assets, path, layer="assets")
    if foreign:
        other = gpd.GeoDataFrame({"asset_id": ["A-1"], "source": ["hammer survey"], "scan_id": ["s1"],
                                  "zone_id": ["h1"]}, geometry=[box(X0 + 1, Y0 + 1, X0 + 2, Y0 + 2)], crs=CRS)
        pyogrio.write_dataframe(other, path, layer="acoustic_findings", promote_to_multi=True)
    return path


def hand_zones() -> list:
    """Defect s1-L-1 straddles the two assets (outline 3 m × 3 m, half on each); s2-L-1 lies on A-1; s3-L-1
    on neither."""
    def b(x0, y0, x1, y1):
        return box(X0 + x0, Y0 + y0, X0 + x1, Y0 + y1)
    outline = b(8.5, 2.5, 11.5000003, 5.5)  # 4.5000009 m² on A-2: the 7th decimal shows the rounding
    common = dict(defect_id="s1-L-1", defect=outline, outline_area_m2=9.0, depth_low_m=0.03, depth_high_m=0.07,
                  surveyed=WHEN, element="A-1")
    return [
        zone("s1-L-1", "Low", contour=b(8, 2, 12, 6), peak_hz=1000.0, confidence=0.5, **common),
        zone("s1-M-1", "mid-band", contour=b(9, 3, 11, 5), peak_hz=1200.0, confidence=0.6, **common),
        zone("s1-H-1", "high", contour=b(10.2, 3.2, 10.8001237, 3.8), peak_hz=1412.345, confidence=0.7, **common),
        zone("s1-H-2", "high", contour=b(11, 4, 11.2, 4.5), peak_hz=1300.0, confidence=0.6, ver_max_db=4.0, **common),
        zone("s3-L-1", "Low", scan_id="s3", contour=b(50, 50, 51, 51), defect_id="s3-L-1", defect=b(50, 50, 51, 51),
             outline_area_m2=1.0),  # off every asset: no row
        zone("s2-L-1", "Low", scan_id="s2", contour=b(1, 1, 3, 3), defect_id="s2-L-1", defect=b(1.5, 1.5, 2.5, 2.5),
             outline_area_m2=1.0, depth_low_m=float("nan"), depth_high_m=0.05, peak_hz=float("nan"), confidence=0.4,
             element="A-1"),
    ]


def run_on(target: Path, zones: list, basis: str = "outline", scans: tuple[str, ...] = ("s1", "s2"),
           backup: bool = True, keep: int = 3) -> SimpleNamespace:
    """A run result as the merge reads it: real site settings, the assets read and split as a run does."""
    elements = Elements(source=target, layer="assets")
    site = Site(path=target.parent / "site.toml", name="t", structure="test slab", drawing_unit="m", scans=(),
                zones=ZoneSpec(classes=CLASSES), repair=RepairSpec(basis=basis), elements=elements,
                merge=MergeSpec(backup=backup, keep_backups=keep))
    table = read_asset_table(elements)
    layer = element_layer(table, CRS, None, 1.0, str(target))
    pieces = split_by_assets(zones, basis, None, layer)
    return SimpleNamespace(site=site, zones=zones, scans=[SimpleNamespace(scan_id=s) for s in scans], crs=CRS,
                           assets=table, asset_pieces=pieces, element_areas=layer.areas_m2, tool_version="9.9",
                           settings=lambda: {"classes": "Low>=3dB", "basis": basis})


def read_rows(path: Path, layer: str = "acoustic_findings") -> list[dict]:
    con = sqlite3.connect(path)
    con.row_factory = sqlite3.Row
    try:
        return [dict(r) for r in con.execute(f'SELECT * FROM "{layer}" ORDER BY source, zone_id, asset_id')]
    finally:
        con.close()


# --- the rows a run contributes ------------------------------------------------------------------

def test_outline_rows_are_one_per_defect_and_asset(tmp_path: Path) -> None:
    res = run_on(owner_file(tmp_path / "o.gpkg"), hand_zones())
    rows, geoms = m.findings_rows(res)
    key = hashlib.sha256(json.dumps({"version": "9.9", "settings": res.settings()}, sort_keys=True)
                         .encode()).hexdigest()[:16]
    by = {(r["zone_id"], r["asset_id"]): (r, g) for r, g in zip(rows, geoms)}
    assert sorted(by) == [("s1-L-1", "A-1"), ("s1-L-1", "A-2"), ("s2-L-1", "A-1")]
    r, g = by[("s1-L-1", "A-2")]
    assert r == {"asset_id": "A-2", "source": "overlay", "scan_id": "s1", "zone_id": "s1-L-1", "defect_id": "s1-L-1",
                 "class": "high", "threshold_db": 10.0, "affected_area_m2": 4.500001, "basis": "outline",
                 "peak_hz": 1412.345, "depth_low_m": 0.03, "depth_high_m": 0.07, "confidence": 0.7,
                 "inspected": "2026-05-04T10:20:30.000Z", "method": MergeSpec().method, "run_key": key,
                 # class contours on A-2: Low 2 × 4 = 8, mid 1 × 2 = 2, high 0.6001237 × 0.6 + 0.2 × 0.5 m²
                 "area_low_m2": 8.0, "area_mid_band_m2": 2.0, "area_high_m2": 0.460074}
    assert g.equals(box(X0 + 10, Y0 + 2.5, X0 + 11.5000003, Y0 + 5.5))  # the outline's part on A-2
    r1 = by[("s1-L-1", "A-1")][0]
    assert (r1["class"], r1["area_low_m2"], r1["area_mid_band_m2"], r1["area_high_m2"]) == ("high", 8.0, 2.0, 0.0)
    r2 = by[("s2-L-1", "A-1")][0]
    assert (r2["class"], r2["threshold_db"], r2["affected_area_m2"], r2["scan_id"]) == ("Low", 3.0, 1.0, "s2")
    assert (r2["peak_hz"], r2["depth_low_m"], r2["inspected"]) == (None, None, None)  # unknown: NULL, never NaN
    assert (r2["area_low_m2"], r2["area_mid_band_m2"]) == (4.0, 0.0)
    res.asset_pieces = [p for p in res.asset_pieces if p["zone_id"] != "s1-H-2"]  # a class zone with no pieces
    rows, _ = m.findings_rows(res)
    assert {r["area_high_m2"] for r in rows if r["asset_id"] == "A-2"} == {0.360074}


def test_contour_rows_are_one_per_class_zone_and_asset(tmp_path: Path) -> None:
    res = run_on(owner_file(tmp_path / "o.gpkg"), hand_zones(), basis="contour")
    rows, _ = m.findings_rows(res)
    by = {(r["zone_id"], r["asset_id"]): r for r in rows}
    assert sorted(by) == [("s1-H-1", "A-2"), ("s1-H-2", "A-2"), ("s1-L-1", "A-1"), ("s1-L-1", "A-2"),
                          ("s1-M-1", "A-1"), ("s1-M-1", "A-2"), ("s2-L-1", "A-1")]
    r = by[("s1-M-1", "A-1")]
    assert (r["class"], r["threshold_db"], r["affected_area_m2"], r["basis"], r["peak_hz"]) == (
        "mid-band", 6.0, 2.0, "contour", 1200.0)
    assert (r["area_low_m2"], r["area_mid_band_m2"], r["area_high_m2"]) == (None, 2.0, None)  # its own class only


def test_fields_and_style_follow_the_site_classes(tmp_path: Path) -> None:
    res = run_on(owner_file(tmp_path / "o.gpkg"), hand_zones())
    fields = m.findings_fields(res)
    assert list(fields)[:len(m.FIELDS)] == list(m.FIELDS)
    assert [k for k in fields if k.startswith("area_")] == ["area_low_m2", "area_mid_band_m2", "area_high_m2"]
    assert all(fields[k] == "REAL" for k in fields if k.startswith("area_"))
    style = m.findings_style(res)
    assert style.attr == "class" and style.name == "findings by class"
    assert [c.value for c in style.categories] == ["Low", "mid-band", "high"]
    assert m.area_note("Low").startswith("area of the Low contour on this asset")


def test_small_helpers() -> None:
    assert m.scans_of("S-101;S-106") == {"S-101", "S-106"} and m.scans_of(None) == set() and m.scans_of(";") == set()
    assert m._real(float("nan")) is None and m._real(np.float32(2.5)) == 2.5 and m._datetime("") is None
    assert m._datetime("2026-05-04T12:20:30+02:00") == "2026-05-04T10:20:30.000Z"  # UTC, milliseconds (Req 15)
    poly = box(0, 0, 1, 1)
    assert m.as_multi(poly).equals(MultiPolygon([poly])) and m.as_multi(poly).geom_type == "MultiPolygon"
    multi = MultiPolygon([poly, box(2, 0, 3, 1)])
    assert m.as_multi(multi).equals(multi) and m.as_multi(multi).geom_type == "MultiPolygon"
    mixed = m.as_multi(GeometryCollection([LineString([(0, 0), (1, 1)]), poly]))
    assert mixed.geom_type == "MultiPolygon" and len(mixed.geoms) == 1 and mixed.area == 1.0
    assert len(m.as_multi(poly).geoms) == 1


def test_layer_names_that_are_not_ours_are_refused() -> None:
    m.check_layer_name("acoustic_findings", "assets")
    for bad, asset_layer in (("Assets", "assets"), ("gpkg_x", "assets"), ("RTREE_x", None), ("sqlite_x", None),
                             ("gpkgext_x", None)):
        with pytest.raises(SiteFileError) as err:
            m.check_layer_name(bad, asset_layer, source="s.toml")
        assert err.value.exit_code == 3 and "merge.findings_layer" in str(err.value)


def test_into_crs_goes_through_pyproj_and_refuses_half_a_crs() -> None:
    g = [shapely.Point(X0, Y0)]
    assert m.into_crs(g, CRS, CRS, "x") is g and m.into_crs(g, None, None, "x") is g and m.into_crs([], CRS, CRS, "x") == []
    moved = m.into_crs(g, CRS, pyproj.CRS.from_epsg(4326), "x")
    lon, lat = pyproj.Transformer.from_crs(CRS, 4326, always_xy=True).transform(X0, Y0)
    assert (moved[0].x, moved[0].y) == pytest.approx((lon, lat), abs=1e-9)
    for a, b in ((CRS, None), (None, CRS)):
        with pytest.raises(CRSCheckError):
            m.into_crs(g, a, b, "x")


def test_placement_that_misses_the_assets_is_refused(tmp_path: Path) -> None:
    res = run_on(owner_file(tmp_path / "o.gpkg"), hand_zones())
    m.check_placement(res)
    s2 = next(z for z in res.zones if z.zone_id == "s2-L-1")
    s2.element = "A-2"  # s2-L-1 lies on A-1 only
    with pytest.raises(RegistrationError, match="1 zone.*s2-L-1 of A-2 lands on A-1") as err:
        m.check_placement(res)
    assert err.value.exit_code == 4
    s2.element = "not an asset"  # an element the layer does not hold is not checked
    m.check_placement(res)
    s2.element = "A-1"
    next(z for z in res.zones if z.zone_id == "s3-L-1").element = "A-2"  # off every asset
    with pytest.raises(RegistrationError, match="s3-L-1 of A-2 lands on no asset"):
        m.check_placement(res)
    res.asset_pieces = []
    with pytest.raises(RegistrationError, match="none of the 6 zone"):
        m.check_placement(res)
    res.assets = None
    m.check_placement(res)


def test_losses_are_counted_per_scan() -> None:
    own = [(1, "s1"), (2, "s1;s2"), (3, "s3")]
    m.refuse_losses(own, [{"scan_id": "s1"}, {"scan_id": "s1"}, {"scan_id": "s2"}], {"s1", "s2"}, "f", "t")
    with pytest.raises(OutputConflictError, match="remove 2 earlier finding.*scan s1 and add 1 .1 scan") as err:
        m.refuse_losses(own, [{"scan_id": "s1;s2"}], {"s1", "s2"}, "f", "t")
    assert err.value.exit_code == 5
    m.refuse_losses(own, [], {"s4"}, "f", "t")  # s3's row is not this run's


# --- the merge in the file ----------------------------------------------------------------------

def test_merge_adds_replaces_and_keeps(tmp_path: Path) -> None:
    target = owner_file(tmp_path / "o.gpkg")
    now = dt.datetime(2026, 5, 4, 10, 0, tzinfo=dt.timezone.utc)
    first = m.prepare_merge(run_on(target, hand_zones()), now=now).commit()
    assert (first.target, first.layer) == (target, "acoustic_findings")
    assert (first.added, first.replaced, first.kept, first.created, first.added_fields[:2]) == (
        3, 0, 1, False, ("defect_id", "class"))
    assert first.backup == tmp_path / "o.before-overlay-20260504T100000Z.gpkg" and first.backup.exists()
    rows = read_rows(target)
    assert [(r["source"], r["zone_id"], r["asset_id"]) for r in rows] == [
        ("hammer survey", "h1", "A-1"), ("overlay", "s1-L-1", "A-1"), ("overlay", "s1-L-1", "A-2"),
        ("overlay", "s2-L-1", "A-1")]
    import pyogrio  # GDAL reads the findings back: geometries and areas as written

    back = pyogrio.read_dataframe(target, layer="acoustic_findings").sort_values(["source", "zone_id", "asset_id"])
    assert back.geometry.area.round(6).tolist()[1:] == [4.5, 4.500001, 1.0]
    assert back.geometry.area.iloc[1:].round(6).tolist() == back.affected_area_m2.iloc[1:].tolist()
    again = m.merge_findings(run_on(target, hand_zones()))
    assert (again.added, again.replaced, again.kept, again.added_fields) == (3, 3, 1, ())
    assert read_rows(target) == rows[:1] + [dict(r, fid=r2["fid"]) for r, r2 in zip(rows[1:], read_rows(target)[1:])]
    con = sqlite3.connect(target)
    try:
        kind = con.execute("SELECT geometry_type_name FROM gpkg_geometry_columns WHERE table_name = "
                           "'acoustic_findings'").fetchone()[0]
        assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    finally:
        con.close()
    assert kind == "MULTIPOLYGON"
    first.backup.unlink()  # gone already: a late rollback does not mind
    m.OpenMerge(sqlite3.connect(":memory:"), first).rollback()


def test_new_findings_layer_is_created_in_the_assets_crs(tmp_path: Path) -> None:
    target = owner_file(tmp_path / "o.gpkg", foreign=False)
    s = m.merge_findings(run_on(target, hand_zones(), backup=False))
    assert (s.created, s.added, s.replaced, s.kept, s.backup) == (True, 3, 0, 0, None)
    con = sqlite3.connect(target)
    try:
        srs = con.execute("SELECT srs_id, geometry_type_name FROM gpkg_geometry_columns "
                          "WHERE table_name = 'acoustic_findings'").fetchone()
        about = con.execute("SELECT description FROM gpkg_contents WHERE table_name = 'acoustic_findings'").fetchone()
        style = con.execute("SELECT styleName, styleQML, styleSLD, description, useAsDefault FROM layer_styles "
                            "WHERE f_table_name = 'acoustic_findings'").fetchone()
    finally:
        con.close()
    assert srs == (25832, "MULTIPOLYGON")  # the asset layer's CRS; the type name as the standard spells it
    assert about == ("findings of acoustic non-contact scans (written by overlay)",)
    assert style[0] == "overlay findings" and "<qgis" in style[1] and "StyledLayerDescriptor" in style[2]
    assert style[3] == "findings by highest class, in the colours of overlay's drawing and report" and style[4] == 1


def test_a_scan_losing_findings_needs_the_replace_flag(tmp_path: Path) -> None:
    target = owner_file(tmp_path / "o.gpkg")
    m.merge_findings(run_on(target, hand_zones()))
    before = target.read_bytes()
    fewer = run_on(target, hand_zones()[:3])  # s2's zone gone, s2 still scanned
    with pytest.raises(OutputConflictError, match="scan s2"):
        m.prepare_merge(fewer)  # refused by default
    with pytest.raises(OutputConflictError, match="scan s2") as err:
        m.merge_findings(fewer)
    assert str(target) in str(err.value) and "acoustic_findings" in str(err.value)
    assert target.read_bytes() == before
    s = m.merge_findings(fewer, replace_findings=True)
    assert (s.added, s.replaced) == (2, 3)
    assert [r["zone_id"] for r in read_rows(target)] == ["h1", "s1-L-1", "s1-L-1"]


def test_rollback_leaves_the_file_and_drops_the_backup(tmp_path: Path) -> None:
    target = owner_file(tmp_path / "o.gpkg")
    before = target.read_bytes()
    pending = m.prepare_merge(run_on(target, hand_zones()))
    assert pending.summary.backup.exists()
    pending.rollback()
    pending.rollback()  # a second call does nothing
    assert target.read_bytes() == before and not pending.summary.backup.exists()


def test_commit_that_fails_rolls_back(tmp_path: Path) -> None:
    target = owner_file(tmp_path / "o.gpkg")
    pending = m.prepare_merge(run_on(target, hand_zones()))
    pending.con.execute("ROLLBACK")  # the transaction is gone: COMMIT fails
    with pytest.raises(OutputConflictError, match="could not be committed") as err:
        pending.commit()
    assert err.value.exit_code == 5 and not pending.summary.backup.exists()


def test_tables_that_cannot_take_findings_are_refused(tmp_path: Path) -> None:
    cases = {"plain table": "CREATE TABLE acoustic_findings (x)",
             "no key field": None, "points": None}
    for what in cases:
        target = owner_file(tmp_path / f"{what}.gpkg", foreign=False)
        if what == "plain table":
            con = sqlite3.connect(target)
            con.execute(cases[what])
            con.commit()
            con.close()
        else:
            import geopandas as gpd
            import pyogrio

            geom = shapely.Point(X0, Y0) if what == "points" else box(X0, Y0, X0 + 1, Y0 + 1)
            cols = {"asset_id": ["A-1"]} if what == "no key field" else {
                "asset_id": ["A-1"], "source": ["x"], "scan_id": ["s"], "zone_id": ["z"]}
            pyogrio.write_dataframe(gpd.GeoDataFrame(cols, geometry=[geom], crs=CRS), target,
                                    layer="acoustic_findings")
        before = target.read_bytes()
        with pytest.raises(SiteFileError) as err:
            m.merge_findings(run_on(target, hand_zones(), backup=False))
        assert err.value.exit_code == 3 and target.read_bytes() == before, what
        assert str(target) in str(err.value), what
        assert {"plain table": "not a feature layer", "no key field": "no field 'source'",
                "points": "holds POINT"}[what] in str(err.value)


def test_asset_layer_edited_since_the_run_is_refused(tmp_path: Path) -> None:
    target = owner_file(tmp_path / "o.gpkg")
    res = run_on(target, hand_zones())
    con = gpkg_sql.connect(target, 1.0)  # with the SQL functions GDAL's R-tree triggers call
    con.execute("UPDATE assets SET asset_id = 'A-9' WHERE asset_id = 'A-2'")
    con.commit()
    con.close()
    with pytest.raises(OutputConflictError, match="asset layer changed") as err:
        m.merge_findings(res)
    assert err.value.exit_code == 5


def test_not_a_geopackage_is_refused(tmp_path: Path) -> None:
    target = owner_file(tmp_path / "o.gpkg")
    res = run_on(target, hand_zones())
    con = sqlite3.connect(target)
    con.execute("PRAGMA application_id = 0")
    con.commit()
    con.close()
    with pytest.raises(SiteFileError, match="application_id"):
        m.merge_findings(res)


# --- backups ------------------------------------------------------------------------------------

def test_backup_names_and_retention(tmp_path: Path) -> None:
    target = owner_file(tmp_path / "o[1].gpkg")  # a glob character in the name
    t = dt.datetime(2026, 5, 4, 12, 0, 0, tzinfo=dt.timezone(dt.timedelta(hours=2)))
    assert m.backup_name(target, t).name == "o[1].before-overlay-20260504T100000Z.gpkg"  # UTC
    legacy = target.with_name("o[1].before-overlay.gpkg")
    legacy.write_bytes(b"x")
    made = [m.make_backup(target, 2, t + dt.timedelta(seconds=k)) for k in range(4)]
    twice = m.make_backup(target, 2, t + dt.timedelta(seconds=3))
    assert twice.name == "o[1].before-overlay-20260504T100003Z-2.gpkg"  # same second: a counter
    # the oldest (the legacy original) forever, then the newest two
    assert [p.name for p in m.backups_of(target)] == [legacy.name, made[3].name, twice.name]
    con = sqlite3.connect(twice)
    try:
        assert con.execute("SELECT count(*) FROM assets").fetchone()[0] == 2  # a whole copy
    finally:
        con.close()
    for p in m.backups_of(target)[1:]:
        p.unlink()
    m.make_backup(target, 0, t)
    last = m.make_backup(target, 0, t + dt.timedelta(seconds=9))
    assert [p.name for p in m.backups_of(target)] == [legacy.name, last.name]  # keep 0: the original and this one
    assert m.backups_of(tmp_path / "none.gpkg") == []


# --- who holds the lock -------------------------------------------------------------------------

def _hold(path: str, ready, done) -> None:
    con = sqlite3.connect(path)
    con.execute("BEGIN IMMEDIATE")  # SQLite's RESERVED lock: a POSIX lock on the file (fcntl)
    ready.set()
    done.wait(20)
    con.rollback()
    con.close()
    os._exit(0)


def test_the_lock_holder_is_named_and_the_merge_waits_then_refuses(tmp_path: Path) -> None:
    target = owner_file(tmp_path / "o.gpkg")
    res = run_on(target, hand_zones())
    assert m.lock_holder(target) is None
    fork = multiprocessing.get_context("fork")
    ready, done = fork.Event(), fork.Event()
    child = fork.Process(target=_hold, args=(str(target), ready, done))
    child.start()
    try:
        assert ready.wait(20)
        comm = Path(f"/proc/{child.pid}/comm").read_text().strip()
        assert m.lock_holder(target) == f"process {child.pid} ({comm})"  # proc(5): /proc/locks
        before = target.read_bytes()
        with pytest.raises(OutputConflictError, match=f"locked by process {child.pid}.*waited 0.2 s") as err:
            m.merge_findings(res, wait_s=0.2)
        assert err.value.exit_code == 5 and target.read_bytes() == before
    finally:
        done.set()
        child.join(20)
    assert m.lock_holder(target) is None
    con = sqlite3.connect(target)
    con.execute("BEGIN IMMEDIATE")
    try:
        assert m.lock_holder(target) is None  # our own process is not "another program"
    finally:
        con.rollback()
        con.close()
    assert m.lock_holder(tmp_path / "missing.gpkg") is None


def test_other_scans_rows_are_kept_when_one_scan_is_rerun(tmp_path: Path) -> None:
    target = owner_file(tmp_path / "o.gpkg")
    m.merge_findings(run_on(target, hand_zones()))
    only_s2 = run_on(target, [z for z in hand_zones() if z.scan_id == "s2"], scans=("s2",))
    s = m.merge_findings(only_s2)
    assert (s.added, s.replaced, s.kept) == (1, 1, 3)  # s1's two rows and the other inspection's row stay
    assert [(r["source"], r["zone_id"]) for r in read_rows(target)] == [
        ("hammer survey", "h1"), ("overlay", "s1-L-1"), ("overlay", "s1-L-1"), ("overlay", "s2-L-1")]


def test_many_earlier_rows_are_all_replaced(tmp_path: Path) -> None:
    target = owner_file(tmp_path / "o.gpkg")
    m.merge_findings(run_on(target, hand_zones()))
    con = gpkg_sql.connect(target, 1.0)
    con.executemany("INSERT INTO acoustic_findings (source, scan_id, zone_id, asset_id) VALUES ('overlay', 's1', ?, "
                    "'A-1')", [(f"old-{k}",) for k in range(1200)])  # more than one DELETE's 500 ids
    con.commit()
    con.close()
    s = m.merge_findings(run_on(target, hand_zones()), replace_findings=True)
    assert (s.added, s.replaced, s.kept) == (3, 1203, 1)
    assert len(read_rows(target)) == 4


def test_a_file_that_fails_sqlites_checks_is_not_merged(tmp_path: Path) -> None:
    target = owner_file(tmp_path / "o.gpkg")
    con = sqlite3.connect(target)  # foreign keys off: the broken reference goes in unchecked
    con.execute("INSERT INTO gpkg_geometry_columns VALUES ('no_such_table', 'geom', 'POLYGON', 4326, 0, 0)")
    con.commit()
    con.close()
    before = target.read_bytes()
    with pytest.raises(OutputConflictError, match="failed SQLite's checks") as err:
        m.merge_findings(run_on(target, hand_zones(), backup=False))
    assert err.value.exit_code == 5 and target.read_bytes() == before and str(target) in str(err.value)


def test_a_late_rollback_after_the_commit_keeps_the_backup(tmp_path: Path) -> None:
    target = owner_file(tmp_path / "o.gpkg")
    pending = m.prepare_merge(run_on(target, hand_zones()))
    summary = pending.commit()
    pending.rollback()
    assert summary.backup.exists() and len(read_rows(target)) == 4


def test_the_backup_stamp_is_utc_whatever_the_local_zone(tmp_path: Path, monkeypatch) -> None:
    import time

    monkeypatch.setenv("TZ", "Asia/Tokyo")
    time.tzset()
    try:
        t = dt.datetime(2026, 5, 4, 12, 0, 0, tzinfo=dt.timezone(dt.timedelta(hours=2)))
        assert m.backup_name(tmp_path / "o.gpkg", t).name == "o.before-overlay-20260504T100000Z.gpkg"
    finally:
        monkeypatch.delenv("TZ")
        time.tzset()


def test_backups_made_in_one_second_are_ordered_by_their_counter(tmp_path: Path) -> None:
    target = owner_file(tmp_path / "o.gpkg")
    t = dt.datetime(2026, 5, 4, 10, 0, 0, tzinfo=dt.timezone.utc)
    names = [m.make_backup(target, 5, t).name for _ in range(3)]
    assert names == ["o.before-overlay-20260504T100000Z.gpkg", "o.before-overlay-20260504T100000Z-2.gpkg",
                     "o.before-overlay-20260504T100000Z-3.gpkg"]
    assert [p.name for p in m.backups_of(target)] == names
    assert m._made(Path("a.before-overlay-b.before-overlay-20260504T100003Z-12.gpkg")) == ("20260504T100003Z", 12)
    assert m._made(Path("a.before-overlay-20260504T100003Z.gpkg")) == ("20260504T100003Z", 1)


LOCKS = [  # /proc/locks as proc(5) shows it: id, kind, mode, access, pid, major:minor:inode (hex device), range
    "1: FLOCK  ADVISORY  WRITE 4242 08:1f:77 0 EOF",
    "2: OFDLCK ADVISORY  WRITE -1 08:1f:77 0 EOF",
    "3: POSIX  ADVISORY  WRITE 555 08:1f:66 0 EOF",  # another file
    "4: POSIX  ADVISORY  WRITE 7 08:1f:77 1073741824 1073741824",  # ours, by this process
    "5: POSIX  ADVISORY  WRITE 31337 zz:1f:77 0 EOF",  # unreadable device
    "6: POSIX",
    "7: POSIX  ADVISORY  WRITE 4711 08:1f:77 1073741825 1073742335",
]


def test_the_locking_process_is_read_off_proc_locks() -> None:
    ours = {(os.makedev(8, 31), 77)}
    assert m.locking_pid(LOCKS, ours, me=7) == 4711
    assert m.locking_pid(LOCKS, {(os.makedev(8, 31), 66)}, me=7) == 555
    assert m.locking_pid(LOCKS[:4], ours, me=7) is None  # flock(2), an open file description's lock, our own
    assert m.locking_pid(LOCKS, {(os.makedev(8, 1), 77)}, me=7) is None  # minor 0x1f is 31, not 1 or 0x1
    assert m.locking_pid(["1: POSIX  ADVISORY  WRITE 99 08:1f:77"], ours, me=7) == 99  # six fields suffice
    assert m.locking_pid(["1: OFDLCK ADVISORY  WRITE 99 08:1f:77 0 EOF"], ours, me=7) == 99
    assert m.locking_pid(["1: POSIX  ADVISORY  WRITE 1 08:1f:77 0 EOF"], ours, me=7) == 1


def test_a_lock_without_a_named_holder_is_refused_too(tmp_path: Path) -> None:
    target = owner_file(tmp_path / "o.gpkg")
    res = run_on(target, hand_zones())
    con = sqlite3.connect(target)
    con.execute("BEGIN IMMEDIATE")  # this process: lock_holder names no other
    try:
        with pytest.raises(OutputConflictError, match="locked by another program") as err:
            m.merge_findings(res, wait_s=0.1)
    finally:
        con.rollback()
        con.close()
    assert err.value.exit_code == 5


def test_the_findings_layer_may_not_be_the_asset_layer(tmp_path: Path) -> None:
    import dataclasses

    target = owner_file(tmp_path / "o.gpkg")
    res = run_on(target, hand_zones())
    res.site = dataclasses.replace(res.site, merge=MergeSpec(findings_layer="Assets"))
    with pytest.raises(SiteFileError, match="is the asset layer") as err:
        m.prepare_merge(res)
    assert str(res.site.path) in str(err.value)


def test_only_the_targets_stale_parts_are_cleared(tmp_path: Path) -> None:
    target = owner_file(tmp_path / "o.gpkg")
    dead = 99_999_999  # above any pid_max: no such process
    ours = tmp_path / f".o.gpkg.{dead}.abcd1234.backup.part.gpkg"
    theirs = tmp_path / f".drawing.dxf.{dead}.abcd1234.part.dxf"
    for p in (ours, theirs):
        p.write_bytes(b"left by a killed run")
    m.merge_findings(run_on(target, hand_zones(), backup=False))
    assert not ours.exists() and theirs.exists()


def test_a_database_register_goes_to_the_database_merge_with_the_same_arguments(tmp_path: Path, monkeypatch) -> None:
    import dataclasses

    from overlay.assets import merge_postgis

    res = run_on(owner_file(tmp_path / "o.gpkg"), hand_zones())
    res.site = dataclasses.replace(res.site, elements=Elements(source=None, database="service=assets"))
    seen = []
    monkeypatch.setattr(merge_postgis, "prepare_merge_postgis", lambda *a, **k: seen.append((a, k)) or "pending")
    assert m.prepare_merge(res, replace_findings=True, wait_s=2.5) == "pending"
    assert m.prepare_merge(res) == "pending"
    assert seen == [((res,), {"replace_findings": True, "wait_s": 2.5}),
                    ((res,), {"replace_findings": False, "wait_s": None})]
