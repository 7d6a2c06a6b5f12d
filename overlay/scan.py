"""Wire the stages for one scan and for a site: read → gate → spectra → VER → contour → zones → register.

Each stage is a plain function in its own module; this module only passes
data between them.  Nothing here writes a file.
"""

from __future__ import annotations

import datetime as dt
import math
import warnings
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
import pyproj
import shapely
from shapely.geometry import Polygon

from overlay import __version__
from overlay.io.bundle import Scan, read_bundle
from overlay.cautions import CAUTIONS
from overlay.zones.contour import level_polygons
from overlay.assets.elements import AssetTable, element_layer, read_asset_table, split_by_assets
from overlay.signal.energy import Reference, reference_energy, ver_db
from overlay.errors import BundleError, RegistrationError, SignalError, SiteFileError
from overlay.geometry.fits import Fit, check_fit, fit_points
from overlay.geometry.crs import UNIT_TO_M, check_map_crs, from_placement, site_scale_factor, to_crs
from overlay.geometry.stations import Alignment
from overlay.geometry.transforms import Similarity, Transform
from overlay.signal.incidence import normal_energy
from overlay.signal.gate import Gate, make_gate, window_from_geometry
from overlay.zones.grid import Grid, ScatterGrid, grid_from_indices, infer_grid
from overlay.zones.mosaic import mosaic_zones
from overlay.geometry.registration import TargetResult, register
from overlay.io.site import SCALE_RANGE, ScanEntry, Site
from overlay.signal.spectra import band_psd_rows, given_psd_rows, given_spectra, parabolic_peak, records_spectra
from overlay.zones.outline import MISFIT_MAX, fit_plate
from overlay.zones.zone import (
    Zone,
    confidence_factors,
    defect_outline,
    depth_range,
    outline_confidence,
    order_key,
    parent_finder,
    point_stats,
    repair_footprint,
)

SIMPLIFY = 0.05  # contours are simplified within this fraction of the grid spacing


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
    fit_describe: str
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


@dataclass
class RunResult:
    """A whole run: site, per-scan results, the map placement and run metadata."""

    site: Site
    scans: list[ScanResult]
    to_map: Similarity | None
    crs: pyproj.CRS | None
    map_fit: Fit | None
    started: str
    tool_version: str = __version__
    cautions: tuple[str, ...] = CAUTIONS
    warnings: list[str] = field(default_factory=list)
    element_areas: dict[str, float] = field(default_factory=dict)
    asset_pieces: list[dict] = field(default_factory=list)  # zones split by the owner's assets (map CRS)
    assets: AssetTable | None = None  # the owner's asset layer as read (the merge checks it is unchanged)
    map_scale: tuple[float, float] | None = None  # (point scale k, areal scale) of the map CRS at the site
    mosaic: list[Zone] = field(default_factory=list)

    @property
    def zones(self) -> list[Zone]:
        """The site's zones: overlapping zones of different scans united (overlay.zones.mosaic)."""
        return self.mosaic

    @property
    def unit_m(self) -> float:
        return UNIT_TO_M[self.site.drawing_unit]

    def settings(self) -> dict[str, object]:
        s = self.site
        return {
            "drawing_unit": s.drawing_unit,
            "reference": s.reference,
            "percentile": s.percentile,
            "incidence_correction": s.incidence_correction,
            "min_signal_level": s.min_signal_level,
            "min_snr_db": s.min_snr_db,
            "classes": ";".join(f"{c.name}>={c.threshold_db:g}dB" for c in s.classes),
            "min_area_m2": s.min_area_m2,
            "concrete": f"E {s.concrete.modulus_pa / 1e9:.2f} GPa, rho {s.concrete.density:g}, nu {s.concrete.poisson:g}",
            "repair": f"margin {s.margin_m:g} m, {s.footprint} footprint, basis {s.basis}",
            "tolerance_m": s.tolerance_m,
            "accept_misfit": s.accept_misfit,
            "crs": self.crs.to_string() if self.crs else "",
        }


def choose_gate(scan: Scan) -> Gate:
    """The explicit gate if the bundle gives one, else the window derived from the geometry."""
    assert scan.records is not None and scan.sample_rate_hz is not None and scan.band_hz is not None
    src = str(scan.path / "scan.toml")
    if scan.gate_s is not None:
        window, how = scan.gate_s, "explicit gate_s"
    else:
        g = scan.geometry
        if g.source_distance_m is None or g.head_distance_m is None:
            raise SignalError(
                "no gate: give [records].gate_s or [geometry].source_distance_m and head_distance_m", source=src, field="gate"
            )
        window = window_from_geometry(scan.trigger_s, g.source_distance_m, g.head_distance_m, g.air_temperature_c)
        how = f"from geometry at {g.air_temperature_c:g} °C"
    return make_gate(window, scan.sample_rate_hz, int(scan.records.shape[-1]), scan.band_hz[0], how, source=src)


