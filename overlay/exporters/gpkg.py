"""GeoPackage exporter: zones, points, scan extents and targets in the map CRS, plus a runs table.

Written through pyogrio (GDAL) as GeoPackage 1.3, the version the GIS of long-term
distributions reads without a warning; dates are DATETIME (UTC) and flags BOOLEAN.
Field titles and descriptions go into the schema extension (with its constraints
table, so GDAL's validator passes), and each layer gets a default style in
``layer_styles`` in the shared palette, which a desktop GIS applies at open
(QGIS also takes its field aliases from it).  Without a map frame in the site
file, geometries stay in drawing coordinates (metres) with no CRS.
"""

from __future__ import annotations

import json
import sqlite3
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import shapely
from shapely.geometry import MultiPolygon, Point

from overlay.assets import gpkg_sql
from overlay.cautions import CAUTIONS
from overlay.outputs import palette, styles
from overlay.zones.zone import ZONE_FIELDS

if TYPE_CHECKING:
    from overlay.job import RunResult

GPKG_VERSION = "1.3"  # read without a warning by GDAL 3.6 / QGIS 3.22 (Debian 12) and every later release
STYLE_NAME = "overlay default"
GDAL_UTC = 100  # GDAL's time-zone flag for UTC (its RFC 56)


@dataclass(frozen=True)
class Layer:
    """One layer as plain columns: field name → numpy array (float64, int64, bool, text as object,
    times as datetime64 in UTC), the geometries, their type.  Written straight through GDAL, without
    a data frame library: the points layer of a 50,000-point scan in a fraction of the time."""

    name: str
    fields: dict[str, np.ndarray]
    geometry: np.ndarray | None  # None: a table without geometry
    geometry_type: str


def to_output_frame(result: "RunResult") -> tuple[Any, Any]:
    """(transform of drawing geometry into the output frame, CRS or None)."""
    u = result.unit_m
    if result.to_map is not None:
        return result.to_map.apply_geometry, result.crs
    return (lambda g: shapely.transform(g, lambda xy: xy * u)), None


def utc_times(values: Any) -> np.ndarray:
    """ISO-8601 UTC text ('' for unknown) as UTC times to the millisecond: GeoPackage DATETIME, not text."""
    return np.array([np.datetime64(v.replace("Z", "").replace("+00:00", ""), "ms") if v else np.datetime64("NaT", "ms")
                     for v in values], dtype="datetime64[ms]")


def write_layer(path: Path, layer: Layer, crs: Any, options: dict[str, str] | None = None) -> None:
    """One layer into the GeoPackage at ``path`` (created by the first layer, with ``options``)."""
    import pyogrio.raw

    names = list(layer.fields)
    data = [np.where(np.isfinite(a), a, np.nan) if a.dtype.kind == "f" else a for a in layer.fields.values()]
    times = {n: np.full(len(a), GDAL_UTC, dtype=np.int64) for n, a in layer.fields.items() if a.dtype.kind == "M"}
    with warnings.catch_warnings():
        # without a map frame the layers are in drawing metres with no CRS, on purpose
        warnings.filterwarnings("ignore", message="'crs' was not provided")
        pyogrio.raw.write(path, geometry=shapely.to_wkb(layer.geometry) if layer.geometry is not None else None,
                          field_data=data, fields=names, layer=layer.name, driver="GPKG",
                          geometry_type=layer.geometry_type or None, crs=crs.to_wkt() if crs is not None else None,
                          promote_to_multi=False, nan_as_null=True, dataset_options=options,
                          gdal_tz_offsets=times, append=options is None)


