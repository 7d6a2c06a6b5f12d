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
    # the ellipse is drawn with 128 segments: its polygon holds (64/π)·sin(π/64) = 99.96 % of πab
    assert p.polygon().area == pytest.approx(p.area * (64 / math.pi * math.sin(math.pi / 64) if shape == "ellipse"
                                                       else 1.0), rel=1e-9)
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


# --- exact plates: the clamped circular mode written out from Bessel functions ------------------------
# w(ρ) = J0(λρ) − J0(λ)/I0(λ)·I0(λρ), λ² = 10.2158 (Leissa, Vibration of Plates, NASA SP-160, Table 2.1),
# stretched to an ellipse; VER = c0 + 10·log10(1 + (G − 1)·φ²): the energy at a point is the sound
# surface's plus the plate's, which goes with the square of the mode shape. Written here, not taken
# from overlay, so the fit is checked against an outside formula.

LAMBDA = math.sqrt(10.2158)


def _bessel_phi(rho: np.ndarray) -> np.ndarray:
    from scipy import special

    w = special.j0(LAMBDA * rho) - special.j0(LAMBDA) / special.i0(LAMBDA) * special.i0(LAMBDA * rho)
    w0 = 1.0 - special.j0(LAMBDA) / special.i0(LAMBDA)
    return np.where(rho < 1.0, w / w0, 0.0)


def _exact_map(plates: list[tuple[float, float, float, float, float]], gain_db: float, c0: float,
               size: tuple[float, float] = (1.5, 1.0), spacing: float = 0.02):
    """Points on a grid and their VER over ellipses (cx, cy, a, b, angle in degrees)."""
    gx, gy = np.meshgrid(np.arange(0.0, size[0] + 1e-9, spacing), np.arange(0.0, size[1] + 1e-9, spacing))
    xy = np.column_stack([gx.ravel(), gy.ravel()])
    energy = np.ones(len(xy))
    for cx, cy, a, b, deg in plates:
        c, s = math.cos(math.radians(deg)), math.sin(math.radians(deg))
        u = ((xy[:, 0] - cx) * c + (xy[:, 1] - cy) * s) / a
        v = (-(xy[:, 0] - cx) * s + (xy[:, 1] - cy) * c) / b
        energy += (10 ** (gain_db / 10) - 1) * _bessel_phi(np.hypot(u, v)) ** 2
    return xy, c0 + 10 * np.log10(energy)


def _contours(xy: np.ndarray, ver: np.ndarray, level: float):
    from overlay.zones.contour import level_polygons
    from overlay.zones.grid import infer_grid

    grid = infer_grid(xy)
    return level_polygons(grid, grid.values(ver, np.ones(len(ver), bool)), level)


def _fit_exact(contour, xy, ver, level, usable=None, others=None):
    from overlay.zones.zone import defect_outline

    usable = np.ones(len(ver), bool) if usable is None else usable
    _, scale = defect_outline(contour, float(ver.max()), level)
    return fit_plate(contour, xy, ver, usable, scale, float(ver.max()), others)


def test_an_exact_clamped_circle_is_recovered_to_a_millimetre() -> None:
    # a 0.2 m radius plate, 18 dB over a background of 1.5 dB: centre, radius, gain and background come back
    xy, ver = _exact_map([(0.6, 0.5, 0.2, 0.2, 0.0)], 18.0, 1.5)
    (contour,) = _contours(xy, ver, 7.5)
    fit = _fit_exact(contour, xy, ver, 7.5)
    assert fit.plate is not None and fit.plate.shape == "ellipse"
    assert math.hypot(fit.plate.cx - 0.6, fit.plate.cy - 0.5) < 1e-3
    assert abs(fit.plate.a - 0.2) < 1e-3 and abs(fit.plate.b - 0.2) < 1e-3
    assert abs(fit.gain_db - 18.0) < 0.05 and fit.misfit < 0.2
    window = fit.n_points
    assert 12 <= window < len(ver) / 2  # the points around the contour, not the whole map
    dropped = np.ones(len(ver), bool)
    dropped[np.argmax(ver)] = False  # one unusable point at the peak: one point fewer, the same plate
    again = _fit_exact(contour, xy, ver, 7.5, usable=dropped)
    assert again.n_points == window - 1 and abs(again.plate.a - 0.2) < 1e-3


def test_a_rotated_ellipse_comes_back_with_its_long_axis_and_angle() -> None:
    xy, ver = _exact_map([(0.7, 0.5, 0.3, 0.15, 30.0)], 18.0, 0.0)
    (contour,) = _contours(xy, ver, 6.0)
    fit = _fit_exact(contour, xy, ver, 6.0)
    assert fit.plate is not None and fit.plate.shape == "ellipse"
    assert abs(fit.plate.a - 0.3) < 3e-3 and abs(fit.plate.b - 0.15) < 3e-3  # a is the long axis
    assert abs(math.degrees(math.remainder(fit.plate.angle - math.radians(30.0), math.pi))) < 0.5
    assert math.hypot(fit.plate.cx - 0.7, fit.plate.cy - 0.5) < 2e-3 and fit.misfit < 0.2


