"""Merging findings into the owner's asset GeoPackage: inside the file's own SQLite transaction,
idempotent, others' rows and edits kept, WAL files, races, kill -9, refusals, backups.

Outside references: SQLite's documentation "Atomic Commit In SQLite" and "Write-Ahead Logging"
(a committed transaction survives, an interrupted one is rolled back on the next open; a WAL
reader's committed edit is part of the database), and `PRAGMA integrity_check` as SQLite's own
verdict on the file.
"""

from __future__ import annotations

import dataclasses
import multiprocessing
import os
import random
import shutil
import signal
import sqlite3
import time
from pathlib import Path

import geopandas as gpd
import numpy as np
import pyogrio
import pytest
import shapely
import shapely.affinity

import overlay.assets.gpkg_sql as gpkg_sql
from overlay.assets.elements import ElementLayer, split_by_assets
from overlay.assets.merge import (
    backups_of,
    findings_rows,
    merge_findings,
    prepare_merge,
)
from overlay.errors import OutputConflictError, RegistrationError, SiteFileError

from .merging import merge_child, race, subset

FORK = multiprocessing.get_context("fork")


@pytest.fixture
def owner(demo: dict, tmp_path: Path):
    """A private copy of the demo's asset GeoPackage with one foreign finding in it, and the result pointing at it."""
    target = tmp_path / "owner" / "assets.gpkg"
    target.parent.mkdir()
    shutil.copy2(demo["root"] / "site" / "assets.gpkg", target)
    foreign = gpd.GeoDataFrame(
        {"asset_id": ["KLO2-S2-B2"], "source": ["sounding-2025"], "scan_id": ["hammer-7"], "zone_id": ["h7"]},
        geometry=[shapely.box(512360, 5712480, 512361, 5712481)], crs=25832)
    pyogrio.write_dataframe(foreign, target, layer="acoustic_findings", promote_to_multi=True)
    return target, point_at(demo["result"], target)


def point_at(result, target: Path):
    site = dataclasses.replace(result.site, elements=dataclasses.replace(result.site.elements, source=target))
    return dataclasses.replace(result, site=site)


def findings(path: Path) -> list[tuple]:
    """The findings table's rows (without fid) in a stable order, geometry blob included."""
    con = sqlite3.connect(path)
    try:
        cols = [r[1] for r in con.execute('PRAGMA table_info("acoustic_findings")') if r[1] != "fid"]
        rows = con.execute(f"SELECT {', '.join(cols)} FROM acoustic_findings").fetchall()
    finally:
        con.close()
    return sorted(rows, key=repr)


def integrity(path: Path) -> str:
    con = sqlite3.connect(path)
    try:
        return con.execute("PRAGMA integrity_check").fetchone()[0]
    finally:
        con.close()


def extra_files(folder: Path, target: Path) -> list[str]:
    """Files in the owner's folder besides the GeoPackage and its backups."""
    keep = {target.name} | {b.name for b in backups_of(target)}
    return sorted(p.name for p in folder.iterdir() if p.name not in keep)


def test_idempotent_over_three_runs_and_other_rows_untouched(owner) -> None:
    target, result = owner
    panels_before = pyogrio.read_dataframe(target, layer="deck_panels")
    first = merge_findings(result)
    assert first.added == len(findings_rows(result)[0]) > 0 and first.kept == 1 and first.replaced == 0
    a = findings(target)
    for _ in range(2):
        again = merge_findings(result)
        assert again.replaced == first.added and again.kept == 1
    assert findings(target) == a  # identical rows, geometry blobs included
    rows = pyogrio.read_dataframe(target, layer="acoustic_findings")
    assert (rows["scan_id"] == "hammer-7").sum() == 1  # the other inspection's row is still there, once
    panels_after = pyogrio.read_dataframe(target, layer="deck_panels")
    assert panels_after.drop(columns="geometry").equals(panels_before.drop(columns="geometry"))
    assert panels_after.geometry.equals(panels_before.geometry)
    assert first.backup is not None and first.backup.exists()
    assert integrity(target) == "ok"


