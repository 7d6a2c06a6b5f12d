"""Scanner → drawing fits: EPSG Guidance Note 7-2 worked examples, projective invariants, a tilted
plane scanned by angles, leave-one-out, degenerate target sets."""

from __future__ import annotations

import math

import numpy as np
import pytest

from overlay.errors import RegistrationError
from overlay.geometry.fits import fit_points
from overlay.geometry.registration import (
    cos_incidence_from_homography,
    pinhole_to_surface,
    tangents,
)
from overlay.geometry.transforms import Affine, Projective

# EPSG Guidance Note 7-2, method 9624 (affine parametric), Jamaica 1875 / Old Grid (ft) →
# JAD69 / Jamaica National Grid (m) (docs/references.md)
JAM = Affine(82357.457, 0.304794369, 0.000015417425, 28091.324, -0.000015417425, 0.304794369)


def test_gn72_affine_worked_example() -> None:
    # (553900.00, 482500.00) → (251190.497, 175146.067), 1 mm
    x, y = JAM.apply(np.array([553900.0, 482500.0]))
    assert x == pytest.approx(251190.497, abs=1e-3) and y == pytest.approx(175146.067, abs=1e-3)


def test_affine_fit_recovers_all_six_gn72_parameters() -> None:
    src = np.array([[553900.0, 482500.0], [560000.0, 480000.0], [556000.0, 490000.0], [550000.0, 485000.0], [558000.0, 488000.0]])
    fit = fit_points("affine", src, JAM.apply(src), list("ABCDE"))
    for got, want in zip(fit.transform.params().values(), JAM.params().values()):
        assert got == pytest.approx(want, rel=1e-9, abs=1e-9 * abs(JAM.a0))
    assert fit.rms < 1e-6


def test_affine_noisy_targets_within_noise() -> None:
    rng = np.random.default_rng(1)
    truth = Affine(10.0, 1.001, 0.02, -5.0, -0.015, 0.998)
    src = rng.uniform(0, 4, (10, 2))
    dst = truth.apply(src) + rng.normal(0, 0.001, (10, 2))
    fit = fit_points("affine", src, dst, [f"T{i}" for i in range(10)])
    grid = rng.uniform(0, 4, (50, 2))
    assert np.max(np.hypot(*(fit.transform.apply(grid) - truth.apply(grid)).T)) < 0.002
    assert 0.0003 < fit.rms < 0.002


def _heckbert_square_to_quad(q: np.ndarray) -> np.ndarray:
    """Heckbert 1989, 'Fundamentals of Texture Mapping', square → quadrilateral in closed form (from memory)."""
    (x0, y0), (x1, y1), (x2, y2), (x3, y3) = q
    sx, sy = x0 - x1 + x2 - x3, y0 - y1 + y2 - y3
    dx1, dx2, dy1, dy2 = x1 - x2, x3 - x2, y1 - y2, y3 - y2
    den = dx1 * dy2 - dx2 * dy1
    g = (sx * dy2 - dx2 * sy) / den
    h = (dx1 * sy - sx * dy1) / den
    a, b, c = x1 - x0 + g * x1, x3 - x0 + h * x3, x0
    d, e, f = y1 - y0 + g * y1, y3 - y0 + h * y3, y0
    return np.array([[a, b, c], [d, e, f], [g, h, 1.0]])


def test_projective_reproduces_four_targets_and_matches_heckbert() -> None:
    square = np.array([[0.0, 0.0], [1.0, 0.0], [1.0, 1.0], [0.0, 1.0]])
    quad = np.array([[2.0, 1.0], [5.0, 1.5], [4.5, 4.0], [1.5, 3.0]])
    fit = fit_points("projective", square, quad, list("ABCD"))
    assert np.max(np.abs(fit.residuals)) < 1e-9
    np.testing.assert_allclose(fit.transform.matrix, _heckbert_square_to_quad(quad), atol=1e-9)
    assert np.isnan(fit.leave_one_out).all()  # four points leave none to spare


