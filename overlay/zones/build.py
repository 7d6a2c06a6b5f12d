"""Zones of one scan from its VER map: class contours in the drawing frame, zone records with their
statistics and averaged spectra, and each defect's outline, depth and repair footprint."""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Callable

import numpy as np
import shapely
from shapely.geometry import Polygon

from overlay.geometry.transforms import Transform
from overlay.signal.gate import Gate
from overlay.signal.spectra import band_psd_rows, given_psd_rows, parabolic_peak
from overlay.zones.contour import level_polygons
from overlay.zones.grid import Grid, ScatterGrid
from overlay.zones.outline import MISFIT_MAX, fit_plate
from overlay.zones.zone import (
    Zone,
    confidence_factors,
    defect_outline,
    depth_range,
    order_key,
    outline_confidence,
    parent_finder,
    point_stats,
    repair_footprint,
)

if TYPE_CHECKING:
    from overlay.io.bundle import Scan
    from overlay.settings import Site

SIMPLIFY = 0.05  # contours are simplified within this fraction of the grid spacing
PsdSource = Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]]


def build_zones(scan_id: str, element: str, surveyed: str, site: "Site", grid: Grid | ScatterGrid,
                values: np.ma.MaskedArray, scan_area: Polygon, to_drawing: Transform, spacing_d: float,
                extent: Polygon, points: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray],
                zone_psd: PsdSource | None, u: float) -> list[Zone]:
    """Every class's zones, nested by construction: each class contoured inside the one below, its zones
    built and given the defect of the lowest-class zone around them.  ``points``: (xy in the drawing
    frame, VER, peak, SNR, valid) per point; ``u``: metres per drawing unit."""
    xy, ver, peak, snr, valid = points
    zones: list[Zone] = []
    find_parent = parent_finder([])
    lower = None
    for ci, zc in enumerate(site.zones.classes):
        contours = class_contours(grid, values, zc.threshold_db, scan_area, to_drawing, spacing_d, lower,
                                  site.zones.min_area_m2 / (u * u))
        built = []
        for k, contour in enumerate(contours, start=1):
            zone = build_zone(f"{scan_id}.{zc.name}.{k:02d}", scan_id, element, zc.name, zc.threshold_db,
                              contour, surveyed, xy, ver, peak, snr, valid, spacing_d, extent, u, zone_psd)
            parent = find_parent(contour)
            others = shapely.union_all([c for j, c in enumerate(contours) if j != k - 1]) if ci == 0 else None
            attach_repair(zone, parent, site, extent, u, (xy, ver, valid, others))
            built.append(zone)
        if ci == 0:
            find_parent = parent_finder(built)
        zones.extend(built)
        lower = shapely.union_all([z.contour for z in built]) if built else Polygon()
    return zones


def class_contours(grid: Grid | ScatterGrid, values: np.ma.MaskedArray, level: float, scan_area: Polygon,
                    to_drawing: Transform, spacing_d: float, lower: object, min_area: float) -> list[Polygon]:
    """Contours of one class in the drawing frame: kept inside the scanned area, simplified within 5 %
    of a spacing, clipped into the lower class (so classes nest exactly), small ones dropped, ordered."""
    out = []
    for poly in level_polygons(grid, values, level):
        if isinstance(grid, ScatterGrid):
            poly = poly.intersection(scan_area)
        c = to_drawing.apply_geometry(poly).simplify(SIMPLIFY * spacing_d, preserve_topology=True)
        if lower is not None:
            c = c.intersection(lower)
        for part in shapely.get_parts(shapely.make_valid(c)):
            if part.geom_type == "Polygon" and part.area >= min_area:
                out.append(part)
    return sorted(out, key=order_key)


