"""GeoPackage exporter: zones, points, scan extents and targets in the map CRS, plus a runs table.

Written through pyogrio (GDAL) as GeoPackage 1.3.  Without a map frame in the
site file, geometries stay in drawing coordinates (metres) with no CRS.
"""

from __future__ import annotations

import json
import sqlite3
import warnings
from pathlib import Path
from typing import TYPE_CHECKING, Any

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import shapely
from shapely.geometry import MultiPolygon, Point

from ..cautions import CAUTIONS
from ..zones import ZONE_FIELDS

if TYPE_CHECKING:
    from ..pipeline import RunResult

GPKG_OPTIONS = {"VERSION": "1.3"}


def to_output_frame(result: "RunResult") -> tuple[Any, Any]:
    """(transform of drawing geometry into the output frame, CRS or None)."""
    u = result.unit_m
    if result.to_map is not None:
        return result.to_map.apply_geometry, result.crs
    return (lambda g: shapely.transform(g, lambda xy: xy * u)), None


class GeoPackageExporter:
    name = "gpkg"
    suffix = ".gpkg"
    description = "layers zones, defect_outlines, repair_footprints, points, scan_extents, targets, table runs (GeoPackage 1.3)"

    def write(self, result: "RunResult", path: Path) -> None:
        move, crs = to_output_frame(result)
        zones = result.zones
        zrec = pd.DataFrame([z.record() for z in zones]) if zones else pd.DataFrame(columns=list(ZONE_FIELDS))
        zgeom = [MultiPolygon([move(z.contour)]) for z in zones]
        layers: list[tuple[str, gpd.GeoDataFrame, str]] = [
            ("zones", gpd.GeoDataFrame(zrec, geometry=gpd.GeoSeries(zgeom, crs=crs), crs=crs), "MultiPolygon"),
            ("points", _points(result, move, crs), "Point"),
            ("defect_outlines", _defects(result, move, crs, "defect"), "Polygon"),
            ("repair_footprints", _defects(result, move, crs, "footprint"), "Polygon"),
            ("scan_extents", _extents(result, move, crs), "Polygon"),
            ("targets", _targets(result, move, crs), "Point"),
        ]
        with warnings.catch_warnings():
            # without a map frame the layers are in drawing metres with no CRS, on purpose
            warnings.filterwarnings("ignore", message="'crs' was not provided")
            for name, frame, gtype in layers:
                pyogrio.write_dataframe(
                    frame, path, layer=name, driver="GPKG", geometry_type=gtype, promote_to_multi=False,
                    dataset_options=GPKG_OPTIONS if name == "zones" else None,
                )
            pyogrio.write_dataframe(_runs(result), path, layer="runs", driver="GPKG")
        describe_columns(path, FIELD_DOCS)


def _points(result: "RunResult", move: Any, crs: Any) -> gpd.GeoDataFrame:
    frames = []
    for s in result.scans:
        xy = shapely.get_coordinates(move(shapely.points(s.point_xy)))
        frames.append(pd.DataFrame({
            "point_id": s.point_ids.astype(str),
            "scan_id": s.scan_id,
            "ver_db": s.ver_db,
            "peak_hz": s.peak_hz,
            "energy": s.energy,
            "snr_db": s.snr_db,
            "incidence_deg": s.incidence_deg,
            "valid": s.valid.astype(np.int16),
            "invalid_reason": s.invalid_reason.astype(str),
            "x": xy[:, 0],
            "y": xy[:, 1],
        }))
    df = pd.concat(frames, ignore_index=True)
    for col in ("ver_db", "peak_hz", "energy", "snr_db", "incidence_deg"):
        df[col] = df[col].where(np.isfinite(df[col]), np.nan)
    geom = gpd.points_from_xy(df.pop("x"), df.pop("y"), crs=crs)
    return gpd.GeoDataFrame(df, geometry=geom, crs=crs)


FIELD_DOCS: dict[str, dict[str, str]] = {
    "zones": {
        "zone_id": "scan id . class . number, stable across runs",
        "class": "class name; classes are nested, do not add their areas",
        "threshold_db": "class level of vibration energy ratio, dB",
        "defect_id": "zone of the lowest class whose defect outline this zone shares",
        "area_m2": "area of the class contour, surface m2",
        "area_low_m2": "contour shrunk by half a grid spacing, m2",
        "area_high_m2": "contour grown by half a grid spacing, m2",
        "outline_area_m2": "estimated defect outline (plate mode-shape model), m2",
        "peak_hz": "peak frequency of the zone's averaged spectrum, Hz",
        "peak_spread": "interquartile range over median of per-point peak frequencies",
        "depth_low_m": "cover thickness, clamped-edge plate: order of magnitude only",
        "depth_high_m": "cover thickness, simply supported plate: order of magnitude only",
        "footprint_area_m2": "repair rectangle: outline grown by the cutting margin, m2",
        "volume_low_m3": "footprint area x depth_low_m",
        "volume_high_m3": "footprint area x depth_high_m",
        "confidence": "support x contrast x coherence x quality, 0-1 (docs/zones.md)",
        "station_m": "station of the centroid along the site alignment, m",
        "offset_m": "offset of the centroid from the alignment, left positive, m",
    },
    "points": {
        "ver_db": "vibration energy ratio against the scan's reference, dB",
        "energy": "band mean-square velocity normal to the surface, (m/s)2",
        "snr_db": "in-band peak over the noise floor (median of every second band bin), dB",
        "incidence_deg": "angle of the laser beam to the surface normal",
        "invalid_reason": "why the point is not used (empty when valid)",
    },
}