def test_projective_reduces_to_affine() -> None:
    truth = Affine(3.0, 0.9, 0.1, -1.0, -0.05, 1.1)
    src = np.array([[0.0, 0.0], [2.0, 0.1], [2.1, 1.9], [0.1, 2.0], [1.0, 1.0], [1.7, 0.4]])
    fit = fit_points("projective", src, truth.apply(src), list("ABCDEF"))
    h = fit.transform.params()
    assert abs(h["h31"]) < 1e-9 and abs(h["h32"]) < 1e-9
    assert (h["h11"], h["h12"], h["h13"]) == pytest.approx((0.9, 0.1, 3.0), abs=1e-9)


def _tilted_scan(tilt_deg: float = 25.0, standoff: float = 5.0):
    """A wall tilted about the head's x axis, scanned on a grid of mirror angles; its true surface metres."""
    ax, ay = np.meshgrid(np.linspace(-12, 12, 25), np.linspace(-10, 10, 21))
    angles = np.column_stack([ax.ravel(), ay.ravel()])
    surface, cos = pinhole_to_surface(angles, standoff, (tilt_deg, 0.0))
    return angles, surface, cos


def test_projective_fit_of_a_tilted_plane_scanned_by_angles_recovers_truth_to_1mm() -> None:
    angles, surface, _ = _tilted_scan()
    rng = np.random.default_rng(2)
    # eight targets round the edge of the scan (corners and mid-sides of the 21 × 25 angle grid),
    # angles read to 0.002°, surveyed to 0.5 mm
    rc = [(0, 0), (0, 12), (0, 24), (10, 24), (20, 24), (20, 12), (20, 0), (10, 0)]
    pick = np.array([r * 25 + c for r, c in rc])
    seen = angles[pick] + rng.normal(0, 0.002, (8, 2))
    surveyed = surface[pick] + rng.normal(0, 0.0005, (8, 2))
    fit = fit_points("projective", tangents(seen), surveyed, [f"T{i}" for i in range(8)])
    err = np.hypot(*(fit.transform.apply(tangents(angles)) - surface).T)
    assert err.max() < 0.001
    # exact targets → exact map
    exact = fit_points("projective", tangents(angles[pick]), surface[pick], [f"T{i}" for i in range(8)])
    assert np.hypot(*(exact.transform.apply(tangents(angles)) - surface).T).max() < 1e-8


def test_incidence_from_the_fitted_plane_pose() -> None:
    angles, surface, cos = _tilted_scan()
    fit = fit_points("projective", tangents(angles[::37]), surface[::37], [f"T{i}" for i in range(len(angles[::37]))])
    got = cos_incidence_from_homography(fit.transform, tangents(angles), 1.0)
    np.testing.assert_allclose(got, cos, atol=1e-6)
    # on the boresight of a wall tilted 25°, the beam meets it at 25° (hand-worked)
    centre = np.argmin(np.hypot(*angles.T))
    assert math.degrees(math.acos(got[centre])) == pytest.approx(25.0, abs=1e-6)


def test_pinhole_hand_worked() -> None:
    # normal wall at 5 m: (45°, 0) hits x = 5·tan 45° = 5 m at 45° incidence; (0, 0) hits the origin
    xy, cos = pinhole_to_surface(np.array([[45.0, 0.0], [0.0, 0.0]]), 5.0)
    np.testing.assert_allclose(xy, [[5.0, 0.0], [0.0, 0.0]], atol=1e-12)
    np.testing.assert_allclose(cos, [math.sqrt(0.5), 1.0], atol=1e-12)


def test_leave_one_out_hand_check() -> None:
    # three targets, similarity: leaving C out, A and B fix the map exactly (identity here), so C's
    # leave-one-out error is its own offset, 0.03 m (hand-worked)
    src = np.array([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0]])
    dst = src.copy()
    dst[2] += [0.03, 0.0]
    fit = fit_points("similarity", src, dst, ["A", "B", "C"])
    assert fit.leave_one_out[2] == pytest.approx(0.03, abs=1e-12)
    assert fit.leave_one_out[2] > fit.errors[2]


