"""Zones: the contour polygons of one scan with the attributes a contractor and an owner need.

Confidence (0–1) is the product of three factors, each in 0–1 and each kept as
its own field so a reader can see why a zone scored low (docs/zones.md):

* support  = 1 − exp(−n / 4): n valid measurement points inside the zone;
* contrast = 1 − exp(−(VER_max − threshold) / 3 dB): how far the zone rises above its class level;
* quality  = share of valid points among all points within one grid spacing of the zone.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np
import shapely
from shapely.geometry import Polygon

SUPPORT_POINTS = 4.0
ZONE_FIELDS = (
    "zone_id", "scan_id", "element", "class", "threshold_db", "area_m2", "perimeter_m", "n_points",
    "ver_max_db", "ver_mean_db", "peak_hz", "confidence", "conf_support", "conf_contrast", "conf_quality",
    "surveyed",
)
CONTRAST_DB = 3.0


@dataclass
class Zone:
    """One suspect zone of one class in one scan; ``outline`` in the drawing frame (drawing units)."""

    zone_id: str
    scan_id: str
    element: str
    class_name: str
    threshold_db: float
    outline: Polygon
    area_m2: float
    perimeter_m: float
    n_points: int
    ver_max_db: float
    ver_mean_db: float
    peak_hz: float
    confidence: float
    conf_support: float
    conf_contrast: float
    conf_quality: float
    surveyed: str = ""

    def record(self) -> dict[str, object]:
        """The attributes, in export order, without the geometry."""
        d = asdict(self)
        d.pop("outline")
        d["class"] = d.pop("class_name")
        return {k: d[k] for k in ZONE_FIELDS}


def confidence_factors(n_points: int, ver_max_db: float, threshold_db: float, valid_share: float) -> tuple[float, float, float]:
    """(support, contrast, quality), each in 0–1 and rising with its input."""
    support = 1.0 - math.exp(-max(n_points, 0) / SUPPORT_POINTS)
    contrast = 1.0 - math.exp(-max(ver_max_db - threshold_db, 0.0) / CONTRAST_DB)
    quality = min(max(valid_share, 0.0), 1.0)
    return support, contrast, quality


def point_stats(
    poly: Polygon, xy: np.ndarray, ver: np.ndarray, peak: np.ndarray, usable: np.ndarray, spacing: float
) -> dict[str, float]:
    """Per-point statistics of one polygon, in the frame of ``xy`` (the scanner frame)."""
    inside = shapely.contains_xy(poly, xy[:, 0], xy[:, 1])
    good = inside & usable & np.isfinite(ver)
    near = shapely.contains_xy(poly.buffer(spacing), xy[:, 0], xy[:, 1])
    share = float(usable[near].mean()) if near.any() else 0.0
    n = int(good.sum())
    pk = peak[good & np.isfinite(peak)]
    return {
        "n_points": n,
        "ver_max_db": float(ver[good].max()) if n else float("nan"),
        "ver_mean_db": float(ver[good].mean()) if n else float("nan"),
        "peak_hz": float(np.median(pk)) if pk.size else float("nan"),
        "valid_share": share,
    }


def order_key(poly: Polygon) -> tuple[float, float]:
    """Sort zones by centroid position (rounded) so their numbers do not depend on contour order."""
    c = poly.centroid
    return (round(c.y, 3), round(c.x, 3))