def test_a_neighbouring_defect_is_left_out_of_the_fit() -> None:
    # two plates 0.15 m apart, so the left one's fit window reaches into the right one's contour: with
    # the other contour given, its points are not counted (fewer points) and each plate comes back as it is
    xy, ver = _exact_map([(0.45, 0.5, 0.2, 0.2, 0.0), (0.9, 0.5, 0.15, 0.15, 0.0)], 18.0, 0.0)
    left, right = sorted(_contours(xy, ver, 6.0), key=lambda p: p.centroid.x)
    fit = _fit_exact(left, xy, ver, 6.0, others=right)
    assert math.hypot(fit.plate.cx - 0.45, fit.plate.cy - 0.5) < 1e-3 and abs(fit.plate.a - 0.2) < 1e-3
    assert fit.n_points < _fit_exact(left, xy, ver, 6.0).n_points
    fit = _fit_exact(right, xy, ver, 6.0, others=left)
    assert math.hypot(fit.plate.cx - 0.9, fit.plate.cy - 0.5) < 1e-3 and abs(fit.plate.a - 0.15) < 1e-3


def test_no_fit_reports_how_many_points_it_had() -> None:
    xy = np.array([[0.0, 0.0], [0.1, 0.0], [0.0, 0.1]])
    fit = fit_plate(shapely.box(-0.05, -0.05, 0.05, 0.05), xy, np.array([10.0, 0.0, 0.0]), np.ones(3, bool), 1.3, 10.0)
    assert fit.plate is None and math.isnan(fit.misfit) and math.isnan(fit.gain_db) and fit.n_points == 3


def test_the_misfit_is_the_scatter_inside_over_the_scatter_around() -> None:
    # an exact plate under 1 dB of Gaussian scatter everywhere: the RMS residual inside the outline over
    # the robust scatter around it (1.4826 × MAD, the normal distribution's consistency factor; from
    # memory) is about 1; without scatter it is about 0 (the noise floor of 0.5 dB divides)
    xy, ver = _exact_map([(0.6, 0.5, 0.25, 0.25, 0.0)], 18.0, 0.0, spacing=0.01)
    clean = _fit_exact(_contours(xy, ver, 6.0)[0], xy, ver, 6.0)
    assert clean.misfit < 0.05
    noisy = ver + np.random.default_rng(3).normal(0.0, 1.0, len(ver))
    (contour,) = [c for c in _contours(xy, noisy, 6.0) if c.area > 0.05]
    fit = _fit_exact(contour, xy, noisy, 6.0)
    assert 0.85 < fit.misfit < 1.15 and abs(fit.plate.a - 0.25) < 0.01


def test_a_plate_over_a_background_below_the_reference_is_fitted() -> None:
    # VER is against a reference that need not be the background here (a healthy region elsewhere may be
    # louder): a 20 dB plate over a background at −12 dB peaks at 8 dB. Its gain is bounded over the
    # background, not over 0 dB — bounded over 0 dB the start lay outside the bounds and no outline came back
    xy, ver = _exact_map([(0.6, 0.5, 0.2, 0.2, 0.0)], 20.0, -12.0)
    (contour,) = _contours(xy, ver, 0.0)
    fit = _fit_exact(contour, xy, ver, 0.0)
    assert fit.plate is not None and abs(fit.plate.a - 0.2) < 1e-3 and abs(fit.gain_db - 20.0) < 0.05


def test_the_fit_needs_its_documented_minimum_of_points() -> None:
    # MIN_FIT_POINTS (12) usable points around the contour are enough to try; one fewer gives no fit
    from overlay.zones.outline import MIN_FIT_POINTS

    xy, ver = _exact_map([(0.5, 0.5, 0.2, 0.2, 0.0)], 18.0, 0.0, size=(1.0, 1.0), spacing=0.1)
    (contour,) = _contours(xy, ver, 6.0)
    near = np.argsort(np.hypot(xy[:, 0] - 0.5, xy[:, 1] - 0.5))
    for n, fitted in ((MIN_FIT_POINTS, True), (MIN_FIT_POINTS - 1, False)):
        usable = np.zeros(len(ver), bool)
        usable[near[:n]] = True
        fit = _fit_exact(contour, xy, ver, 6.0, usable=usable)
        assert fit.n_points == n and (fit.plate is not None) == fitted
    # a zone without a usable point of its own has no peak VER (NaN): no fit, however many points around
    nan_peak = fit_plate(contour, xy, ver, np.ones(len(ver), bool), 1.3, float("nan"))
    assert nan_peak.plate is None and nan_peak.n_points > MIN_FIT_POINTS
    with pytest.raises(ValueError, match="plate shape"):
        Plate("circle", 0.0, 0.0, 0.0, 1.0, 1.0)