def test_findings_read_back_by_gdal_with_the_spatial_index(owner) -> None:
    # our rows are written by plain SQL: GDAL (an independent GeoPackage implementation) must read them,
    # and a spatial filter must find them through the R-tree the file's triggers keep
    target, result = owner
    merge_findings(result)
    frame = pyogrio.read_dataframe(target, layer="acoustic_findings")
    ours = frame[frame["source"] == "overlay"]
    rows, geoms = findings_rows(result)
    assert len(ours) == len(rows)
    assert ours.geometry.area.sum() == pytest.approx(sum(g.area for g in geoms), rel=1e-9)
    x0, y0, x1, y1 = ours.geometry.iloc[0].bounds
    hit = pyogrio.read_dataframe(target, layer="acoustic_findings", bbox=(x0, y0, x1, y1))
    assert ours.iloc[0]["zone_id"] in set(hit["zone_id"])
    con = sqlite3.connect(target)
    n_index = con.execute("SELECT count(*) FROM rtree_acoustic_findings_geom").fetchone()[0]
    con.close()
    assert n_index == len(frame)


def test_new_findings_table_is_created_with_its_index(demo: dict, tmp_path: Path) -> None:
    target = tmp_path / "assets.gpkg"
    shutil.copy2(demo["root"] / "site" / "assets.gpkg", target)
    result = point_at(demo["result"], target)
    summary = merge_findings(result)
    assert summary.created and summary.added == len(findings_rows(result)[0])
    con = sqlite3.connect(target)
    names = {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type = 'trigger'")}
    ext = con.execute("SELECT extension_name FROM gpkg_extensions WHERE table_name = 'acoustic_findings'").fetchall()
    con.close()
    assert {"rtree_acoustic_findings_geom_insert", "rtree_acoustic_findings_geom_delete"} <= names
    assert ext == [("gpkg_rtree_index",)]
    assert len(pyogrio.read_dataframe(target, layer="acoustic_findings")) == summary.added


def test_failure_midway_leaves_the_file_byte_identical(owner, monkeypatch) -> None:
    target, result = owner
    before = target.read_bytes()

    def broken(*args, **kwargs):
        raise RuntimeError("disk full (injected)")

    monkeypatch.setattr(gpkg_sql, "insert_features", broken)
    with pytest.raises(RuntimeError, match="injected"):
        merge_findings(result)
    assert target.read_bytes() == before
    assert extra_files(target.parent, target) == []  # no journal, no temporary, no backup of a merge that failed


def test_locked_file_is_refused_with_exit_5(owner) -> None:
    target, result = owner
    before = target.read_bytes()
    con = sqlite3.connect(target, isolation_level=None)
    con.execute("BEGIN EXCLUSIVE")
    try:
        with pytest.raises(OutputConflictError, match="locked") as info:
            merge_findings(result, wait_s=0.2)
        assert info.value.exit_code == 5
    finally:
        con.execute("ROLLBACK")
        con.close()
    assert target.read_bytes() == before


def test_wal_file_with_another_programs_edit_keeps_both(owner) -> None:
    # SQLite "Write-Ahead Logging": a committed transaction may live only in the -wal file while the
    # writer keeps the database open; it is part of the database for every other connection
    target, result = owner
    gis = gpkg_sql.connect(target, 1.0)  # a GIS registers the standard's trigger functions, as we do
    assert gis.execute("PRAGMA journal_mode = wal").fetchone()[0] == "wal"
    gis.execute("PRAGMA wal_autocheckpoint = 0")
    gis.execute("UPDATE deck_panels SET element_type = 'edited in a GIS' WHERE asset_id = 'KLO2-S1-B1'")
    assert Path(f"{target}-wal").stat().st_size > 0  # the edit is in the WAL, not in the main file
    try:
        summary = merge_findings(result)
        edited = gis.execute("SELECT element_type FROM deck_panels WHERE asset_id = 'KLO2-S1-B1'").fetchone()[0]
        n_ours = gis.execute("SELECT count(*) FROM acoustic_findings WHERE source = 'overlay'").fetchone()[0]
    finally:
        gis.close()
    assert edited == "edited in a GIS" and n_ours == summary.added > 0
    con = sqlite3.connect(target)
    assert con.execute("PRAGMA journal_mode").fetchone()[0] == "wal"  # the file keeps its mode
    assert con.execute("SELECT element_type FROM deck_panels WHERE asset_id = 'KLO2-S1-B1'").fetchone()[0] == "edited in a GIS"
    con.close()
    assert integrity(target) == "ok"
    backup = sqlite3.connect(summary.backup)
    assert backup.execute("SELECT element_type FROM deck_panels WHERE asset_id = 'KLO2-S1-B1'").fetchone()[0] == \
        "edited in a GIS"  # the backup API copies the WAL content too
    backup.close()


def test_two_merges_racing_lose_nothing(owner) -> None:
    target, result = owner
    a, b = subset(result, {"S-101", "S-106", "S-102"}), subset(result, {"S-103", "S-104", "S-105"})
    assert a.asset_pieces and b.asset_pieces
    pristine = target.read_bytes()
    rng = random.Random(7)
    refusals = 0
    for trial in range(20):
        target.write_bytes(pristine)
        for extra in target.parent.glob("assets.before-overlay*"):
            extra.unlink()
        wait = 10.0 if trial % 2 == 0 else 0.0  # half the trials wait for the lock, half refuse at once
        outcome = race((a, b), wait, rng)
        con = sqlite3.connect(target)
        rows = set(con.execute("SELECT asset_id, scan_id FROM acoustic_findings").fetchall())
        con.close()
        for (kind, value), r in zip(outcome, (a, b)):
            assert kind in ("ok", "refused"), value
            mine = {(p["asset_id"], p["scan_id"]) for p in r.asset_pieces}
            if kind == "ok":
                assert mine <= rows, f"trial {trial}: a merge that said done lost its rows"
            else:
                assert value == 5 and not (mine & rows)
                refusals += 1
        assert ("KLO2-S2-B2", "hammer-7") in rows and integrity(target) == "ok"
    assert refusals < 20  # at least some trials merged both


def test_kill_9_during_a_merge_leaves_the_file_before_or_after(owner, tmp_path: Path) -> None:
    # "Atomic Commit In SQLite": after a crash the hot journal is rolled back on the next open
    target, result = owner
    pristine = target.read_bytes()
    done = tmp_path / "done.gpkg"
    shutil.copy2(target, done)
    merge_findings(point_at(result, done))
    before, after = findings(target), findings(done)
    parent, child = FORK.Pipe()
    t0 = time.perf_counter()
    p = FORK.Process(target=merge_child, args=(point_at(result, done), 10.0, child))
    p.start()
    assert parent.recv()[0] == "ok"
    duration = time.perf_counter() - t0  # a whole merge in a child process, fork included
    p.join(10)
    rng = random.Random(3)
    seen = {"before": 0, "after": 0}
    for trial in range(24):
        target.write_bytes(pristine)
        for extra in target.parent.iterdir():
            if extra != target:
                extra.unlink()
        parent, child = FORK.Pipe()
        p = FORK.Process(target=merge_child, args=(result, 10.0, child))
        p.start()
        time.sleep(rng.uniform(0.3 * duration, 1.3 * duration))
        os.kill(p.pid, signal.SIGKILL)
        p.join(10)
        assert integrity(target) == "ok"  # opening rolls a hot journal back
        now = findings(target)
        assert now in (before, after), f"trial {trial}: a half-merged file"
        seen["before" if now == before else "after"] += 1
        leftovers = extra_files(target.parent, target)  # our temporary backup copy, or SQLite's own journal
        assert all((n.startswith(".assets.gpkg.") and ".part" in n) or n == "assets.gpkg-journal" for n in leftovers), \
            leftovers
        merge_findings(point_at(result, target))  # the next run cleans a killed run's temporary files
        assert extra_files(target.parent, target) == []
    assert seen["before"] and seen["after"], seen  # the kills landed on both sides of the commit


def test_findings_layer_that_is_not_ours_is_refused(owner) -> None:
    target, result = owner
    before = target.read_bytes()
    for name, pattern in (("deck_panels", "is the asset layer"), ("gpkg_contents", "reserved"),
                          ("rtree_deck_panels_geom", "reserved"), ("sqlite_sequence", "reserved")):
        bad = dataclasses.replace(result.site.merge, findings_layer=name)
        with pytest.raises(SiteFileError, match=pattern):
            merge_findings(dataclasses.replace(result, site=dataclasses.replace(result.site, merge=bad)))
    # another owner layer (points, no findings fields) is not turned into findings
    pyogrio.write_dataframe(gpd.GeoDataFrame({"name": ["lamp"]}, geometry=[shapely.Point(512350, 5712470)], crs=25832),
                            target, layer="street_lamps")
    before = target.read_bytes()
    lamps = dataclasses.replace(result.site.merge, findings_layer="street_lamps")
    with pytest.raises(SiteFileError, match="no field 'source'") as info:
        merge_findings(dataclasses.replace(result, site=dataclasses.replace(result.site, merge=lamps)))
    assert info.value.exit_code == 3
    assert target.read_bytes() == before
    assert pyogrio.read_info(target, layer="street_lamps")["geometry_type"] == "Point"


def test_wrong_placement_removes_nothing(owner) -> None:
    # a valid CRS that puts the zones beside their assets (here: the placement 30 m off) would have
    # replaced the findings with none
    target, result = owner
    merge_findings(result)
    before = findings(target)
    off = dataclasses.replace(result, asset_pieces=[])
    with pytest.raises(RegistrationError, match="none of the .* zone"):
        merge_findings(off)
    pieces = [dict(p, asset_id="KLO2-S3-B3") if p["asset_id"] == "KLO2-S1-B2" else p for p in result.asset_pieces]
    with pytest.raises(RegistrationError, match="do not touch the asset they belong to"):
        merge_findings(dataclasses.replace(result, asset_pieces=pieces))
    assert findings(target) == before


def test_rerun_losing_findings_needs_replace(owner) -> None:
    target, result = owner
    merge_findings(result)
    before = findings(target)
    # a rerun of the same scans in which S-103's two defects are gone (higher thresholds, or a mistake)
    fewer = dataclasses.replace(result, mosaic=[z for z in result.zones if z.scan_id != "S-103"],
                                asset_pieces=[p for p in result.asset_pieces if p["scan_id"] != "S-103"])
    with pytest.raises(OutputConflictError, match="would remove 2 earlier finding.* of scan S-103 and add 0") as info:
        merge_findings(fewer)
    assert info.value.exit_code == 5 and findings(target) == before
    done = merge_findings(fewer, replace_findings=True)
    assert done.replaced == len(findings_rows(result)[0]) and done.added == len(findings_rows(fewer)[0])


def test_asset_layer_edited_during_the_run_is_refused(owner) -> None:
    target, result = owner
    con = gpkg_sql.connect(target, 1.0)
    blob = con.execute("SELECT geom FROM deck_panels WHERE asset_id = 'KLO2-S1-B2'").fetchone()[0]
    g = shapely.affinity.translate(gpkg_sql.parse_blob(blob), 0.5, 0.0)
    con.execute("UPDATE deck_panels SET geom = ? WHERE asset_id = 'KLO2-S1-B2'", (gpkg_sql.geometry_blob(g, 25832),))
    con.close()
    before = findings(target)
    with pytest.raises(OutputConflictError, match="asset layer changed"):
        merge_findings(result)
    assert findings(target) == before


def test_backups_keep_the_original_and_the_newest(owner) -> None:
    import datetime as dt

    target, result = owner
    original = findings(target)
    t = dt.datetime(2026, 5, 1, tzinfo=dt.timezone.utc)
    made = []
    for k in range(6):
        m = prepare_merge(result, now=t + dt.timedelta(minutes=k))
        made.append(m.summary.backup)
        m.commit()
    left = backups_of(target)
    assert left == [made[0], *made[-3:]]  # the original, then the newest three (KEEP_BACKUPS)
    assert findings(left[0]) == original  # the owner's file as it was before the tool first wrote


def test_splitting_by_assets_conserves_area(demo: dict) -> None:
    # cut the span-1 bay-2 panel in two at x = 4.2 m (drawing), through defect D1: its outline splits
    # into two pieces, one per half, whose areas add up to the outline area
    result = demo["result"]
    to_map = result.to_map
    left = to_map.apply_geometry(shapely.box(0.0, 3.8, 4.2, 6.4))
    right = to_map.apply_geometry(shapely.box(4.2, 3.8, 14.0, 6.4))
    layer = ElementLayer(["L", "R"], np.array([left, right], dtype=object), {"L": left.area, "R": right.area}, 1.0)
    zone = next(z for z in result.zones if "S-101.watch.01" in z.provenance.split(";"))
    pieces = split_by_assets([zone], "outline", to_map, layer)
    assert {p["asset_id"] for p in pieces} == {"L", "R"}
    assert sum(p["area_m2"] for p in pieces) == pytest.approx(zone.outline_area_m2, rel=1e-9)


def test_asset_rows_in_the_quantities(demo: dict) -> None:
    from overlay.quantities import asset_rows, element_rows

    rows = asset_rows(demo["result"])
    assert rows and all(r["row_kind"] == "asset_total" for r in rows)
    # the demo's zones lie inside their bays: per-asset rows equal the per-element rows, footprint and
    # volume included (each defect once, at its highest class)
    by_element = {(r["element"], r["class"]): r for r in element_rows(demo["result"])}
    assert {(r["element"], r["class"]) for r in rows} == set(by_element)
    for r in rows:
        e = by_element[(r["element"], r["class"])]
        assert r["n_defects"] == e["n_defects"]
        for col in ("affected_area_m2", "footprint_area_m2", "volume_low_m3", "volume_high_m3"):
            assert float(r[col]) == pytest.approx(float(e[col]), abs=1e-3), col