def scan_grid(scan: Scan, xy: np.ndarray | None = None) -> Grid | ScatterGrid:
    """The scan's grid on coordinates ``xy`` (default: the bundle's): from row/col, else a regular grid
    inferred from the bundle's coordinates, else the points resampled onto one."""
    xy = scan.xy if xy is None else xy
    if scan.row is not None and scan.col is not None:
        return grid_from_indices(xy, scan.row, scan.col)
    regular = infer_grid(scan.xy)
    if regular is None:
        return ScatterGrid(xy)
    r, c = np.nonzero(regular.index >= 0)
    rows = np.empty(scan.n_points, dtype=np.int64)
    cols = np.empty(scan.n_points, dtype=np.int64)
    rows[regular.index[r, c]], cols[regular.index[r, c]] = r, c
    return grid_from_indices(xy, rows, cols)


def grid_positions(grid: Grid | ScatterGrid, n: int) -> np.ndarray | None:
    """Each point's (row, column) on its grid (-1 where it has none), for pictures drawn cell by cell."""
    if isinstance(grid, ScatterGrid):
        return None
    rc = np.full((n, 2), -1, dtype=np.int64)
    r, c = np.nonzero(grid.index >= 0)
    rc[grid.index[r, c]] = np.column_stack([r, c])
    return rc


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


def process_scan(
    scan: Scan, site: Site, entry: ScanEntry, progress: Callable[[int], None] | None = None
) -> ScanResult:
    """One scan from its bundle to zones in the drawing frame."""
    src = str(scan.path)
    n = scan.n_points
    reason = np.where(scan.valid, "", "flagged").astype(object)
    reg = register(scan, entry, site)
    to_drawing = reg.to_drawing
    xy_work = reg.working(scan.xy)
    point_xy = to_drawing.apply(xy_work)
    grid = scan_grid(scan, xy_work)
    spacing = grid.spacing()
    gate: Gate | None = None
    reference: Reference | None = None
    snr = np.full(n, np.nan)
    cos_inc, how = reg.cos_incidence, reg.incidence_how
    incidence_deg = np.degrees(np.arccos(np.clip(cos_inc, 0, 1))) if cos_inc is not None else np.full(n, np.nan)
    if scan.payload == "ver":
        assert scan.ver_db is not None
        energy = np.full(n, np.nan)
        ver = scan.ver_db.astype(np.float64)
        peak = scan.peak_hz if scan.peak_hz is not None else np.full(n, np.nan)
        valid = scan.valid & np.isfinite(ver)
        reason[(reason == "") & ~valid] = "no VER value"
        incidence = "not applicable (ready VER)"
    else:
        assert scan.band_hz is not None
        if scan.payload == "records":
            assert scan.records is not None
            gate = choose_gate(scan)
            sp = records_spectra(scan.records, gate, scan.band_hz, scan.velocity_scale, progress=progress)
        else:
            assert scan.spectra is not None and scan.frequencies is not None
            sp = given_spectra(scan.spectra, scan.frequencies, scan.band_hz, scan.velocity_scale)
        energy, peak, snr = sp.energy, sp.peak_hz, sp.snr_db
        if cos_inc is not None and site.incidence_correction:
            energy = normal_energy(energy, cos_inc)
            incidence = f"applied ({how}; largest {np.nanmax(incidence_deg):.1f} deg)"
        else:
            incidence = "off" if cos_inc is not None else how
        valid = scan.valid.copy()
        for bad, why in _quality_checks(scan, sp.finite, snr, site):
            reason[valid & bad] = why
            valid &= ~bad
        if not valid.any():
            raise SignalError("no valid point in the scan (all flagged, non-finite or below the quality floors)", source=src)
        region = healthy_mask(scan, entry, point_xy) if site.reference == "region" else None
        reference = reference_energy(energy, valid, site.reference, site.percentile, region, source=src,
                                     xy_m=point_xy * UNIT_TO_M[site.drawing_unit])
        ver = ver_db(energy, reference.at_points())
        bad = valid & ~np.isfinite(ver)
        reason[bad] = "zero energy"
        valid &= np.isfinite(ver)
    if not valid.any():
        raise SignalError("no valid point in the scan", source=src)
    u = UNIT_TO_M[site.drawing_unit]

    element = entry.element or scan.element or ""
    surveyed = scan.surveyed.astimezone(dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ") if scan.surveyed else ""
    spacing_d = spacing * to_drawing.local_scale(xy_work)  # grid spacing in drawing units
    scan_area = grid.extent()
    extent = to_drawing.apply_geometry(scan_area)
    values = grid.contour_values(ver, valid)
    zone_psd = _zone_psd_source(scan, gate)
    band_freqs, healthy = _healthy_spectrum(zone_psd, ver, valid)
    zones: list[Zone] = []
    find_parent = parent_finder([])
    lower = None
    for ci, zc in enumerate(site.classes):
        contours = _class_contours(grid, values, zc.threshold_db, scan_area, to_drawing, spacing_d, lower,
                                   site.min_area_m2 / (u * u))
        built = []
        for k, contour in enumerate(contours, start=1):
            zone = _build_zone(f"{scan.scan_id}.{zc.name}.{k:02d}", scan.scan_id, element, zc.name, zc.threshold_db,
                               contour, surveyed, point_xy, ver, peak, snr, valid, spacing_d, extent, u, zone_psd)
            parent = find_parent(contour)
            others = shapely.union_all([c for j, c in enumerate(contours) if j != k - 1]) if ci == 0 else None
            _attach_repair(zone, parent, site, extent, u, (point_xy, ver, valid, others))
            built.append(zone)
        if ci == 0:
            find_parent = parent_finder(built)
        zones.extend(built)
        lower = shapely.union_all([z.contour for z in built]) if built else Polygon()
    return ScanResult(
        scan_id=scan.scan_id,
        element=element,
        surveyed=surveyed,
        kind=scan.kind,
        payload=scan.payload,
        n_points=n,
        gate=gate,
        reference=reference,
        incidence=incidence,
        fit=reg.fit,
        fit_passed=reg.passed,
        fit_describe=reg.describe,
        spacing_m=spacing_d * u,
        extent=extent,
        point_ids=scan.point_ids,
        point_xy=point_xy,
        energy=energy,
        ver_db=ver,
        peak_hz=peak,
        snr_db=snr,
        incidence_deg=incidence_deg,
        valid=valid,
        invalid_reason=reason,
        targets=reg.targets,
        zones=zones,
        band_freqs=band_freqs,
        healthy_spectrum=healthy,
        grid_rc=grid_positions(grid, n),
    )


def _class_contours(grid: Grid | ScatterGrid, values: np.ma.MaskedArray, level: float, scan_area: Polygon,
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


def _zone_psd_source(scan: Scan, gate: Gate | None) -> Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]] | None:
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


