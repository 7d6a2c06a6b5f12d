"""The defect outline from the plate model — and only where the model fits the data.

A contour at an absolute VER level lies inside a defect's edge, because the flexural
vibration fades to zero there.  Concrete over a delamination rings like a clamped plate:
its energy over the local sound concrete goes as 1 + G·φ², φ the first mode shape.  This
module fits that model to the VER around a zone, for two plate outlines with their first
modes — an ellipse (the clamped circular plate's Bessel mode on the elliptical radius,
exact for a circle) and a rectangle (a product of clamped-clamped beam modes, Warburton's
approximation) — each with a free position, orientation, size and gain, and keeps the
better.  How well it explains the data is its *misfit*: the RMS residual of the VER inside
the fitted plate over the scatter of the sound concrete around it (at least
``NOISE_FLOOR_DB``).  A plate that rings as modelled leaves residuals like the noise
(misfit about 1); a flat-topped hollow, several sources, an irregular or partly bonded
defect leave systematic ones.  Above ``MISFIT_MAX`` the plate is not what rings, and the
caller falls back to the class contour.

Frequency constants of the fitted plates (for the depth) come from the Rayleigh quotient
of the same mode shapes, referred to the radius of the circle of equal area.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
import shapely
import shapely.affinity
from shapely.geometry import Polygon

from overlay.zones.plate import (
    clamped_lambda,
    clamped_mode_shape,
    simply_supported_lambda,
)

SHAPES = ("ellipse", "rectangle")
MISFIT_MAX = 2.0  # above this the model does not explain the zone (set from the validation set, docs/zones.md:
# clamped-plate responses 0.6–1.2, flat-topped 3.4–11, double-peaked 2.4–8)
NOISE_FLOOR_DB = 0.5  # the least scatter a fit is held to: smooth synthetic maps have none
BEAM_ROOT = 4.730040744862704  # first root of cos(x)·cosh(x) = 1: the clamped-clamped beam (Blevins, from memory)
WINDOW = 1.0  # the fit uses points within this many equivalent radii beyond the first-guess outline
MIN_FIT_POINTS = 12
# the fit takes every k-th point of a bigger window, the misfit is measured on all of them: 400 evenly spread
# points pin seven parameters, and a 50,000-point scan's ten fits took 0.4 s instead of 2.6 s (0.3 % in area)
MAX_FIT_POINTS = 400


def beam_mode(xi: np.ndarray) -> np.ndarray:
    """First clamped-clamped beam mode on ξ ∈ [−1, 1] (half-lengths), 1 at the middle, 0 beyond the ends."""
    b = BEAM_ROOT / 2
    xi = np.clip(np.abs(np.asarray(xi, dtype=np.float64)), 0.0, 1.0)
    w = np.cos(b * xi) / math.cos(b) - np.cosh(b * xi) / math.cosh(b)
    return w / (1 / math.cos(b) - 1 / math.cosh(b))


TABLE = np.linspace(0.0, 1.0, 4097)  # linear interpolation on this step errs by under 1e-6 of the peak


@lru_cache(maxsize=2)
def _table(kind: str) -> np.ndarray:
    """The tabled shape: "ellipse" (the clamped circular mode on the radius) or "beam" (clamped-clamped)."""
    return {"ellipse": clamped_mode_shape, "beam": beam_mode}[kind](TABLE)


def _tabled(t: np.ndarray, kind: str) -> np.ndarray:
    """A mode shape at |t| (0 at and beyond 1), by linear interpolation in its table."""
    return np.interp(np.abs(t), TABLE, _table(kind), right=0.0)


@dataclass(frozen=True)
class Plate:
    """A plate outline: centre, orientation (radians, of its first axis), semi-axes or half-sides a ≥ …, b."""

    shape: str
    cx: float
    cy: float
    angle: float
    a: float
    b: float

    def __post_init__(self) -> None:
        if self.shape not in SHAPES:
            raise ValueError(f"plate shape must be one of {SHAPES}, got {self.shape!r}")

    def local(self, xy: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        c, s = math.cos(self.angle), math.sin(self.angle)
        dx, dy = xy[:, 0] - self.cx, xy[:, 1] - self.cy
        return (dx * c + dy * s) / self.a, (-dx * s + dy * c) / self.b

    def phi(self, xy: np.ndarray) -> np.ndarray:
        """The first mode shape at ``xy``: 1 at the centre, 0 at the edge and outside (read off tables of
        the radial and beam shapes: a fit evaluates it a thousand times)."""
        u, v = self.local(xy)
        if self.shape == "ellipse":
            return _tabled(np.sqrt(u * u + v * v), "ellipse")
        return _tabled(u, "beam") * _tabled(v, "beam")

    def polygon(self) -> Polygon:
        if self.shape == "ellipse":
            p = shapely.affinity.scale(shapely.Point(0, 0).buffer(1.0, quad_segs=32), self.a, self.b)
        else:
            p = shapely.box(-self.a, -self.b, self.a, self.b)
        p = shapely.affinity.rotate(p, self.angle, origin=(0, 0), use_radians=True)
        return shapely.affinity.translate(p, self.cx, self.cy)

    @property
    def area(self) -> float:
        return math.pi * self.a * self.b if self.shape == "ellipse" else 4 * self.a * self.b


@dataclass(frozen=True)
class OutlineFit:
    plate: Plate | None
    misfit: float  # RMS residual inside the plate / sound scatter around it; NaN when there was nothing to fit
    gain_db: float
    n_points: int


def _model(p: np.ndarray, shape: str, xy: np.ndarray) -> np.ndarray:
    cx, cy, angle, la, lb, gdb, c0 = p
    plate = Plate(shape, cx, cy, angle, math.exp(la), math.exp(lb))
    return c0 + 10.0 * np.log10(1.0 + (10 ** (gdb / 10) - 1) * plate.phi(xy) ** 2)


def _first_guess(contour: Polygon, scale: float) -> tuple[float, float, float, float, float]:
    """(cx, cy, angle, a, b) of an outline of the contour's orientation and elongation, ``scale`` times its size."""
    c = contour.centroid
    rect = contour.minimum_rotated_rectangle
    xy = np.asarray(rect.exterior.coords)[:3]
    sides = np.hypot(*np.diff(xy, axis=0).T)
    k = int(np.argmax(sides))
    d = xy[k + 1] - xy[k]
    angle = math.atan2(d[1], d[0])
    ratio = max(sides.min(), 1e-9) / max(sides.max(), 1e-9)
    # half-axes of the contour's shape with its area, grown by the model's scale
    a = math.sqrt(contour.area / (math.pi * ratio)) * scale
    return c.x, c.y, angle, a, a * ratio


