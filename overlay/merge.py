"""Merge findings into the owner's asset GeoPackage, idempotently and all-or-nothing.

Each zone, cut by the assets it overlaps, becomes rows of a findings layer in
the owner's file, keyed by the scan: rerunning the same scans replaces their
own rows, never duplicates them; rows of other scans, other inspections and
every other layer stay as they were.  The work happens on a copy beside the
file; only when the copy is complete and passes SQLite's integrity check is
the original kept as a backup and the copy moved into its place.  A failure
anywhere leaves the owner's file byte for byte as it was.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import shutil
import sqlite3
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Iterator

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pyproj

from .errors import OutputConflictError, SiteFileError
from .frames import reproject

if TYPE_CHECKING:
    from .pipeline import RunResult

SOURCE = "overlay"


@dataclass(frozen=True)
class MergeSummary:
    target: Path
    layer: str
    added: int
    replaced: int
    kept: int
    backup: Path | None


def run_key(result: "RunResult") -> str:
    """A key for what produced the rows: tool version and the settings that shape zones (no clock time)."""
    text = json.dumps({"version": result.tool_version, "settings": result.settings()}, sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def findings_frame(result: "RunResult", crs: object) -> gpd.GeoDataFrame:
    """The rows this run contributes: one per (zone, asset) piece."""
    spec = result.site.merge
    assert spec is not None
    by_id = {z.zone_id: z for z in result.zones}
    key = run_key(result)
    rows = []
    for p in result.asset_pieces:
        z = by_id[p["zone_id"]]
        rows.append({
            "asset_id": p["asset_id"], "source": SOURCE, "scan_id": p["scan_id"], "zone_id": p["zone_id"],
            "defect_id": p["defect_id"], "class": p["class"], "threshold_db": z.threshold_db,
            "affected_area_m2": round(p["area_m2"], 6), "basis": result.site.basis,
            "peak_hz": z.peak_hz, "depth_low_m": z.depth_low_m, "depth_high_m": z.depth_high_m,
            "confidence": z.confidence, "inspected": z.surveyed, "method": spec.method, "run_key": key,
            "geometry": p["geometry"],
        })
    if not rows:
        return gpd.GeoDataFrame({"asset_id": [], "source": [], "scan_id": []}, geometry=gpd.GeoSeries([], crs=crs), crs=crs)
    return gpd.GeoDataFrame(rows, geometry="geometry", crs=crs)


@contextlib.contextmanager
def _write_lock(target: Path) -> Iterator[None]:
    """Hold SQLite's write lock on the owner's file for the whole merge; refuse if someone else holds it."""
    con = sqlite3.connect(target, timeout=0.0, isolation_level=None)
    try:
        try:
            con.execute("BEGIN IMMEDIATE")
        except sqlite3.OperationalError as exc:
            raise OutputConflictError(f"the GeoPackage is locked by another program ({exc}); close it and rerun",
                                      source=target) from exc
        yield
    finally:
        with contextlib.suppress(sqlite3.Error):
            con.execute("ROLLBACK")
        con.close()


def merge_findings(result: "RunResult") -> MergeSummary:
    """Write this run's findings into the owner's asset GeoPackage named by [elements] and [merge]."""
    site = result.site
    spec, elements = site.merge, site.elements
    assert spec is not None and elements is not None
    target = elements.source
    layer = spec.findings_layer
    if elements.layer == layer:
        raise SiteFileError(f"findings layer {layer!r} would overwrite the asset layer", source=site.path,
                            field="merge.findings_layer")
    scans = {s.scan_id for s in result.scans}
    with _write_lock(target):
        new = _in_asset_crs(findings_frame(result, result.crs), target, elements.layer)
        fd, tmp_name = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".merge.gpkg", dir=target.parent)
        os.close(fd)
        tmp = Path(tmp_name)
        try:
            shutil.copy2(target, tmp)
            layers = {row[0] for row in pyogrio.list_layers(tmp)}
            old = pyogrio.read_dataframe(tmp, layer=layer) if layer in layers else None
            if old is not None and len(old):
                # a row is this run's own when it came from us and from any scan of this run
                # (mosaic zones list several scans, "S-101;S-106")
                own_scan = old["scan_id"].fillna("").map(lambda v: bool(set(str(v).split(";")) & scans))
                mine = (old["source"] == SOURCE) & own_scan
                kept, replaced = old[~mine], int(mine.sum())
            else:
                kept, replaced = None, 0
            combined = new if kept is None or not len(kept) else gpd.GeoDataFrame(
                pd.concat([kept, new], ignore_index=True), geometry="geometry", crs=new.crs)
            pyogrio.write_dataframe(combined, tmp, layer=layer, driver="GPKG", promote_to_multi=True)
            _check(tmp)
            backup = None
            if spec.backup:
                backup = target.with_name(f"{target.stem}.before-overlay{target.suffix}")
                shutil.copy2(target, backup)
            os.replace(tmp, target)
        finally:
            with contextlib.suppress(FileNotFoundError):
                tmp.unlink()
    return MergeSummary(target, layer, len(new), replaced, 0 if kept is None else len(kept), backup)


def _in_asset_crs(frame: gpd.GeoDataFrame, target: Path, asset_layer: str | None) -> gpd.GeoDataFrame:
    """The findings in the CRS of the owner's asset layer, through our transformation check."""
    crs = pyogrio.read_info(target, layer=asset_layer).get("crs")
    if crs is None or frame.crs is None:
        return frame
    dst = pyproj.CRS.from_user_input(crs)
    if dst.equals(frame.crs) or frame.empty:
        return frame.set_crs(dst, allow_override=True)
    moved, _, _ = reproject(np.asarray(frame.geometry.values, dtype=object), frame.crs, dst, source=str(target))
    return gpd.GeoDataFrame(frame.drop(columns="geometry"), geometry=gpd.GeoSeries(moved, crs=dst), crs=dst)


def _check(path: Path) -> None:
    con = sqlite3.connect(path)
    try:
        ok = con.execute("PRAGMA integrity_check").fetchone()[0]
    finally:
        con.close()
    if ok != "ok":
        raise OutputConflictError(f"merged copy failed SQLite's integrity check ({ok}); the original is unchanged",
                                  source=path)