@pytest.mark.parametrize(
    "model, pts, fragment",
    [
        ("similarity", [[0, 0]], "needs at least 2 targets, got 1 (T0)"),
        ("affine", [[0, 0], [1, 0]], "needs at least 3 targets, got 2 (T0, T1)"),
        ("affine", [[0, 0], [1, 1], [2, 2.0000001]], "T0, T1, T2 are (nearly) collinear"),
        ("projective", [[0, 0], [1, 0], [2, 0], [1, 1]], "T0, T1, T2 are collinear"),
        ("projective", [[0, 0], [1, 0], [1, 0], [0, 1]], "T1 and T2 coincide"),
        # five targets, four on one line: no four in general position (Hartley & Zisserman, Multiple View
        # Geometry, §4.1, from memory: a homography needs four points, no three collinear); the fit reached
        # RMS 5e-16 with a transform that put a point 1.2 m off
        ("projective", [[0, 0], [1, 0], [2, 0], [3, 0], [1, 2]], "T0, T1, T2, T3 are collinear"),
        ("projective", [[0, 0], [1, 0.0005], [2, 0], [3, 0], [1, 2]], "T0, T1, T2, T3 are collinear"),
        ("projective", [[0, 0], [10, 0.005], [20, 0], [30, 0], [10, 20]], "T0, T1, T2, T3 are collinear"),  # 10× larger
        ("projective", [[1, 6], [2, 7], [3, 8], [4, 9], [0, 12]], "T0, T1, T2, T3 are collinear"),  # y = x + 5
    ],
)
def test_degenerate_target_sets_name_the_targets(model: str, pts: list, fragment: str) -> None:
    src = np.array(pts, dtype=float)
    with pytest.raises(RegistrationError) as info:
        fit_points(model, src, src + 1.0, [f"T{i}" for i in range(len(src))])
    assert fragment in str(info.value) and info.value.exit_code == 4


def test_what_determines_each_model_is_accepted() -> None:
    # a similarity is fixed by two distinct points, so targets on one line carry it (three on a girder's
    # axis were refused as "badly conditioned" before); a projective needs four points no three on a line,
    # so five with three on a line carry it. Each fit gives back the transform the targets were made with.
    from overlay.geometry.transforms import Similarity

    line = np.array([[0.0, 0.0], [1.0, 0.0], [2.5, 0.0]])
    sim = Similarity(0.8, 0.6, 512000.0, 5712000.0)  # scale 1, rotation 36.87°, map-size shift
    fit = fit_points("similarity", line, sim.apply(line), ["A", "B", "C"])
    assert max(abs(a - b) for a, b in zip(fit.transform.params().values(), sim.params().values())) < 1e-6
    h = Projective((1.1, 0.1, 2.0, 0.05, 0.9, -1.0, 1e-3, 2e-3))
    five = np.array([[0.0, 0.0], [1.0, 0.0], [2.0, 0.0], [3.0, 1.0], [1.0, 2.0]])
    fit = fit_points("projective", five, h.apply(five), list("ABCDE"))
    np.testing.assert_allclose(fit.transform.h, h.h, atol=1e-9)


def test_projective_equals_affine_form_for_transforms() -> None:
    p = Projective((2.0, 0.0, 1.0, 0.0, 2.0, -1.0, 0.0, 0.0))
    np.testing.assert_allclose(p.apply(np.array([[1.0, 1.0]])), [[3.0, 1.0]])
    assert p.local_scale(np.array([[0.0, 0.0]])) == pytest.approx(2.0)


def test_angle_scan_with_three_targets_goes_through_the_pinhole(tmp_path) -> None:
    # an angle scan of a wall normal to the boresight at 4 m, three targets: pinhole to surface metres,
    # then a similarity; a target at (10°, 0) lies 4·tan 10° = 0.7053 m from the boresight (hand-worked)
    from overlay.geometry.registration import register
    from overlay.io.bundle import read_bundle
    from overlay.io.site import read_site
    from overlay.settings import ScanEntry

    from .conftest import write_site

    folder = tmp_path / "A-1"
    folder.mkdir()
    ax, ay = np.meshgrid(np.arange(-10, 10.1, 1.0), np.arange(-8, 8.1, 1.0))
    lines = ["id,ax,ay,ver_db"] + [f"P{k},{a},{b},1.0" for k, (a, b) in enumerate(zip(ax.ravel(), ay.ravel()))]
    (folder / "points.csv").write_text("\n".join(lines) + "\n")
    targets = {"T1": (10.0, 0.0), "T2": (-10.0, 0.0), "T3": (0.0, 8.0)}
    body = 'format = "scan-bundle/1"\n[scan]\nid = "A-1"\n[coordinates]\nkind = "angles"\n[geometry]\nhead_distance_m = 4.0\n'
    for name, (a, b) in targets.items():
        x, y = 4 * math.tan(math.radians(a)), 4 * math.tan(math.radians(b))
        body += f'[[targets]]\nname = "{name}"\nscanner = [{a}, {b}]\ndrawing = [{100 + x}, {50 + y}]\n'
    (folder / "scan.toml").write_text(body)
    site = read_site(write_site(tmp_path, ["A-1"]))
    reg = register(read_bundle(folder), ScanEntry(folder), site)
    assert reg.frame == "pinhole" and reg.fit.model == "similarity"
    assert reg.fit.rms < 1e-9 and reg.fit.transform.scale == pytest.approx(1.0, abs=1e-12)
    p = reg.to_drawing.apply(reg.working(np.array([[10.0, 0.0]])))
    assert p[0] == pytest.approx([100 + 0.70531, 50.0], abs=1e-5)
    assert reg.cos_incidence.min() == pytest.approx(1 / math.sqrt(1 + math.tan(math.radians(10)) ** 2 + math.tan(math.radians(8)) ** 2))