def fit_plate(contour: Polygon, xy: np.ndarray, ver: np.ndarray, usable: np.ndarray, scale: float,
              ver_max: float, others: Polygon | None = None) -> OutlineFit:
    """The plate (ellipse or rectangle) whose first mode best explains the VER around ``contour``.

    ``scale``: the circular model's ratio of outline to contour (the first guess of the size);
    ``others``: the contours of other defects, whose points are left out of the fit.
    """
    cx, cy, angle, a, b = _first_guess(contour, scale)
    guess = Plate("ellipse", cx, cy, angle, a, b).polygon()
    r_eq = math.sqrt(guess.area / math.pi)
    window = guess.buffer(WINDOW * r_eq)
    take = usable & np.isfinite(ver) & shapely.contains_xy(window, xy[:, 0], xy[:, 1])
    if others is not None and not others.is_empty:
        take &= ~shapely.contains_xy(others, xy[:, 0], xy[:, 1])
    if take.sum() < MIN_FIT_POINTS or not math.isfinite(ver_max):  # no VER in the zone itself: nothing to scale
        return OutlineFit(None, float("nan"), float("nan"), int(take.sum()))
    pts_all, v_all = xy[take], ver[take]
    k = -(-len(v_all) // MAX_FIT_POINTS)  # every k-th point: a big defect on a fine grid fits as fast as a small one
    pts, v = pts_all[::k], v_all[::k]
    outside = v[~shapely.contains_xy(guess, pts[:, 0], pts[:, 1])]
    c0 = float(np.median(outside)) if outside.size else 0.0
    import scipy.optimize  # here, not at import: a run without zones need not load it

    best: tuple[float, np.ndarray, str] | None = None
    for shape in SHAPES:
        gain = max(ver_max - c0, 1.0)  # the peak over the background around it
        start = np.array([cx, cy, angle, math.log(a), math.log(b), gain, c0])
        lo = [cx - 2 * r_eq, cy - 2 * r_eq, -np.inf, math.log(0.3 * a), math.log(0.3 * b), 0.5, c0 - 6]
        hi = [cx + 2 * r_eq, cy + 2 * r_eq, np.inf, math.log(3 * a), math.log(3 * b), gain + 10, c0 + 6]
        res = scipy.optimize.least_squares(lambda p: _model(p, shape, pts) - v, start, bounds=(lo, hi),
                                           loss="soft_l1", f_scale=1.0, max_nfev=400)
        cost = float(np.sum((_model(res.x, shape, pts) - v) ** 2))
        if best is None or cost < best[0]:
            best = (cost, res.x, shape)
    assert best is not None  # the start lies within the bounds by construction, so both fits run
    cost, p, shape = best
    pts, r = pts_all, _model(p, shape, pts_all) - v_all  # the misfit over every point of the window
    a_fit, b_fit, angle_fit = math.exp(p[3]), math.exp(p[4]), float(p[2])
    if b_fit > a_fit:  # keep a the first (long) axis
        a_fit, b_fit, angle_fit = b_fit, a_fit, angle_fit + math.pi / 2
    plate = Plate(shape, float(p[0]), float(p[1]), float(math.remainder(angle_fit, math.pi)), a_fit, b_fit)
    inside = shapely.contains_xy(plate.polygon(), pts[:, 0], pts[:, 1])
    out = r[~inside]
    scatter = 1.4826 * float(np.median(np.abs(out - np.median(out)))) if out.size >= 5 else 0.0
    misfit = float(np.sqrt(np.mean(r[inside] ** 2))) / max(scatter, NOISE_FLOOR_DB) if inside.any() else float("inf")
    return OutlineFit(plate, misfit, float(p[5]), int(take.sum()))


# --- frequency constants of the fitted plates ------------------------------------------------------

def _rayleigh_lambda2_eq(shape: str, ratio: float, n: int = 401) -> float:
    """λ² referred to the equal-area radius, ω = λ²/r² · sqrt(D/ρh), from the Rayleigh quotient
    ∫(∇²w)² / ∫w² of the mode shape (clamped edges: the Gaussian-curvature term integrates to 0)."""
    plate = Plate(shape, 0.0, 0.0, 0.0, 1.0, ratio)
    g = np.linspace(-1.02, 1.02, n)
    h = g[1] - g[0]
    xx, yy = np.meshgrid(g, g)
    w = plate.phi(np.column_stack([xx.ravel(), yy.ravel()])).reshape(xx.shape)
    lap = (np.roll(w, 1, 0) + np.roll(w, -1, 0) + np.roll(w, 1, 1) + np.roll(w, -1, 1) - 4 * w) / h**2
    omega2 = float(np.sum(lap[1:-1, 1:-1] ** 2) / np.sum(w[1:-1, 1:-1] ** 2))
    return math.sqrt(omega2) * plate.area / math.pi


@lru_cache(maxsize=256)
def clamped_lambda2_eq(shape: str, ratio: float) -> float:
    """Clamped plate, first mode, λ² referred to the radius of the circle of equal area.

    Exact for a circle (λ² = 10.2158, Leissa NASA SP-160 Table 2.1); otherwise the Rayleigh value
    of the fitted mode shape, scaled by the circle's exact-to-Rayleigh ratio (a few tenths of a
    per cent) so both share one numerical error."""
    ratio = round(ratio, 3)
    if shape == "ellipse" and ratio == 1.0:
        return clamped_lambda() ** 2
    exact_over_numeric = clamped_lambda() ** 2 / _rayleigh_lambda2_eq("ellipse", 1.0)
    return _rayleigh_lambda2_eq(shape, ratio) * exact_over_numeric


def simply_supported_lambda2_eq(shape: str, ratio: float, poisson: float) -> float:
    """Simply supported plate, first mode, referred to the equal-area radius: exact for rectangles
    (ω = π²(1/A² + 1/B²)·sqrt(D/ρh), sides A, B; Leissa NASA SP-160 §4.1), and for ellipses the
    clamped value times the circle's simply-supported-to-clamped ratio (an approximation)."""
    if shape == "rectangle":
        a, b = 2.0, 2.0 * ratio  # sides
        return math.pi**2 * (1 / a**2 + 1 / b**2) * (a * b / math.pi)
    return clamped_lambda2_eq(shape, ratio) * simply_supported_lambda(poisson) ** 2 / clamped_lambda() ** 2
