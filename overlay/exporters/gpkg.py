"""GeoPackage exporter: zones, points, scan extents and targets in the map CRS, plus a runs table.

Written through pyogrio (GDAL) as GeoPackage 1.3.  Without a map frame in the
site file, geometries stay in drawing coordinates (metres) with no CRS.
"""

from __future__ import annotations

import json
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
            "fit_tolerance": result.site.tolerance,
            "fit_passed": int(s.fit_passed),
            "fit_override": int(result.site.accept_misfit and not s.fit_passed),
            "settings": json.dumps(result.settings(), sort_keys=True),
            "cautions": " ".join(CAUTIONS),
        })
    return pd.DataFrame(rows)
