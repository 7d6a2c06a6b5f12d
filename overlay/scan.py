"""One scan from its bundle to zones in the drawing frame: register → signal → reference → zones.

Each step is a function of its own room (geometry, signal, zones); this module only passes data
between them, and nothing here writes a file.  A whole run is overlay.job.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from typing import Callable

import numpy as np
import shapely
from shapely.geometry import Polygon

from overlay.errors import SignalError
from overlay.geometry.fits import Fit
from overlay.geometry.registration import Registration, TargetResult, register
from overlay.io.bundle import Scan, read_bundle
from overlay.settings import ScanEntry, Site
from overlay.signal.energy import Reference, reference_energy, ver_db
from overlay.signal.gate import Gate, choose_gate
from overlay.signal.incidence import normal_energy
from overlay.signal.quality import quality_checks
from overlay.signal.spectra import given_spectra, records_spectra
from overlay.units import LENGTH_TO_M
from overlay.zones.build import build_zones, healthy_spectrum, zone_psd_source
from overlay.zones.grid import grid_positions, scan_grid
from overlay.zones.zone import Zone


@dataclass
class ScanResult:
    """Everything one scan contributes to the outputs, in the drawing frame."""

    scan_id: str
    element: str
    surveyed: str
    kind: str
    payload: str
    n_points: int
    gate: Gate | None
    reference: Reference | None
    incidence: str
    fit: Fit
    fit_passed: bool
    fit_summary: str
    spacing_m: float
    extent: Polygon
    point_ids: np.ndarray
    point_xy: np.ndarray
    energy: np.ndarray
    ver_db: np.ndarray
    peak_hz: np.ndarray
    snr_db: np.ndarray
    incidence_deg: np.ndarray
    valid: np.ndarray
    invalid_reason: np.ndarray
    targets: list[TargetResult]
    zones: list[Zone]
    band_freqs: np.ndarray | None = None  # Hz, the frequency axis of zone spectra
    healthy_spectrum: np.ndarray | None = None  # mean band PSD of sound points (|VER| < 1 dB)
    grid_rc: np.ndarray | None = None  # (n, 2) row and column of each point on its grid; None for scattered points


def healthy_mask(scan: Scan, entry: ScanEntry, point_xy: np.ndarray) -> np.ndarray | None:
    """Points inside the scan's healthy region (drawing frame, or scanner frame in the bundle's unit)."""
    if entry.healthy_region is None:
        return None
    if entry.healthy_region_frame == "drawing":
        region, xy = Polygon(entry.healthy_region), point_xy
    else:
        k = scan.unit_scale if scan.kind == "surface" else 1.0
        region, xy = Polygon([(x * k, y * k) for x, y in entry.healthy_region]), scan.xy
    return shapely.contains_xy(region, xy[:, 0], xy[:, 1])


@dataclass
class Signal:
    """What the signal steps make of a scan's payload: per point energy, VER, peak, SNR and use."""

    energy: np.ndarray
    ver: np.ndarray
    peak: np.ndarray
    snr: np.ndarray
    valid: np.ndarray
    reason: np.ndarray  # why a point is not used ('' when it is)
    gate: Gate | None = None
    reference: Reference | None = None
    incidence: str = ""