def _healthy_spectrum(zone_psd: Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]] | None, ver: np.ndarray,
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


def _build_zone(zone_id: str, scan_id: str, element: str, cls: str, threshold: float, contour: Polygon, surveyed: str,
                xy: np.ndarray, ver: np.ndarray, peak: np.ndarray, snr: np.ndarray, valid: np.ndarray,
                spacing_d: float, extent: Polygon, u: float,
                zone_psd: Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]] | None) -> Zone:
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


def _attach_repair(zone: Zone, parent: Zone | None, site: Site, extent: Polygon, u: float,
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
    basis = zone.defect if site.basis == "outline" else zone.contour
    rect, length, width = repair_footprint(basis, site.margin_m / u, site.footprint)
    zone.footprint = rect
    zone.footprint_area_m2 = rect.area * u * u
    zone.footprint_length_m, zone.footprint_width_m = length * u, width * u
    zone.volume_low_m3 = zone.footprint_area_m2 * zone.depth_low_m
    zone.volume_high_m3 = zone.footprint_area_m2 * zone.depth_high_m


def _quality_checks(scan: Scan, finite: np.ndarray, snr: np.ndarray, site: Site) -> list[tuple[np.ndarray, str]]:
    """(mask of failing points, reason) per quality rule, in the order reasons are given."""
    checks = [(~finite, "non-finite data")]
    if scan.signal_level is not None and site.min_signal_level > 0:
        checks.append((np.nan_to_num(scan.signal_level, nan=0.0) < site.min_signal_level, "low signal"))
    if site.min_snr_db is not None:
        checks.append((~(snr >= site.min_snr_db), "low SNR"))
    return checks


def locate_zones(zones: list[Zone], site: Site, to_map: Similarity | None) -> None:
    """Station and offset of each zone's centroid, and its station range, along the site's alignment."""
    spec = site.alignment
    assert spec is not None
    if spec.frame == "map" and to_map is None:
        raise SiteFileError("alignment in the map frame needs a [map] placement", source=site.path, field="alignment.frame")
    unit = 1.0 if spec.frame == "map" else UNIT_TO_M[site.drawing_unit]
    line = Alignment.from_points(list(spec.points), spec.start_station_m)
    move = (lambda g: to_map.apply_geometry(g)) if spec.frame == "map" else (lambda g: g)  # type: ignore[union-attr]
    for z in zones:
        c = move(z.contour.centroid)
        st, off = line.station_offset(np.array([[c.x, c.y]]), unit)
        z.station_m, z.offset_m = float(st[0]), float(off[0])
        z.station_from_m, z.station_to_m = line.station_range(move(z.contour), unit)


def map_placement(site: Site, site_xy: np.ndarray) -> tuple[Similarity | None, pyproj.CRS | None, Fit | None]:
    """Drawing → map transform and CRS from the site file, checked with pyproj (a similarity either way)."""
    m = site.map
    if m is None:
        return None, None, None
    src = str(site.path)
    crs = to_crs(m.crs, source=src, field="map.crs")
    fit = None
    if m.origin is not None:
        t = from_placement(m.origin, m.bearing_deg, m.scale, site.drawing_unit)
    else:
        fit = fit_points(
            "similarity",
            np.array([mo.drawing for mo in m.monuments]),
            np.array([mo.map for mo in m.monuments]),
            [mo.name for mo in m.monuments],
            what="monuments",
        )
        check_fit(fit, m.tolerance_m, "m", accept=site.accept_misfit, source=src)
        assert isinstance(fit.transform, Similarity)
        t = fit.transform
        k = t.scale / UNIT_TO_M[site.drawing_unit]
        if not SCALE_RANGE[0] <= k <= SCALE_RANGE[1]:
            raise RegistrationError(f"the monuments give {k:.6g} map metres per drawing metre (drawing_unit "
                                    f"{site.drawing_unit!r}); expected about 1 — check the drawing unit and the monuments",
                                    source=src, field="map.monuments")
    check_map_crs(crs, t.apply(site_xy), source=src)
    return t, crs, fit


def scan_entry(entry: ScanEntry, site: Site, progress: Callable[[int], None] | None = None) -> ScanResult:
    """Read one bundle and process it (the unit of work of a campaign)."""
    return process_scan(read_bundle(entry.bundle), site, entry, progress)


def finish_site(site: Site, results: list[ScanResult], started: str, caught: list[str]) -> RunResult:
    """From per-scan results to the site: unique ids, map placement and checks, mosaic, stations, assets."""
    ids = [r.scan_id for r in results]
    dup = {i for i in ids if ids.count(i) > 1}
    if dup:
        raise BundleError(f"scan id(s) {', '.join(sorted(dup))} used by more than one bundle", source=site.path)
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        corners = np.concatenate([np.asarray(r.extent.exterior.coords) for r in results if not r.extent.is_empty]
                                 or [np.zeros((0, 2))])
        to_map, crs, map_fit = map_placement(site, corners)
        scale = site_scale_factor(crs, to_map.apply(corners)) if crs is not None and to_map is not None and len(corners) else None
        zones = mosaic_zones([z for r in results for z in r.zones], site, UNIT_TO_M[site.drawing_unit])
        if site.alignment is not None:
            locate_zones(zones, site, to_map)
        assets, layer = None, None
        if site.elements is not None:
            assets = read_asset_table(site.elements)
            layer = element_layer(assets, crs, to_map, UNIT_TO_M[site.drawing_unit], site.elements.where)
    for w in seen:
        caught.append(str(w.message))
        warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    pieces = split_by_assets(zones, site.basis, to_map, layer) if layer else []
    return RunResult(site, results, to_map, crs, map_fit, started, warnings=caught, mosaic=zones,
                     element_areas=layer.areas_m2 if layer else {}, asset_pieces=pieces, map_scale=scale, assets=assets)


def now_utc() -> str:
    return dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def run_site(
    site: Site,
    *,
    on_scan: Callable[[str, int], None] | None = None,
    progress: Callable[[int], None] | None = None,
) -> RunResult:
    """Process every scan of a site in this process; the first failing scan stops the run with its error.

    (overlay.campaign runs scans in parallel, keeps going past failures and caches.)
    """
    started = now_utc()
    results: list[ScanResult] = []
    caught: list[str] = []
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        for entry in site.scans:
            scan = read_bundle(entry.bundle)
            if on_scan is not None:
                on_scan(scan.scan_id, scan.n_points)
            results.append(process_scan(scan, site, entry, progress))
    for w in seen:
        caught.append(str(w.message))
        warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    return finish_site(site, results, started, caught)
