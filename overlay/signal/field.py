"""The incident sound field over a scan, seen in the energy of its sound concrete.

A loudspeaker's spreading and beam make the incident level vary smoothly over a wide
scan — several dB over a couple of metres.  Every sound point's energy follows it, and so
does a defect's forced response; a scan-wide reference then reads the strong side of the
field as high VER.  This module fits a smooth surface to the band energy (in dB) of the
scan's points, robust to the defects it must ignore, so VER can be measured against the
*local* sound concrete.

The surface is a quadratic in the scan's coordinates (six terms: enough for the spreading
and the beam of a source a few metres away, too stiff to follow a defect), fitted by
iteratively reweighted least squares with Tukey's bisquare weights (tuning 4.685, the
usual 95 %-efficiency constant; Holland & Welsch 1977, from memory), started on the lower
60 % of the energies so the high side — where the defects are — cannot pull the start up.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

BISQUARE_C = 4.685
START_SHARE = 0.60
ITERATIONS = 30
MIN_POINTS = 30
# The robust scale never goes below this: residuals of an exact field are rounding (~1e-14 dB), and a
# scale made of rounding would drop every point from the fit.  0.01 dB is far below any scan's scatter.
SCALE_FLOOR_DB = 0.01


@dataclass(frozen=True)
class FieldFit:
    """The fitted field (dB) at every point, its span over the valid points, and the sound points' scatter."""

    level_db: np.ndarray  # fitted field at each point (NaN where it was not evaluated)
    span_db: float
    scatter_db: float  # robust standard deviation of the inliers' residuals (bisquare weight > 0)


def _design(xy: np.ndarray, centre: np.ndarray, half: np.ndarray) -> np.ndarray:
    u, v = ((xy - centre) / half).T
    return np.column_stack([np.ones(len(u)), u, v, u * u, u * v, v * v])


def fit_field(xy_m: np.ndarray, energy: np.ndarray, valid: np.ndarray) -> FieldFit | None:
    """The smooth field under the points' energies (see the module docstring), or None with too few points."""
    use = valid & np.isfinite(energy) & (energy > 0)
    if use.sum() < MIN_POINTS:
        return None
    level = 10.0 * np.log10(energy[use])
    pts = xy_m[use]
    centre = (pts.max(axis=0) + pts.min(axis=0)) / 2
    half = np.maximum((pts.max(axis=0) - pts.min(axis=0)) / 2, 1e-9)
    x = _design(pts, centre, half)
    w = (level <= np.quantile(level, START_SHARE)).astype(float)
    coef = np.zeros(x.shape[1])
    for _ in range(ITERATIONS):
        sw = np.sqrt(w)
        coef_new, *_ = np.linalg.lstsq(x * sw[:, None], level * sw, rcond=None)
        r = level - x @ coef_new
        kept = w > 0
        scale = max(1.4826 * float(np.median(np.abs(r[kept] - np.median(r[kept])))), SCALE_FLOOR_DB)
        u = r / (BISQUARE_C * scale)
        w = np.where(np.abs(u) < 1, (1 - u * u) ** 2, 0.0)
        if np.allclose(coef_new, coef, atol=1e-6):
            coef = coef_new
            break
        coef = coef_new
    fitted = np.full(len(energy), np.nan)
    fitted[use] = x @ coef
    r = level - x @ coef
    scatter = float(1.4826 * np.median(np.abs(r[w > 0] - np.median(r[w > 0]))))
    return FieldFit(fitted, float(np.nanmax(fitted) - np.nanmin(fitted)), scatter)