class GeoPackageExporter:
    name = "gpkg"
    suffix = ".gpkg"
    description = "layers zones, defect_outlines, repair_footprints, points, scan_extents, targets, table runs (GeoPackage 1.3)"

    def write(self, result: "RunResult", path: Path) -> None:
        _, crs = to_output_frame(result)
        for i, layer in enumerate([*layers(result), _runs(result)]):
            write_layer(path, layer, crs if layer.geometry is not None else None,
                        {"VERSION": GPKG_VERSION} if i == 0 else None)
        con = sqlite3.connect(path)
        try:
            with con:
                gpkg_sql.describe_columns(con, FIELD_DOCS, enums={("zones", "class"): [c.name for c in result.site.zones.classes]},
                                          ranges={("zones", "confidence"): (0.0, 1.0)})
                found = gpkg_sql.layers(con)
                for name, style in layer_styles(result).items():
                    gpkg_sql.put_style(con, found[name], STYLE_NAME, styles.qml(style), styles.sld(style, name),
                                       "written by overlay: classes in the colours of the DXF and the pictures")
        finally:
            con.close()


def _column(rows: list[dict[str, Any]], key: str, kind: str) -> np.ndarray:
    """One field of ``rows`` as an array: "f" float64, "i" int64, "b" bool, "t" text, "M" UTC time."""
    values = [r[key] for r in rows]
    if kind == "f":
        return np.array([np.nan if v is None else v for v in values], dtype=np.float64)
    if kind == "i":
        return np.array(values, dtype=np.int64)
    if kind == "b":
        return np.array(values, dtype=bool)
    if kind == "M":
        return utc_times(values)
    return np.array(["" if v is None else str(v) for v in values], dtype=object)


def _table(rows: list[dict[str, Any]], kinds: dict[str, str]) -> dict[str, np.ndarray]:
    return {k: _column(rows, k, kind) for k, kind in kinds.items()}


ZONE_KINDS = {k: ("t" if k in ("zone_id", "scan_id", "element", "class", "defect_id", "outline_basis", "outline_shape",
                                "provenance") else "M" if k == "surveyed" else "i" if k == "n_points" else "f")
              for k in ZONE_FIELDS}


def layers(result: "RunResult") -> list[Layer]:
    """Every spatial layer, in the output frame."""
    move, _ = to_output_frame(result)
    zones = result.zones
    zgeom = np.array([MultiPolygon([move(z.contour)]) for z in zones], dtype=object)
    return [
        Layer("zones", _table([z.record() for z in zones], ZONE_KINDS), zgeom, "MultiPolygon"),
        _points(result, move),
        _defects(result, move, "defect_outlines", "defect"),
        _defects(result, move, "repair_footprints", "footprint"),
        _extents(result, move),
        _targets(result, move),
    ]


def layer_styles(result: "RunResult") -> dict[str, styles.LayerStyle]:
    """The default style of each layer: zones by class in the shared palette, the rest by kind."""
    cls = palette.for_site(result.site)
    by_class = styles.class_categories([(c.name, c.threshold_db, cls[c.name].rgb) for c in result.site.zones.classes])

    def aliases(layer: str, fields: list[str]) -> tuple[tuple[str, str], ...]:
        return tuple((f, FIELD_DOCS[layer][f][0]) for f in fields if f in FIELD_DOCS.get(layer, {}))

    zone_fields = ["fid", *ZONE_FIELDS]
    return {
        "zones": styles.LayerStyle("zones by class", attr="class", categories=by_class,
                                   aliases=aliases("zones", zone_fields), fields=tuple(zone_fields)),
        "defect_outlines": styles.LayerStyle("estimated defect outline", styles.Symbol(
            "fill", palette.DEFECT_RGB, 0, palette.DEFECT_RGB, 0.5, "dash")),
        "repair_footprints": styles.LayerStyle("repair footprint", styles.Symbol(
            "fill", palette.REPAIR_RGB, 0, palette.REPAIR_RGB, 0.8, "solid")),
        "scan_extents": styles.LayerStyle("scan extent", styles.Symbol(
            "fill", palette.EXTENT_RGB, 0, palette.EXTENT_RGB, 0.3, "dot")),
        "targets": styles.LayerStyle("control target", styles.Symbol(
            "marker", palette.TARGET_RGB, shape="triangle", size_mm=2.5, width_mm=0.3)),
        "points": styles.LayerStyle("measurement points", attr="valid", categories=(
            styles.Category("true", "valid", styles.Symbol("marker", palette.EXTENT_RGB, shape="circle", size_mm=0.8,
                                                      width_mm=0.0)),
            styles.Category("false", "invalid (see invalid_reason)", styles.Symbol(
                "marker", (0xD5, 0x5E, 0x00), shape="cross", size_mm=1.6, width_mm=0.4))),
            aliases=aliases("points", ["fid", *POINT_FIELDS]), fields=("fid", *POINT_FIELDS)),
    }


