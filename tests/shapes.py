"""Canonical test fields with analytic level sets (shared by the contour and zone tests)."""

from __future__ import annotations

import numpy as np

SPACING = 0.05
N = 81  # 4 m × 4 m


def circle(xy: np.ndarray) -> tuple[np.ndarray, float, float]:
    """VER = 20 − 40 r²; ≥ 10 dB inside r = 0.5 m: area π/4."""
    r2 = (xy[:, 0] - 2.013) ** 2 + (xy[:, 1] - 1.987) ** 2
    return 20.0 - 40.0 * r2, 10.0, np.pi * 0.25


def ellipse(xy: np.ndarray) -> tuple[np.ndarray, float, float]:
    """≥ 10 dB inside the ellipse of semi-axes 0.8 and 0.4 m rotated 30°: area π·0.32."""
    th = np.radians(30)
    dx, dy = xy[:, 0] - 2.0, xy[:, 1] - 2.0
    u = dx * np.cos(th) + dy * np.sin(th)
    v = -dx * np.sin(th) + dy * np.cos(th)
    return 20.0 - 10.0 * ((u / 0.8) ** 2 + (v / 0.4) ** 2), 10.0, np.pi * 0.32


def annulus(xy: np.ndarray) -> tuple[np.ndarray, float, float]:
    """≥ 16 dB between r = 0.4 and 0.8 m: area π(0.64 − 0.16)."""
    r = np.hypot(xy[:, 0] - 2.0, xy[:, 1] - 2.0)
    return 20.0 - 100.0 * (r - 0.6) ** 2, 16.0, np.pi * 0.48


def l_shape(xy: np.ndarray) -> tuple[np.ndarray, float, float]:
    """A smooth-edged L: union of two rectangles 2.0 × 0.6 and 0.6 × 1.4 (overlap 0.36): area 1.56 m².

    The field is a signed distance to the L, so its 0 level is the L itself.
    """
    import shapely

    poly = shapely.union(shapely.box(1.0, 1.0, 3.0, 1.6), shapely.box(1.0, 1.0, 1.6, 2.4))
    pts = shapely.points(xy)
    d = shapely.distance(poly.boundary, pts)
    inside = shapely.contains(poly, pts)
    return np.where(inside, d, -d) * 10.0, 0.0, poly.area


FIELDS = {"circle": circle, "ellipse": ellipse, "annulus": annulus, "l_shape": l_shape}


def regular(n: int = N, s: float = SPACING) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rr, cc = np.mgrid[0:n, 0:n]
    return np.column_stack([cc.ravel() * s, rr.ravel() * s]), rr.ravel(), cc.ravel()


def curvilinear(n: int = N, s: float = SPACING) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A rotated grid whose rows bend gently (as a scan of a slightly curved lining would)."""
    rr, cc = np.mgrid[0:n, 0:n]
    u = cc.ravel() * s
    v = rr.ravel() * s + 0.05 * np.sin(u)
    th = np.radians(20)
    x = 2.0 + (u - 2.0) * np.cos(th) - (v - 2.0) * np.sin(th)
    y = 2.0 + (u - 2.0) * np.sin(th) + (v - 2.0) * np.cos(th)
    return np.column_stack([x, y]), rr.ravel(), cc.ravel()


def scattered(n: int = 7000, seed: int = 0) -> np.ndarray:
    """Jittered points over 4 m × 4 m at about the grid's density (no row/col)."""
    xy, _, _ = regular()
    rng = np.random.default_rng(seed)
    return xy + rng.uniform(-0.4, 0.4, xy.shape) * SPACING