def describe_columns(path: Path, docs: dict[str, dict[str, str]]) -> None:
    """Field descriptions in gpkg_data_columns (the GeoPackage schema extension), read by QGIS and others."""
    con = sqlite3.connect(path)
    try:
        with con:
            con.execute(
                "CREATE TABLE IF NOT EXISTS gpkg_data_columns (table_name TEXT NOT NULL, column_name TEXT NOT NULL, "
                "name TEXT, title TEXT, description TEXT, mime_type TEXT, constraint_name TEXT, "
                "CONSTRAINT pk_gdc PRIMARY KEY (table_name, column_name), "
                "CONSTRAINT gdc_tn UNIQUE (table_name, name))")
            con.execute(
                "CREATE TABLE IF NOT EXISTS gpkg_extensions (table_name TEXT, column_name TEXT, extension_name TEXT NOT NULL, "
                "definition TEXT NOT NULL, scope TEXT NOT NULL, "
                "CONSTRAINT ge_tce UNIQUE (table_name, column_name, extension_name))")
            con.execute("INSERT OR IGNORE INTO gpkg_extensions VALUES ('gpkg_data_columns', NULL, 'gpkg_schema', "
                        "'http://www.geopackage.org/spec/#extension_schema', 'read-write')")
            for table, cols in docs.items():
                present = {r[1] for r in con.execute(f'PRAGMA table_info("{table}")')}
                for col, text in cols.items():
                    if col in present:
                        con.execute("INSERT OR REPLACE INTO gpkg_data_columns (table_name, column_name, name, title, "
                                    "description) VALUES (?, ?, ?, ?, ?)", (table, col, col, col, text))
    finally:
        con.close()


def _defects(result: "RunResult", move: Any, crs: Any, which: str) -> gpd.GeoDataFrame:
    """One row per defect (its lowest-class zone): the estimated outline or the repair footprint."""
    rows, geoms = [], []
    for z in result.zones:
        if z.defect_id != z.zone_id:
            continue
        rows.append({"defect_id": z.defect_id, "scan_id": z.scan_id, "element": z.element,
                     "outline_area_m2": z.outline_area_m2, "footprint_area_m2": z.footprint_area_m2,
                     "footprint_length_m": z.footprint_length_m, "footprint_width_m": z.footprint_width_m,
                     "depth_low_m": z.depth_low_m, "depth_high_m": z.depth_high_m})
        geoms.append(move(getattr(z, which)))
    if not rows:
        return gpd.GeoDataFrame({"defect_id": []}, geometry=gpd.GeoSeries([], crs=crs), crs=crs)
    return gpd.GeoDataFrame(rows, geometry=geoms, crs=crs)


def _extents(result: "RunResult", move: Any, crs: Any) -> gpd.GeoDataFrame:
    rows = [{"scan_id": s.scan_id, "element": s.element, "surveyed": s.surveyed, "n_points": s.n_points,
             "n_valid": int(s.valid.sum()), "spacing_m": s.spacing_m} for s in result.scans]
    return gpd.GeoDataFrame(rows, geometry=[move(s.extent) for s in result.scans], crs=crs)


def _targets(result: "RunResult", move: Any, crs: Any) -> gpd.GeoDataFrame:
    u = result.unit_m
    rows, geom = [], []
    for s in result.scans:
        for t in s.targets:
            rows.append({"scan_id": s.scan_id, "name": t.name, "scanner_x": t.scanner[0], "scanner_y": t.scanner[1],
                         "drawing_x": t.drawing[0], "drawing_y": t.drawing[1],
                         "residual_m": float(np.hypot(*t.residual)) * u,
                         "leave_one_out_m": t.loo * u, "fit_model": s.fit.model, "fit_passed": int(s.fit_passed)})
            geom.append(move(Point(t.drawing)))
    if not rows:
        return gpd.GeoDataFrame({"scan_id": [], "name": []}, geometry=gpd.GeoSeries([], crs=crs), crs=crs)
    return gpd.GeoDataFrame(rows, geometry=geom, crs=crs)


def _runs(result: "RunResult") -> pd.DataFrame:
    rows = []
    for s in result.scans:
        rows.append({
            "run_started": result.started,
            "tool_version": result.tool_version,
            "site": result.site.name,
            "structure": result.site.structure,
            "scan_id": s.scan_id,
            "payload": s.payload,
            "gate": s.gate.describe() if s.gate else "",
            "reference_method": s.reference.method if s.reference else "given ver_db",
            "reference_energy": s.reference.energy if s.reference else np.nan,
            "reference_detail": s.reference.describe() if s.reference else "",
            "incidence": s.incidence,
            "fit_model": s.fit.model,
            "fit_frame": s.fit_describe,
            "fit_params": json.dumps(s.fit.transform.params()),
            "fit_rms": s.fit.rms,
            "fit_max": s.fit.worst[1],
            "fit_tolerance_m": result.site.tolerance_m,
            "fit_passed": int(s.fit_passed),
            "fit_override": int(result.site.accept_misfit and not s.fit_passed),
            "settings": json.dumps(result.settings(), sort_keys=True),
            "cautions": " ".join(CAUTIONS),
        })
    return pd.DataFrame(rows)