def process_scan(
    scan: Scan, site: Site, entry: ScanEntry, progress: Callable[[int], None] | None = None
) -> ScanResult:
    """One scan from its bundle to zones in the drawing frame: register → signal → reference → zones."""
    reg = register(scan, entry, site)
    xy_work = reg.working(scan.xy)
    point_xy = reg.to_drawing.apply(xy_work)
    incidence_deg = (np.degrees(np.arccos(np.clip(reg.cos_incidence, 0, 1))) if reg.cos_incidence is not None
                     else np.full(scan.n_points, np.nan))
    sig = _signal(scan, site, entry, reg, point_xy, incidence_deg, progress)
    u = LENGTH_TO_M[site.drawing_unit]
    grid = scan_grid(scan, xy_work)
    spacing_d = grid.spacing() * reg.to_drawing.local_scale(xy_work)  # grid spacing in drawing units
    scan_area = grid.extent()
    extent = reg.to_drawing.apply_geometry(scan_area)
    element = entry.element or scan.element or ""
    surveyed = scan.surveyed.astimezone(dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ") if scan.surveyed else ""
    zone_psd = zone_psd_source(scan, sig.gate)
    band_freqs, healthy = healthy_spectrum(zone_psd, sig.ver, sig.valid)
    zones = build_zones(scan.scan_id, element, surveyed, site, grid, grid.contour_values(sig.ver, sig.valid), scan_area,
                        reg.to_drawing, spacing_d, extent, (point_xy, sig.ver, sig.peak, sig.snr, sig.valid), zone_psd, u)
    return ScanResult(
        scan_id=scan.scan_id, element=element, surveyed=surveyed, kind=scan.kind, payload=scan.payload,
        n_points=scan.n_points, gate=sig.gate, reference=sig.reference, incidence=sig.incidence, fit=reg.fit,
        fit_passed=reg.passed, fit_summary=reg.describe, spacing_m=spacing_d * u, extent=extent,
        point_ids=scan.point_ids, point_xy=point_xy, energy=sig.energy, ver_db=sig.ver, peak_hz=sig.peak,
        snr_db=sig.snr, incidence_deg=incidence_deg, valid=sig.valid, invalid_reason=sig.reason, targets=reg.targets,
        zones=zones, band_freqs=band_freqs, healthy_spectrum=healthy, grid_rc=grid_positions(grid, scan.n_points),
    )


def _signal(scan: Scan, site: Site, entry: ScanEntry, reg: Registration, point_xy: np.ndarray,
            incidence_deg: np.ndarray, progress: Callable[[int], None] | None) -> Signal:
    """Energy (incidence-corrected), the points used and why not, the reference and VER — or the bundle's
    ready VER."""
    src, n = str(scan.path), scan.n_points
    reason = np.where(scan.valid, "", "flagged").astype(object)
    if scan.payload == "ver":
        assert scan.ver_db is not None
        ver = scan.ver_db.astype(np.float64)
        valid = scan.valid & np.isfinite(ver)
        reason[(reason == "") & ~valid] = "no VER value"
        peak = scan.peak_hz if scan.peak_hz is not None else np.full(n, np.nan)
        sig = Signal(np.full(n, np.nan), ver, peak, np.full(n, np.nan), valid, reason,
                     incidence="not applicable (ready VER)")
    else:
        sig = _from_payload(scan, site, entry, reg, point_xy, incidence_deg, progress, reason)
    if not sig.valid.any():
        raise SignalError("no valid point in the scan", source=src)
    return sig


def _from_payload(scan: Scan, site: Site, entry: ScanEntry, reg: Registration, point_xy: np.ndarray,
                  incidence_deg: np.ndarray, progress: Callable[[int], None] | None, reason: np.ndarray) -> Signal:
    src = str(scan.path)
    assert scan.band_hz is not None
    gate = None
    if scan.payload == "records":
        assert scan.records is not None
        gate = choose_gate(scan)
        sp = records_spectra(scan.records, gate, scan.band_hz, scan.velocity_scale, progress=progress)
    else:
        assert scan.spectra is not None and scan.frequencies is not None
        sp = given_spectra(scan.spectra, scan.frequencies, scan.band_hz, scan.velocity_scale)
    energy, cos_inc = sp.energy, reg.cos_incidence
    if cos_inc is not None and site.energy.incidence_correction:
        energy = normal_energy(energy, cos_inc)
        incidence = f"applied ({reg.incidence_how}; largest {np.nanmax(incidence_deg):.1f} deg)"
    else:
        incidence = "off" if cos_inc is not None else reg.incidence_how
    valid = scan.valid.copy()
    for bad, why in quality_checks(scan, sp.finite, sp.snr_db, site):
        reason[valid & bad] = why
        valid &= ~bad
    if not valid.any():
        raise SignalError("no valid point in the scan (all flagged, non-finite or below the quality floors)", source=src)
    region = healthy_mask(scan, entry, point_xy) if site.energy.reference == "region" else None
    reference = reference_energy(energy, valid, site.energy.reference, site.energy.percentile, region, source=src,
                                 xy_m=point_xy * LENGTH_TO_M[site.drawing_unit])
    ver = ver_db(energy, reference.at_points())
    reason[valid & ~np.isfinite(ver)] = "zero energy"
    valid &= np.isfinite(ver)
    return Signal(energy, ver, sp.peak_hz, sp.snr_db, valid, reason, gate, reference, incidence)


def scan_entry(entry: ScanEntry, site: Site, progress: Callable[[int], None] | None = None) -> ScanResult:
    """Read one bundle and process it (the unit of work of a campaign)."""
    return process_scan(read_bundle(entry.bundle), site, entry, progress)