def _points(result: "RunResult", move: Any) -> Layer:
    """Every measurement point of every scan, built column by column."""
    scans = result.scans
    cat = (lambda f: np.concatenate([f(s) for s in scans]) if scans else np.zeros(0))  # noqa: E731
    fields = {
        "point_id": cat(lambda s: s.point_ids.astype(str).astype(object)),
        "scan_id": cat(lambda s: np.full(len(s.point_ids), s.scan_id, dtype=object)),
        "ver_db": cat(lambda s: s.ver_db.astype(np.float64)),
        "peak_hz": cat(lambda s: s.peak_hz.astype(np.float64)),
        "energy": cat(lambda s: s.energy.astype(np.float64)),
        "snr_db": cat(lambda s: s.snr_db.astype(np.float64)),
        "incidence_deg": cat(lambda s: s.incidence_deg.astype(np.float64)),
        "valid": cat(lambda s: s.valid.astype(bool)),
        "invalid_reason": cat(lambda s: s.invalid_reason.astype(str).astype(object)),
    }
    geom = move(shapely.points(cat(lambda s: s.point_xy))) if scans else np.zeros(0, dtype=object)
    return Layer("points", fields, np.asarray(geom, dtype=object), "Point")


POINT_FIELDS = ("point_id", "scan_id", "ver_db", "peak_hz", "energy", "snr_db", "incidence_deg", "valid",
                "invalid_reason")