@pytest.mark.parametrize("pts, refused", [
    # the coincidence rule: two targets closer than 1e-9 of the bounding box's larger side (at least 1e-9
    # units) are one point measured twice — both sides of it, on boxes where the sides and units differ
    ([[0, 0], [100, 100], [100 + 5e-8, 100]], True),      # 5e-8 < 1e-9 × 100
    ([[0, 0], [100, 100], [100 + 5e-7, 100]], False),
    ([[0, 1000], [1, 1001], [1 + 5e-8, 1001]], False),    # the box is 1 × 1: the threshold is 1e-9, not 1e-6
    ([[0, 0], [0.5, 0], [0.5 + 1.5e-9, 0]], False),       # a box under 1 unit: 1e-9 units still
    ([[0, 0], [0.5, 0], [0.5 + 0.5e-9, 0]], True),
])
def test_coincident_targets_by_the_documented_rule(pts: list, refused: bool) -> None:
    src = np.array(pts, dtype=float)
    names = ["A", "B", "C"]
    if refused:
        with pytest.raises(RegistrationError, match="B and C coincide"):
            fit_points("similarity", src, src, names)
    else:
        assert fit_points("similarity", src, src, names).rms < 1e-6


def test_collinear_sets_away_from_the_origin_and_at_map_scale() -> None:
    # collinearity is judged on the centred points (the smallest/largest singular value ≤ 1e-3): a line
    # that misses the origin, and a 1 m bow over 2 km (ratio 5.8e-4, worked with numpy's SVD) are refused
    for pts in ([[10, 10], [11, 11], [12, 12]], [[0, 0], [1000, 1], [2000, 0]]):
        src = np.array(pts, dtype=float)
        with pytest.raises(RegistrationError, match="are \\(nearly\\) collinear"):
            fit_points("affine", src, src, ["A", "B", "C"])
    src = np.array([[0, 0], [1000, 3], [2000, 0]], dtype=float)  # ratio 1.7e-3: spread enough
    assert fit_points("affine", src, src, ["A", "B", "C"]).rms < 1e-6


def test_refusals_name_what_was_fitted() -> None:
    # monuments (drawing → map) are refused as monuments, not as targets; an empty set says "none"
    with pytest.raises(RegistrationError, match="monuments M1 and M2 coincide"):
        fit_points("similarity", np.zeros((2, 2)), np.zeros((2, 2)), ["M1", "M2"], what="monuments")
    with pytest.raises(RegistrationError, match=r"needs at least 2 targets, got 0 \(none\)"):
        fit_points("similarity", np.zeros((0, 2)), np.zeros((0, 2)), [])


def test_four_point_projective_at_map_coordinates_keeps_micrometres() -> None:
    # exactly four points: the DLT is the answer (no refinement). With Hartley's normalisation (centroid to
    # 0, mean distance √2; Hartley 1997, "In defense of the eight-point algorithm", from memory) a plane
    # seen from the scanner is put into a map-size frame to better than a micrometre; without it the same
    # solve is off by metres (measured 145 m)
    h = Projective((0.05, 0.001, 512340.0, -0.002, 0.049, 5712470.0, 2e-5, 1e-5))
    four = np.array([[0.0, 0.0], [1000.0, 30.0], [980.0, 760.0], [15.0, 700.0]])
    fit = fit_points("projective", four, h.apply(four), list("ABCD"))
    probe = np.array([[500.0, 400.0], [100.0, 650.0], [900.0, 100.0]])
    assert np.abs(fit.transform.apply(probe) - h.apply(probe)).max() < 1e-6


