"""The plate-outline fit on synthetic VER maps: known plates are recovered, a plateau is refused.

References: the clamped-clamped beam's first mode (Blevins, *Formulas for Natural Frequency and
Mode Shape*: βL = 4.7300, w = 0 and w' = 0 at both ends; from memory) for the rectangle's shape; the
maps of known plates are made with a finite-difference mode (tests/independent_cases.py) so the fit
is not checked against its own model.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import shapely
import shapely.affinity

from overlay.zones.outline import MISFIT_MAX, Plate, beam_mode, fit_plate
from overlay.zones.plate import clamped_mode_shape

from .independent_cases import Defect, _shape_field


def test_beam_mode_is_clamped_at_both_ends() -> None:
    xi = np.linspace(-1, 1, 20001)
    w = beam_mode(xi)
    assert w[10000] == pytest.approx(1.0, abs=1e-12) and w[0] == pytest.approx(0.0, abs=1e-12)
    slope = np.gradient(w, xi)
    assert abs(slope[0]) < 1e-3 and abs(slope[-1]) < 1e-3  # zero slope: clamped
    assert (w >= -1e-12).all() and beam_mode(np.array([1.5]))[0] == 0.0  # no node inside, 0 beyond the ends


@pytest.mark.parametrize("shape", ["ellipse", "rectangle"])
def test_plate_geometry(shape: str) -> None:
    p = Plate(shape, 1.0, 2.0, math.radians(30), 0.4, 0.2)
    assert p.polygon().area == pytest.approx(p.area, rel=2e-3)
    assert p.phi(np.array([[1.0, 2.0]]))[0] == pytest.approx(1.0)
    far = np.array([[1.0 + 0.5 * math.cos(math.radians(30)), 2.0 + 0.5 * math.sin(math.radians(30))]])
    assert p.phi(far)[0] == 0.0  # beyond the long axis' end
    if shape == "ellipse":  # the circular clamped mode on the elliptical radius
        mid = np.array([[1.0 + 0.2 * math.cos(math.radians(30)), 2.0 + 0.2 * math.sin(math.radians(30))]])
        assert p.phi(mid)[0] == pytest.approx(float(clamped_mode_shape(np.array([0.5]))[0]))


def _map(defect: Defect, spacing: float, noise_db: float, seed: int = 1) -> tuple[np.ndarray, np.ndarray]:
    """VER (dB) on a grid around a finite-difference plate mode, 20 dB peak, with scatter."""
    xx, yy, w = _shape_field(defect)
    g = np.arange(0.0, 1.0 + 1e-9, spacing)
    gx, gy = np.meshgrid(g, g)
    xy = np.column_stack([gx.ravel(), gy.ravel()])
    import scipy.interpolate

    f = scipy.interpolate.RegularGridInterpolator((yy[:, 0], xx[0]), w, bounds_error=False, fill_value=0.0)
    phi = f(np.column_stack([xy[:, 1], xy[:, 0]]))
    ver = 10 * np.log10(1 + (10 ** (defect.gain_db / 10) - 1) * phi**2)
    ver += np.random.default_rng(seed).normal(0, noise_db, len(ver))
    return xy, ver


def _fit(defect: Defect, spacing: float = 0.025, noise_db: float = 0.4):
    xy, ver = _map(defect, spacing, noise_db)
    from overlay.zones.contour import level_polygons
    from overlay.zones.grid import infer_grid

    grid = infer_grid(xy)
    contour = level_polygons(grid, grid.values(ver, np.ones(len(ver), bool)), 6.0)[0]
    from overlay.zones.zone import defect_outline

    _, scale = defect_outline(contour, float(ver.max()), 6.0)
    return fit_plate(contour, xy, ver, np.ones(len(ver), bool), scale, float(ver.max())), contour


def test_a_clamped_ellipse_is_recovered() -> None:
    d = Defect("ellipse2", (0.5, 0.5), 0.2, angle_deg=20.0)
    fit, _ = _fit(d)
    assert fit.plate is not None and fit.misfit <= MISFIT_MAX
    truth = d.polygon()
    assert fit.plate.area == pytest.approx(truth.area, rel=0.10)
    assert fit.plate.polygon().intersection(truth).area / fit.plate.polygon().union(truth).area > 0.85
    assert abs(math.degrees(fit.plate.angle) - 20.0) % 180 < 10.0


def test_a_clamped_rectangle_is_recovered_as_a_rectangle() -> None:
    d = Defect("rect2", (0.5, 0.5), 0.16, angle_deg=-10.0)
    fit, _ = _fit(d)
    assert fit.plate is not None and fit.plate.shape == "rectangle" and fit.misfit <= MISFIT_MAX
    assert fit.plate.area == pytest.approx(d.polygon().area, rel=0.15)  # beam modes vs the true mode: +12 %
    assert fit.plate.a / fit.plate.b == pytest.approx(2.0, rel=0.15)


def test_a_plateau_is_not_a_plate() -> None:
    fit, _ = _fit(Defect("circle", (0.5, 0.5), 0.3, response="flat"))
    assert fit.plate is not None and fit.misfit > MISFIT_MAX


def test_too_few_points_give_no_fit() -> None:
    xy = np.array([[0.0, 0.0], [0.1, 0.0], [0.0, 0.1]])
    fit = fit_plate(shapely.box(-0.05, -0.05, 0.05, 0.05), xy, np.array([10.0, 0.0, 0.0]), np.ones(3, bool), 1.3, 10.0)
    assert fit.plate is None and fit.misfit != fit.misfit  # NaN