FIELD_DOCS: dict[str, dict[str, tuple[str, str]]] = {  # field: (title a GIS shows as the alias, description)
    "zones": {
        "zone_id": ("Zone id", "scan id . class . number, stable across runs; '+n' when n more scans' zones were "
                    "united with it (the provenance field lists them)"),
        "class": ("Class", "class name; classes are nested, do not add their areas"),
        "threshold_db": ("Class level (dB)", "class level of vibration energy ratio, dB"),
        "defect_id": ("Defect id", "zone of the lowest class whose defect outline this zone shares"),
        "area_m2": ("Contour area (m²)", "area of the class contour, surface m2"),
        "area_low_m2": ("Contour area, low (m²)", "contour shrunk by half a grid spacing, m2"),
        "area_high_m2": ("Contour area, high (m²)", "contour grown by half a grid spacing, m2"),
        "perimeter_m": ("Perimeter (m)", "perimeter of the class contour, m"),
        "outline_area_m2": ("Defect outline area (m²)", "estimated defect outline: the fitted plate, or the contour "
                            "where the plate model does not fit (outline_basis), m2"),
        "outline_basis": ("Outline from", "model: the fitted plate's outline; contour: the model did not explain the "
                          "VER (misfit > 2), the class contour instead"),
        "outline_shape": ("Plate shape", "ellipse or rectangle: the fitted plate (empty with the contour)"),
        "outline_misfit": ("Plate misfit", "RMS residual of the plate model inside it over the sound scatter around "
                           "it; 1 is as good as the noise allows, above 2 the model is not used"),
        "conf_outline": ("Outline factor (0-1)", "the outline's weight in the confidence: 1 at misfit 1, towards 0.5"),
        "n_points": ("Points inside", "valid measurement points inside the contour"),
        "ver_max_db": ("Largest VER (dB)", "largest vibration energy ratio inside, dB"),
        "ver_mean_db": ("Mean VER (dB)", "mean vibration energy ratio inside, dB"),
        "peak_hz": ("Peak frequency (Hz)", "peak frequency of the zone's averaged spectrum, Hz"),
        "peak_spread": ("Peak spread", "interquartile range over median of per-point peak frequencies"),
        "depth_low_m": ("Depth, low (m)", "cover thickness, clamped-edge plate: order of magnitude only"),
        "depth_high_m": ("Depth, high (m)", "cover thickness, simply supported plate: order of magnitude only"),
        "footprint_area_m2": ("Repair footprint (m²)", "repair rectangle: outline grown by the cutting margin, m2"),
        "footprint_length_m": ("Footprint length (m)", "long side of the repair rectangle, m"),
        "footprint_width_m": ("Footprint width (m)", "short side of the repair rectangle, m"),
        "volume_low_m3": ("Removal volume, low (m³)", "footprint area x depth_low_m"),
        "volume_high_m3": ("Removal volume, high (m³)", "footprint area x depth_high_m"),
        "confidence": ("Confidence (0-1)", "support x contrast x coherence x quality, 0-1 (docs/zones.md)"),
        "station_m": ("Station (m)", "station of the centroid along the site alignment, m"),
        "offset_m": ("Offset (m)", "offset of the centroid from the alignment, left positive, m"),
        "surveyed": ("Surveyed (UTC)", "when the scan was taken, UTC"),
        "provenance": ("United from", "the per-scan zones this zone was united from"),
    },
    "points": {
        "ver_db": ("VER (dB)", "vibration energy ratio against the scan's reference, dB"),
        "peak_hz": ("Peak frequency (Hz)", "peak of the point's band spectrum, Hz"),
        "energy": ("Band energy ((m/s)²)", "band mean-square velocity normal to the surface, (m/s)2"),
        "snr_db": ("SNR (dB)", "in-band peak over the noise floor (median of every second band bin), dB"),
        "incidence_deg": ("Incidence (°)", "angle of the laser beam to the surface normal, degrees"),
        "valid": ("Valid", "true when the point is used"),
        "invalid_reason": ("Why not used", "why the point is not used (empty when valid)"),
    },
    "runs": {
        "run_started": ("Run started (UTC)", "when the run started, UTC"),
        "field_span_db": ("Sound field span (dB)", "how much the fitted sound-concrete field varies over the scan, dB; "
                          "above 1 dB the reference 'auto' measures against the local field"),
        "field_scatter_db": ("Sound scatter (dB)", "robust spread of the sound points around the fitted field, dB"),
        "fit_passed": ("Fit passed", "true when every target residual is within the tolerance"),
        "fit_override": ("Misfit accepted", "true when a failed fit was accepted by override"),
        "fit_tolerance_m": ("Fit tolerance (m)", "worst target residual allowed, metres on the structure"),
        "calibration_file": ("Calibration", "the calibration against sounding the class levels come from (empty: none "
                             "named in the site file)"),
        "calibration_sha256": ("Calibration file hash", "SHA-256 of that calibration file"),
        "calibration_made": ("Calibration made (UTC)", "when the calibration was made, UTC"),
        "calibration_auc": ("Calibration AUC", "area under the ROC curve of VER against the sounding verdicts, 0-1"),
    },
}


DEFECT_KINDS = {"defect_id": "t", "scan_id": "t", "element": "t", "outline_area_m2": "f", "footprint_area_m2": "f",
                "footprint_length_m": "f", "footprint_width_m": "f", "depth_low_m": "f", "depth_high_m": "f"}


def _defects(result: "RunResult", move: Any, name: str, which: str) -> Layer:
    """One row per defect (its lowest-class zone): the estimated outline or the repair footprint."""
    own = [z for z in result.zones if z.defect_id == z.zone_id]
    rows = [{"defect_id": z.defect_id, "scan_id": z.scan_id, "element": z.element, "outline_area_m2": z.outline_area_m2,
             "footprint_area_m2": z.footprint_area_m2, "footprint_length_m": z.footprint_length_m,
             "footprint_width_m": z.footprint_width_m, "depth_low_m": z.depth_low_m, "depth_high_m": z.depth_high_m}
            for z in own]
    return Layer(name, _table(rows, DEFECT_KINDS), np.array([move(getattr(z, which)) for z in own], dtype=object),
                 "Polygon")