@pytest.mark.parametrize("n", [5, 9])
def test_projective_from_more_points_is_a_least_squares_minimum(n: int) -> None:
    # with more than four noisy points the fit minimises the squared residuals in the target frame: at the
    # solution their gradient vanishes (first-order optimality), checked by central differences
    rng = np.random.default_rng(5)
    h = Projective((1.1, 0.1, 2.0, 0.05, 0.9, -1.0, 1e-3, 2e-3))
    src = rng.uniform(0, 10, (n, 2))
    dst = h.apply(src) + rng.normal(0, 0.01, (n, 2))
    fit = fit_points("projective", src, dst, [f"T{i}" for i in range(n)])
    x = np.array(fit.transform.h)

    def cost(v: np.ndarray) -> float:
        return float(np.sum((Projective(tuple(v)).apply(src) - dst) ** 2))

    grad = np.array([(cost(x + e) - cost(x - e)) / (2 * e[k]) for k, e in enumerate(np.diag(np.abs(x) * 1e-6 + 1e-9))])
    # relative sensitivity ∂cost/∂ln|h_k| ÷ cost: 2e-5 at the minimum; the algebraic (DLT) solution alone
    # gives 2.3, a refinement stopped early 1e-3 (measured)
    assert (np.abs(grad * x) / cost(x)).max() < 1e-4


def test_leave_one_out_skips_a_set_that_cannot_carry_the_model() -> None:
    # five targets for a projective: without T0 or T4 three of the remaining four are on one line, so
    # those two have no leave-one-out error (n/a); the three others do
    src = np.array([[0.0, 1.0], [0.0, 0.0], [1.0, 0.0], [2.0, 0.0], [1.0, 2.0]])
    h = Projective((1.1, 0.1, 2.0, 0.05, 0.9, -1.0, 1e-3, 2e-3))
    fit = fit_points("projective", src, h.apply(src), list("ABCDE"))
    assert np.isnan(fit.leave_one_out[[0, 4]]).all() and np.isfinite(fit.leave_one_out[1:4]).all()


def test_fit_report_lines() -> None:
    # the report an engineer reads: parameters to 9 significant digits, one line per target, "n/a" where
    # a target has no leave-one-out error (hand-worked: a similarity from two points has none)
    from overlay.geometry.transforms import Similarity

    src = np.array([[0.0, 0.0], [1.0, 0.0]])
    fit = fit_points("similarity", src, Similarity(2.0, 0.0, 1.0, 0.0).apply(src), ["A", "B"])
    assert fit.report("m") == [
        "model similarity, 2 points, RMS 0.0000 m, largest 0.0000 (A)",
        "  raw parameters (drawing units per working unit): " + ", ".join(
            f"{k} {v:.9g}" for k, v in fit.transform.params().items()),
        "  A            dx +0.0000  dy +0.0000  |r| 0.0000  leave-one-out   n/a  m",
        "  B            dx +0.0000  dy +0.0000  |r| 0.0000  leave-one-out   n/a  m",
    ]
    three = np.array([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0]])
    dst = three + [[0.0, 0.0], [0.0, 0.0], [0.03, 0.0]]
    lines = fit_points("similarity", three, dst, ["A", "B", "C"]).report("m")
    assert lines[4].startswith("  C ") and lines[4].endswith("leave-one-out 0.0300 m")


def test_check_fit_passes_at_the_tolerance_and_refuses_beyond() -> None:
    # the rule: a fit is refused when its worst residual exceeds the tolerance; 0.25 is exact in binary
    from overlay.geometry.fits import Fit, check_fit
    from overlay.geometry.transforms import Similarity

    fit = Fit(Similarity(1.0, 0.0, 0.0, 0.0), "similarity", ("A", "B"), np.array([[0.25, 0.0], [0.0, 0.0]]),
              np.full(2, np.nan))
    assert check_fit(fit, 0.25, "m") is True
    with pytest.raises(RegistrationError, match="misses A by 0.2500 m"):
        check_fit(fit, 0.2499, "m")
