"""Zones: contour polygons of one scan with what a contractor and an owner need to know of them.

Pure functions; docs/zones.md explains every formula with an example.

* Confidence (0–1) is the product of four factors, each kept as its own field:
  support (points inside), contrast (VER margin over the class level),
  coherence (agreement of the per-point peak frequencies) and quality (valid
  share around the zone × in-band SNR).
* The defect outline: a contour at an absolute level lies inside the defect,
  because the flexural vibration fades to zero at the edge.  With the plate's
  mode shape φ(ρ) (1 at the centre, 0 at the edge) the energy excess over
  sound concrete goes as G·φ², G = 10^(VER_max/10) − 1; the contour at level L
  sits where φ = sqrt((10^(L/10) − 1)/G), i.e. at a fraction ρ_L of the
  defect's radius, so the contour scaled by 1/ρ_L about its centroid estimates
  the outline.
* The depth: the defect as a thin circular plate of the outline's area,
  thickness from its peak frequency, between a clamped and a simply
  supported edge.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import shapely
import shapely.affinity
from shapely.geometry import Polygon

from overlay.zones.outline import clamped_lambda2_eq, simply_supported_lambda2_eq
from overlay.zones.plate import aci318_modulus_pa, clamped_mode_shape, plate_thickness

SUPPORT_POINTS = 4.0
CONTRAST_DB = 3.0
COHERENCE_SPREAD = 0.15
SNR_DB = 6.0
MAX_OUTLINE_SCALE = 3.0

ZONE_FIELDS = (
    "zone_id", "scan_id", "element", "class", "threshold_db", "defect_id",
    "area_m2", "area_low_m2", "area_high_m2", "perimeter_m", "outline_area_m2",
    "n_points", "ver_max_db", "ver_mean_db", "peak_hz", "peak_spread", "depth_low_m", "depth_high_m",
    "footprint_area_m2", "footprint_length_m", "footprint_width_m", "volume_low_m3", "volume_high_m3",
    "outline_basis", "outline_shape", "outline_misfit",
    "confidence", "conf_support", "conf_contrast", "conf_coherence", "conf_quality", "conf_outline",
    "station_m", "offset_m", "station_from_m", "station_to_m", "surveyed", "provenance",
)


@dataclass(frozen=True)
class Concrete:
    """Material of the cover over a delamination; defaults: normal-weight concrete, f'c 30 MPa by ACI 318."""

    modulus_pa: float = field(default_factory=lambda: aci318_modulus_pa(30.0))
    density: float = 2400.0
    poisson: float = 0.2


@dataclass
class Zone:
    """One screening zone of one class in one scan; geometries in the drawing frame (drawing units).

    ``contour`` is the class-level contour, ``defect`` the estimated defect outline (shared by
    the nested zones of one defect, ``defect_id``), ``footprint`` the repair rectangle.
    """

    zone_id: str
    scan_id: str
    element: str
    class_name: str
    threshold_db: float
    contour: Polygon
    area_m2: float
    area_low_m2: float
    area_high_m2: float
    perimeter_m: float
    n_points: int
    ver_max_db: float
    ver_mean_db: float
    peak_hz: float
    peak_spread: float
    confidence: float
    conf_support: float
    conf_contrast: float
    conf_coherence: float
    conf_quality: float
    surveyed: str = ""
    defect_id: str = ""
    defect: Polygon = field(default_factory=Polygon)
    outline_area_m2: float = float("nan")
    depth_low_m: float = float("nan")
    depth_high_m: float = float("nan")
    footprint: Polygon = field(default_factory=Polygon)
    footprint_area_m2: float = float("nan")
    footprint_length_m: float = float("nan")
    footprint_width_m: float = float("nan")
    volume_low_m3: float = float("nan")
    volume_high_m3: float = float("nan")
    station_m: float = float("nan")
    offset_m: float = float("nan")
    station_from_m: float = float("nan")
    station_to_m: float = float("nan")
    outline_basis: str = ""  # "model": the fitted plate; "contour": the model did not fit, the class contour
    outline_shape: str = ""  # "ellipse" or "rectangle" with the model, "" with the contour
    outline_misfit: float = float("nan")  # plate model's RMS residual over the sound scatter (≤ 2: model kept)
    conf_outline: float = 1.0
    provenance: str = ""  # the per-scan zones a mosaic zone was united from
    spectrum: np.ndarray | None = None  # the zone's averaged band PSD, (m/s)^2/Hz

    def record(self) -> dict[str, object]:
        """The attributes, in export order, without geometries and spectrum."""
        return {k: getattr(self, "class_name" if k == "class" else k) for k in ZONE_FIELDS}


def confidence_factors(
    n_points: int, ver_max_db: float, threshold_db: float, peak_spread: float, valid_share: float, snr_db: float
) -> tuple[float, float, float, float]:
    """(support, contrast, coherence, quality), each in 0–1 and rising with its evidence.

    An unknown peak spread or SNR (ready VER without spectra) leaves its factor at 1.
    """
    support = 1.0 - math.exp(-max(n_points, 0) / SUPPORT_POINTS)
    contrast = 1.0 - math.exp(-max(ver_max_db - threshold_db, 0.0) / CONTRAST_DB)
    coherence = 1.0 if not np.isfinite(peak_spread) else math.exp(-max(peak_spread, 0.0) / COHERENCE_SPREAD)
    snr_factor = 1.0 if not np.isfinite(snr_db) else 1.0 - math.exp(-max(snr_db, 0.0) / SNR_DB)
    quality = min(max(valid_share, 0.0), 1.0) * snr_factor
    return support, contrast, coherence, quality