def _extents(result: "RunResult", move: Any) -> Layer:
    rows = [{"scan_id": s.scan_id, "element": s.element, "surveyed": s.surveyed, "n_points": s.n_points,
             "n_valid": int(s.valid.sum()), "spacing_m": s.spacing_m} for s in result.scans]
    kinds = {"scan_id": "t", "element": "t", "surveyed": "M", "n_points": "i", "n_valid": "i", "spacing_m": "f"}
    return Layer("scan_extents", _table(rows, kinds), np.array([move(s.extent) for s in result.scans], dtype=object),
                 "Polygon")


def _targets(result: "RunResult", move: Any) -> Layer:
    u = result.unit_m
    rows, geom = [], []
    for s in result.scans:
        for t in s.targets:
            rows.append({"scan_id": s.scan_id, "name": t.name, "scanner_x": t.scanner[0], "scanner_y": t.scanner[1],
                         "drawing_x": t.drawing[0], "drawing_y": t.drawing[1],
                         "residual_m": float(np.hypot(*t.residual)) * u,
                         "leave_one_out_m": t.leave_one_out * u, "fit_model": s.fit.model, "fit_passed": bool(s.fit_passed)})
            geom.append(move(Point(t.drawing)))
    kinds = {"scan_id": "t", "name": "t", "scanner_x": "f", "scanner_y": "f", "drawing_x": "f", "drawing_y": "f",
             "residual_m": "f", "leave_one_out_m": "f", "fit_model": "t", "fit_passed": "b"}
    return Layer("targets", _table(rows, kinds), np.array(geom, dtype=object), "Point")


RUN_KINDS = {"run_started": "M", "tool_version": "t", "site": "t", "structure": "t", "scan_id": "t", "payload": "t",
             "gate": "t", "reference_method": "t", "reference_energy": "f", "reference_detail": "t",
             "field_span_db": "f", "field_scatter_db": "f", "incidence": "t", "fit_model": "t", "fit_frame": "t",
             "fit_params": "t", "fit_rms": "f", "fit_max": "f", "fit_tolerance_m": "f", "fit_passed": "b",
             "fit_override": "b", "calibration_file": "t", "calibration_sha256": "t", "calibration_made": "M",
             "calibration_auc": "f", "settings": "t", "cautions": "t"}


def _runs(result: "RunResult") -> Layer:
    """The non-spatial runs table: one row per scan with the run's settings, fit, reference and calibration."""
    from overlay.outputs.report_text import recorded_calibration

    cal = recorded_calibration(result) or {}
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
            "field_span_db": s.reference.field_span_db if s.reference else np.nan,
            "field_scatter_db": s.reference.field_scatter_db if s.reference else np.nan,
            "incidence": s.incidence,
            "fit_model": s.fit.model,
            "fit_frame": s.fit_summary,
            "fit_params": json.dumps(s.fit.transform.params()),
            "fit_rms": s.fit.rms,
            "fit_max": s.fit.worst[1],
            "fit_tolerance_m": result.site.registration.tolerance_m,
            "fit_passed": bool(s.fit_passed),
            "fit_override": bool(result.site.registration.accept_misfit and not s.fit_passed),
            "calibration_file": cal.get("file", ""),
            "calibration_sha256": cal.get("file_sha256", ""),
            "calibration_made": cal.get("made", ""),
            "calibration_auc": cal.get("auc") if cal.get("auc") is not None else np.nan,
            "settings": json.dumps(result.settings(), sort_keys=True),
            "cautions": " ".join(CAUTIONS),
        })
    return Layer("runs", _table(rows, RUN_KINDS), None, "")
