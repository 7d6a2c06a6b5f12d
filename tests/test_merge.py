"""Merging findings into the owner's asset GeoPackage: idempotent, others untouched, all-or-nothing,
locked files refused, asset splitting conserves area."""

from __future__ import annotations

import shutil
import sqlite3
from pathlib import Path

import geopandas as gpd
import numpy as np
import pyogrio
import pytest
import shapely

import overlay.merge as merge_mod
from overlay.elements import ElementLayer, split_by_assets
from overlay.errors import OutputConflictError
from overlay.merge import merge_findings


@pytest.fixture
def owner(demo: dict, tmp_path: Path):
    """A private copy of the demo's asset GeoPackage with one foreign finding in it, and the result pointing at it."""
    import dataclasses

    target = tmp_path / "assets.gpkg"
    shutil.copy2(demo["root"] / "site" / "assets.gpkg", target)
    foreign = gpd.GeoDataFrame(
        {"asset_id": ["KLO2-S2-B2"], "source": ["sounding-2025"], "scan_id": ["hammer-7"], "zone_id": ["h7"]},
        geometry=[shapely.box(512360, 5712480, 512361, 5712481)], crs=25832)
    pyogrio.write_dataframe(foreign, target, layer="acoustic_findings", promote_to_multi=True)
    site = dataclasses.replace(demo["result"].site, elements=dataclasses.replace(demo["result"].site.elements, source=target))
    return target, dataclasses.replace(demo["result"], site=site)


def _rows(path: Path, layer: str = "acoustic_findings"):
    f = pyogrio.read_dataframe(path, layer=layer)
    return f.drop(columns="geometry").sort_values(list(f.columns.drop("geometry"))).reset_index(drop=True), f


def test_idempotent_over_three_runs_and_other_rows_untouched(owner) -> None:
    target, result = owner
    panels_before = pyogrio.read_dataframe(target, layer="deck_panels")
    first = merge_findings(result)
    assert first.added == len(result.asset_pieces) > 0 and first.kept == 1 and first.replaced == 0
    a, fa = _rows(target)
    for _ in range(2):
        again = merge_findings(result)
        assert again.replaced == first.added and again.kept == 1
    b, fb = _rows(target)
    assert len(b) == len(a) == first.added + 1
    assert a.equals(b)
    assert np.allclose(sorted(fa.geometry.area), sorted(fb.geometry.area))
    assert (b["scan_id"] == "hammer-7").sum() == 1  # the other inspection's row is still there, once
    panels_after = pyogrio.read_dataframe(target, layer="deck_panels")
    assert panels_after.drop(columns="geometry").equals(panels_before.drop(columns="geometry"))
    assert panels_after.geometry.equals(panels_before.geometry)
    assert first.backup is not None and first.backup.exists()
    con = sqlite3.connect(target)
    assert con.execute("pragma integrity_check").fetchone()[0] == "ok"
    con.close()


def test_failure_midway_leaves_the_file_byte_identical(owner, monkeypatch) -> None:
    target, result = owner
    before = target.read_bytes()

    def broken(*args, **kwargs):
        raise RuntimeError("disk full (injected)")

    monkeypatch.setattr(merge_mod.pyogrio, "write_dataframe", broken)
    with pytest.raises(RuntimeError, match="injected"):
        merge_findings(result)
    assert target.read_bytes() == before
    assert [p.name for p in target.parent.iterdir() if p.name.startswith(".")] == []  # no temporary left


def test_locked_file_is_refused_with_exit_5(owner) -> None:
    target, result = owner
    before = target.read_bytes()
    con = sqlite3.connect(target, isolation_level=None)
    con.execute("BEGIN EXCLUSIVE")
    try:
        with pytest.raises(OutputConflictError, match="locked by another program") as info:
            merge_findings(result)
        assert info.value.exit_code == 5
    finally:
        con.execute("ROLLBACK")
        con.close()
    assert target.read_bytes() == before


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
    from overlay.exporters.quantities_csv import asset_rows

    rows = asset_rows(demo["result"])
    assert rows and all(r["row_kind"] == "asset_total" for r in rows)
    watch = {r["element"]: r for r in rows if r["class"] == "watch"}
    # the demo's zones lie inside their bays: per-asset areas equal the per-element totals
    z = [x for x in demo["result"].zones if x.element == "KLO2-S2-B1" and x.class_name == "watch"]
    assert float(watch["KLO2-S2-B1"]["affected_area_m2"]) == pytest.approx(sum(x.outline_area_m2 for x in z), abs=1e-3)