def zone_psd_source(scan: "Scan", gate: Gate | None) -> PsdSource | None:
    """A function giving (band freqs, PSD rows in sorted row order) for chosen points, or None for
    ready-VER scans.  Rows already computed are kept: nested zones of higher classes ask for
    points of the lowest-class zone around them, whose spectra need not be computed again."""
    band = scan.band_hz
    if band is None:
        return None
    compute: Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]]
    if scan.payload == "records" and gate is not None and scan.records is not None:
        records = scan.records
        compute = lambda rows: band_psd_rows(records, gate, band, scan.velocity_scale, rows)  # noqa: E731
    elif scan.payload == "spectra" and scan.spectra is not None and scan.frequencies is not None:
        spectra, freqs = scan.spectra, scan.frequencies
        compute = lambda rows: given_psd_rows(spectra, freqs, band, scan.velocity_scale, rows)  # noqa: E731
    else:
        return None
    store: dict[int, np.ndarray] = {}
    axis: list[np.ndarray] = []

    def psd(rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        rows = np.sort(np.asarray(rows, dtype=np.int64))
        missing = np.array([r for r in rows.tolist() if r not in store], dtype=np.int64)
        if missing.size or not axis:
            f, p = compute(missing if missing.size else rows[:1])
            axis[:] = [f]
            store.update(zip((missing if missing.size else rows[:1]).tolist(), p))
        return axis[0], np.stack([store[r] for r in rows.tolist()])

    return psd


def healthy_spectrum(zone_psd: PsdSource | None, ver: np.ndarray,
                      valid: np.ndarray, n: int = 256) -> tuple[np.ndarray | None, np.ndarray | None]:
    """The band axis and the mean PSD of up to ``n`` sound points (|VER| < 1 dB), for zone sheets."""
    if zone_psd is None:
        return None, None
    rows = np.nonzero(valid & (np.abs(ver) < 1.0))[0]
    if rows.size == 0:
        return None, None
    rows = rows[np.linspace(0, rows.size - 1, min(n, rows.size)).astype(int)]
    freqs, psd = zone_psd(rows)
    return freqs, np.nanmean(psd, axis=0)


def build_zone(zone_id: str, scan_id: str, element: str, cls: str, threshold: float, contour: Polygon, surveyed: str,
                xy: np.ndarray, ver: np.ndarray, peak: np.ndarray, snr: np.ndarray, valid: np.ndarray,
                spacing_d: float, extent: Polygon, u: float,
                zone_psd: PsdSource | None) -> Zone:
    st = point_stats(contour, xy, ver, peak, snr, valid, spacing_d)
    peak_hz = st["peak_hz"]
    spectrum = None
    rows = np.nonzero(st["inside"])[0]
    if zone_psd is not None and rows.size:
        freqs, psd = zone_psd(rows)
        spectrum = np.nanmean(psd, axis=0)
        if np.isfinite(spectrum).all():
            peak_hz = float(parabolic_peak(freqs, spectrum[None, :])[0])
    area = contour.area * u * u
    low = contour.buffer(-spacing_d / 2).area * u * u
    high = contour.buffer(spacing_d / 2).intersection(extent).area * u * u
    factors = confidence_factors(st["n_points"], st["ver_max_db"], threshold, st["peak_spread"], st["valid_share"], st["snr_db"])
    return Zone(
        zone_id=zone_id, scan_id=scan_id, element=element, class_name=cls, threshold_db=threshold, contour=contour,
        area_m2=area, area_low_m2=low, area_high_m2=max(high, area), perimeter_m=contour.length * u,
        n_points=int(st["n_points"]), ver_max_db=st["ver_max_db"], ver_mean_db=st["ver_mean_db"], peak_hz=peak_hz,
        peak_spread=st["peak_spread"], confidence=round(float(np.prod(factors)), 4),
        conf_support=round(factors[0], 4), conf_contrast=round(factors[1], 4), conf_coherence=round(factors[2], 4),
        conf_quality=round(factors[3], 4), surveyed=surveyed, spectrum=spectrum,
    )


def attach_repair(zone: Zone, parent: Zone | None, site: "Site", extent: Polygon, u: float,
                   points: tuple[np.ndarray, np.ndarray, np.ndarray, object]) -> None:
    """Defect outline, depth, repair footprint and volume: a zone of the lowest class estimates its
    defect — the fitted plate where the model explains the VER around it, its own contour where
    not; a nested zone shares the defect of the lowest-class zone around it."""
    if parent is None:
        xy, ver, valid, others = points
        _, scale = defect_outline(zone.contour, zone.ver_max_db, zone.threshold_db)
        fit = fit_plate(zone.contour, xy, ver, valid, scale, zone.ver_max_db, others)  # type: ignore[arg-type]
        if fit.plate is not None and fit.misfit <= MISFIT_MAX:
            outline, shape, ratio = fit.plate.polygon(), fit.plate.shape, fit.plate.b / fit.plate.a
            zone.outline_basis, zone.outline_shape = "model", fit.plate.shape
        else:
            outline, shape, ratio = zone.contour, "ellipse", 1.0
            zone.outline_basis, zone.outline_shape = "contour", ""
        outline = outline.intersection(extent) if not extent.is_empty else outline
        if outline.geom_type != "Polygon":
            outline = max(shapely.get_parts(outline), key=lambda g: g.area) if not outline.is_empty else zone.contour
        zone.defect, zone.defect_id = outline, zone.zone_id
        zone.outline_misfit = round(fit.misfit, 3) if math.isfinite(fit.misfit) else float("nan")
        zone.conf_outline = round(outline_confidence(fit.misfit), 4)
        zone.outline_area_m2 = outline.area * u * u
        k = zone.outline_area_m2 / zone.area_m2
        zone.depth_low_m, zone.depth_high_m = depth_range(zone.peak_hz, zone.area_low_m2 * k, zone.area_high_m2 * k,
                                                          site.concrete, shape, ratio)
    else:
        zone.defect, zone.defect_id, zone.outline_area_m2 = parent.defect, parent.defect_id, parent.outline_area_m2
        zone.depth_low_m, zone.depth_high_m = parent.depth_low_m, parent.depth_high_m
        zone.outline_basis, zone.outline_shape = parent.outline_basis, parent.outline_shape
        zone.outline_misfit = parent.outline_misfit
        zone.conf_outline = parent.conf_outline
    zone.confidence = round(zone.confidence * zone.conf_outline, 4)
    basis = zone.defect if site.repair.basis == "outline" else zone.contour
    rect, length, width = repair_footprint(basis, site.repair.margin_m / u, site.repair.footprint)
    zone.footprint = rect
    zone.footprint_area_m2 = rect.area * u * u
    zone.footprint_length_m, zone.footprint_width_m = length * u, width * u
    zone.volume_low_m3 = zone.footprint_area_m2 * zone.depth_low_m
    zone.volume_high_m3 = zone.footprint_area_m2 * zone.depth_high_m