def peak_spread(peaks: np.ndarray) -> float:
    """Scatter of per-point peak frequencies: interquartile range over median (0 = all agree)."""
    p = peaks[np.isfinite(peaks)]
    if p.size < 2:
        return float("nan")
    q1, q2, q3 = np.percentile(p, [25, 50, 75])
    return float((q3 - q1) / q2) if q2 > 0 else float("nan")


def point_stats(
    poly: Polygon, xy: np.ndarray, ver: np.ndarray, peak: np.ndarray, snr: np.ndarray, usable: np.ndarray, spacing: float
) -> dict[str, float]:
    """Per-point statistics of one polygon (``xy`` in the polygon's frame)."""
    inside = shapely.contains_xy(poly, xy[:, 0], xy[:, 1])
    good = inside & usable & np.isfinite(ver)
    near = shapely.contains_xy(poly.buffer(spacing), xy[:, 0], xy[:, 1])
    share = float(usable[near].mean()) if near.any() else 0.0
    n = int(good.sum())
    pk = peak[good]
    s = snr[good]
    return {
        "n_points": n,
        "ver_max_db": float(ver[good].max()) if n else float("nan"),
        "ver_mean_db": float(ver[good].mean()) if n else float("nan"),
        "peak_hz": float(np.nanmedian(pk)) if np.isfinite(pk).any() else float("nan"),
        "peak_spread": peak_spread(pk),
        "snr_db": float(np.nanmedian(s)) if np.isfinite(s).any() else float("nan"),
        "valid_share": share,
        "inside": good,
    }


def contour_fraction(ver_max_db: float, threshold_db: float) -> float:
    """ρ_L: where, as a fraction of the defect radius, the contour at ``threshold_db`` lies."""
    gain = 10.0 ** (ver_max_db / 10.0) - 1.0
    need = 10.0 ** (threshold_db / 10.0) - 1.0
    if not gain > 0 or need <= 0:
        return 1.0
    phi = min(math.sqrt(need / gain), 1.0)
    rho = np.linspace(0.0, 1.0, 4001)
    shape = clamped_mode_shape(rho)
    return float(np.interp(phi, shape[::-1], rho[::-1]))


def defect_outline(contour: Polygon, ver_max_db: float, threshold_db: float) -> tuple[Polygon, float]:
    """The estimated defect outline (contour scaled about its centroid by 1/ρ_L, at most 3×) and the scale."""
    rho = contour_fraction(ver_max_db, threshold_db)
    scale = min(1.0 / max(rho, 1e-9), MAX_OUTLINE_SCALE)
    c = contour.centroid
    return shapely.affinity.scale(contour, scale, scale, origin=c), scale


def depth_range(peak_hz: float, area_low_m2: float, area_high_m2: float, concrete: Concrete,
                shape: str = "ellipse", ratio: float = 1.0) -> tuple[float, float]:
    """Cover thickness over the defect (m), low to high.

    Low: clamped edge on the smaller area; high: simply supported edge on the larger area — for
    the plate's outline (a circle by default: λ² = 10.2158 clamped; the fitted ellipse or
    rectangle of overlay.zones.outline otherwise).  Order of magnitude only.
    """
    if not (peak_hz > 0 and area_low_m2 > 0 and area_high_m2 > 0):
        return float("nan"), float("nan")
    c = concrete
    lo = plate_thickness(peak_hz, math.sqrt(area_low_m2 / math.pi), c.modulus_pa, c.density, c.poisson,
                         clamped_lambda2_eq(shape, ratio))
    hi = plate_thickness(peak_hz, math.sqrt(area_high_m2 / math.pi), c.modulus_pa, c.density, c.poisson,
                         simply_supported_lambda2_eq(shape, ratio, c.poisson))
    return lo, hi


def outline_confidence(misfit: float) -> float:
    """The outline's weight in the confidence: 1 while the plate model explains the VER to within its
    scatter (misfit ≤ 1), falling towards 0.5 as the misfit grows (0.68 at 2, 0.52 at 5)."""
    return 0.5 + 0.5 * math.exp(-max(misfit - 1.0, 0.0)) if misfit == misfit else 0.5


def repair_footprint(outline: Polygon, margin: float, mode: str) -> tuple[Polygon, float, float]:
    """Rectangle around the outline grown by ``margin``: axis-aligned (``mode`` "aligned"), or the minimum
    rotated one ("rotated").

    Returns (rectangle, length, width) with length ≥ width, in the outline's units.
    """
    grown = outline.buffer(margin, quad_segs=16)
    rect = grown.envelope if mode == "aligned" else grown.minimum_rotated_rectangle
    xy = np.asarray(rect.exterior.coords)
    sides = np.hypot(*np.diff(xy[:3], axis=0).T)
    return rect, float(sides.max()), float(sides.min())


def parent_finder(parents: list[Zone]):
    """A function giving the zone of ``parents`` whose contour covers a geometry's representative point."""
    tree = shapely.STRtree([p.contour for p in parents]) if parents else None

    def find(geom: Polygon) -> Zone | None:
        if tree is None:
            return None
        hits = tree.query(geom.representative_point(), predicate="intersects")
        return parents[int(min(hits))] if len(hits) else None

    return find


def order_key(poly: Polygon) -> tuple[float, float]:
    """Sort zones by centroid position (rounded) so their numbers do not depend on contour order."""
    c = poly.centroid
    return (round(c.y, 3), round(c.x, 3))
