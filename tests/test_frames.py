"""Frames: similarity fits against EPSG Guidance Note 7-2, CRS checks with pyproj."""

from __future__ import annotations

import math

import numpy as np
import pyproj
import pytest

from overlay.errors import CRSCheckError, RegistrationError, RegistrationWarning
from overlay.geometry.crs import check_map_crs, from_placement, to_crs
from overlay.geometry.fits import check_fit, fit_points
from overlay.geometry.transforms import Affine, Projective, Similarity

# EPSG Guidance Note 7-2, method 9621 (2D similarity), example ED50 / UTM 31N → ETRS89 / UTM 31N:
# XT = XT0 + M(XS·cosθ + YS·sinθ), YT = YT0 + M(−XS·sinθ + YS·cosθ)
XT0, YT0, M, THETA = -129.549, -208.185, 1.0000015504, math.radians(1.56504 / 3600)


def _gn72_similarity() -> Similarity:
    # our form x' = a·x − b·y + tx, y' = b·x + a·y + ty, so a = M·cosθ and b = −M·sinθ (sign of θ!)
    return Similarity(M * math.cos(THETA), -M * math.sin(THETA), XT0, YT0)



def transform_xy(xy: np.ndarray, src: object, dst: object) -> np.ndarray:
    """Coordinates from one CRS to another through PROJ (x/y order), CRSs named as the tool names them."""
    t = pyproj.Transformer.from_crs(to_crs(src), to_crs(dst), always_xy=True)
    x, y = t.transform(np.asarray(xy)[..., 0], np.asarray(xy)[..., 1], errcheck=True)
    return np.stack([x, y], axis=-1)

def test_gn72_similarity_worked_example() -> None:
    # (300000, 4500000) → (299905.060, 4499796.515), 1 mm (GN7-2, 9621)
    x, y = _gn72_similarity().apply(np.array([300000.0, 4500000.0]))
    assert x == pytest.approx(299905.060, abs=1e-3)
    assert y == pytest.approx(4499796.515, abs=1e-3)


def test_fit_recovers_gn72_parameters_from_exact_points() -> None:
    src = np.array([[300000.0, 4500000.0], [310000.0, 4500000.0], [305000.0, 4512000.0], [298000.0, 4490000.0]])
    dst = _gn72_similarity().apply(src)
    fit = fit_points("similarity", src, dst, ["a", "b", "c", "d"])
    assert fit.transform.scale == pytest.approx(M, rel=1e-9)
    assert -math.radians(fit.transform.rotation_deg) == pytest.approx(THETA, rel=1e-6)
    assert fit.transform.tx == pytest.approx(XT0, abs=1e-4) and fit.transform.ty == pytest.approx(YT0, abs=1e-4)
    assert fit.rms < 1e-6


def test_residuals_match_hand_check() -> None:
    # unit square, target B moved 10 mm in x: the fit spreads the error, residuals sum to zero and
    # B keeps the largest one.
    src = np.array([[0.0, 0.0], [1.0, 0.0], [1.0, 1.0], [0.0, 1.0]])
    dst = src.copy()
    dst[1, 0] += 0.01
    fit = fit_points("similarity", src, dst, ["A", "B", "C", "D"])
    np.testing.assert_allclose(fit.residuals, dst - fit.transform.apply(src), atol=1e-15)
    np.testing.assert_allclose(fit.residuals.sum(axis=0), 0.0, atol=1e-12)
    assert fit.worst[0] == "B"
    # by hand, centred on the centroids (0.5, 0.5) and (0.5025, 0.5):
    # Σ(s·d) = 2.005, Σ|s|² = 2 → a = 1.0025;  Σ(sx·dy − sy·dx) = 0.005 → b = 0.0025
    assert fit.transform.a == pytest.approx(1.0025) and fit.transform.b == pytest.approx(0.0025)
    assert fit.rms == pytest.approx(math.sqrt(np.mean(np.sum(fit.residuals**2, axis=1))))


def test_noisy_targets_recover_within_noise() -> None:
    rng = np.random.default_rng(0)
    truth = Similarity(math.cos(0.3) * 1.0, math.sin(0.3), 412.0, 8.0)
    src = rng.uniform(-2, 2, (8, 2))
    dst = truth.apply(src) + rng.normal(0, 0.001, (8, 2))
    fit = fit_points("similarity", src, dst, [f"T{i}" for i in range(8)])
    assert abs(fit.transform.scale - 1.0) < 1e-3
    assert abs(fit.transform.rotation_deg - math.degrees(0.3)) < 0.05
    assert 0.0003 < fit.rms < 0.003


def test_too_few_and_coincident_targets() -> None:
    with pytest.raises(RegistrationError, match="at least 2 targets, got 1 \\(T1\\)"):
        fit_points("similarity", np.zeros((1, 2)), np.zeros((1, 2)), ["T1"])
    with pytest.raises(RegistrationError, match="T1 and T2 coincide"):
        fit_points("similarity", np.ones((2, 2)), np.zeros((2, 2)), ["T1", "T2"])


def test_tolerance_stops_unless_accepted() -> None:
    src = np.array([[0.0, 0.0], [1.0, 0.0], [1.0, 1.0]])
    dst = src.copy()
    dst[2] += 0.05
    fit = fit_points("similarity", src, dst, ["A", "B", "C"])
    with pytest.raises(RegistrationError) as info:
        check_fit(fit, 0.01, "m")
    assert info.value.exit_code == 4 and "misses" in str(info.value)
    with pytest.warns(RegistrationWarning, match="accepted by override"):
        assert check_fit(fit, 0.01, "m", accept=True) is False


def test_placement_bearing_convention() -> None:
    # bearing 90°: drawing +x points east, +y north; bearing 0°: +x north, +y west (hand-worked)
    east = from_placement((1000.0, 2000.0), 90.0, 1.0, "m")
    np.testing.assert_allclose(east.apply(np.array([[1.0, 0.0], [0.0, 1.0]])), [[1001.0, 2000.0], [1000.0, 2001.0]], atol=1e-12)
    north = from_placement((0.0, 0.0), 0.0, 1.0, "m")
    np.testing.assert_allclose(north.apply(np.array([[1.0, 0.0], [0.0, 1.0]])), [[0.0, 1.0], [-1.0, 0.0]], atol=1e-12)
    mm = from_placement((0.0, 0.0), 90.0, 1.0, "mm")
    np.testing.assert_allclose(mm.apply(np.array([1000.0, 0.0])), [1.0, 0.0], atol=1e-12)


def test_inverse_undoes_the_transform() -> None:
    a = Similarity(0.9, 0.2, 1.7, -2.3)  # no shift of ±1: a·tx and a/tx must not coincide
    p = np.array([[0.3, 0.7], [-2.0, 4.0]])
    np.testing.assert_allclose(a.inverse().apply(a.apply(p)), p, atol=1e-12)


def test_gn72_transverse_mercator_through_our_crs_path() -> None:
    # EPSG Guidance Note 7-2, method 9807, OSGB 1936 / British National Grid (EPSG:27700) from EPSG:4277:
    # 50°30'00"N, 0°30'00"E → E 577274.99, N 69740.50 (0.02 m); inverse to 1e-7° (docs/references.md)
    e, n = transform_xy(np.array([0.5, 50.5]), "EPSG:4277", 27700)
    assert e == pytest.approx(577274.99, abs=0.02)
    assert n == pytest.approx(69740.50, abs=0.02)
    lon, lat = transform_xy(np.array([e, n]), "EPSG:27700", "EPSG:4277")
    assert lon == pytest.approx(0.5, abs=1e-7) and lat == pytest.approx(50.5, abs=1e-7)


def test_crs_normaliser_accepts_usual_forms() -> None:
    wkt = to_crs(25832).to_wkt()
    for form in (25832, "EPSG:25832", wkt, to_crs("EPSG:25832")):
        assert to_crs(form).to_epsg() == 25832


def test_unknown_epsg_is_a_crs_error_exit_4() -> None:
    with pytest.raises(CRSCheckError) as info:
        to_crs("EPSG:999999")
    assert info.value.exit_code == 4


def test_map_crs_must_be_projected_metric_and_cover_site() -> None:
    with pytest.raises(CRSCheckError, match="not a projected CRS"):
        check_map_crs(to_crs(4326), np.array([[9.0, 51.0]]))
    with pytest.raises(CRSCheckError, match="metres are required"):
        check_map_crs(to_crs(2277), np.array([[3000000.0, 10000000.0]]))  # Texas Central, US survey feet
    check_map_crs(to_crs(25832), np.array([[512345.0, 5712468.0]]))  # inside 6°E..12°E
    # just east of the area of use (12.5°E, 51°N): projections are used a little past their edge — a warning
    edge = transform_xy(np.array([[12.5, 51.0]]), "EPSG:4258", "EPSG:25832")
    with pytest.warns(RegistrationWarning, match="outside the area of use of EPSG:25832"):
        check_map_crs(to_crs(25832), edge)
    # far outside (29°W) or not on the earth at all (an origin of 1e300): a wrong CRS or placement, exit 4
    with pytest.raises(CRSCheckError, match="more than 3 degrees outside") as info:
        check_map_crs(to_crs(25832), np.array([[-2500000.0, 5712468.0]]))
    assert info.value.exit_code == 4
    with pytest.raises(CRSCheckError, match="not a place on the earth"):
        check_map_crs(to_crs(25832), np.array([[1e300, 5712468.0]]))


def test_gn72_lambert_conic_2sp_through_our_crs_path() -> None:
    # EPSG Guidance Note 7-2, method 9802, NAD27 / Texas South Central (EPSG:32040) from EPSG:4267:
    # 28°30'N, 96°W → E 2963503.91, N 254759.80 US survey feet (0.01 ftUS) (docs/references.md) — a foot mix-up
    # would show as a factor 0.3048
    e, n = transform_xy(np.array([-96.0, 28.5]), "EPSG:4267", "EPSG:32040")
    assert e == pytest.approx(2963503.91, abs=0.01) and n == pytest.approx(254759.80, abs=0.01)


def test_utm_scale_factor_at_the_central_meridian() -> None:
    # UTM: k0 = 0.9996 on the central meridian (definition of the projection; zone 32 → 9°E)
    from overlay.geometry.crs import site_scale_factor

    xy = transform_xy(np.array([[9.0, 51.0]]), "EPSG:4258", "EPSG:25832")
    k, areal = site_scale_factor(to_crs(25832), xy)
    assert k == pytest.approx(0.9996, abs=1e-7) and areal == pytest.approx(0.9996**2, abs=1e-7)


def test_transformations_are_exact_reported_or_refused() -> None:
    from overlay.geometry.crs import crs_transformer

    t, acc = crs_transformer("EPSG:25832", "EPSG:25833", (12.0, 51.0))
    assert acc == 0.0  # same datum: a conversion, exact
    t, acc = crs_transformer("EPSG:25832", "EPSG:23032", (9.0, 51.0))
    assert acc > 0  # a datum shift with its stated accuracy
    with pytest.raises(CRSCheckError, match="only a ballpark transformation"):
        crs_transformer("+proj=longlat +ellps=clrk80 +no_defs", "EPSG:4326", (9.0, 51.0))


def test_millimetre_drawings_round_trip_exactly() -> None:
    # 1 mm = 0.001 m exactly; placing a mm drawing and a m drawing of the same point gives the same map point
    p_mm = from_placement((500000.0, 5700000.0), 63.5, 1.0, "mm").apply(np.array([12345.0, 6789.0]))
    p_m = from_placement((500000.0, 5700000.0), 63.5, 1.0, "m").apply(np.array([12.345, 6.789]))
    np.testing.assert_allclose(p_mm, p_m, rtol=0, atol=1e-9)
    from overlay.units import LENGTH_TO_M

    x = np.array([0.001, 1.0, 123456.789])
    assert np.array_equal((x / LENGTH_TO_M["mm"]) * LENGTH_TO_M["mm"], x)


def test_station_offset_straight_and_arc() -> None:
    from overlay.geometry.stations import Alignment

    # straight line (0,0)→(100,0), start station 1000: (30, 5) is at station 1030, 5 m left (hand-worked)
    line = Alignment.from_points([(0.0, 0.0), (100.0, 0.0)], 1000.0)
    st, off = line.station_offset(np.array([[30.0, 5.0], [70.0, -2.0]]))
    np.testing.assert_allclose(st, [1030.0, 1070.0], atol=1e-9)
    np.testing.assert_allclose(off, [5.0, -2.0], atol=1e-9)
    # quarter circle of radius 100 m anticlockwise from (100, 0): a point at 30° and radius 95 m lies at
    # station 100·π/6 = 52.3599 m and 5 m left (towards the centre) (hand-worked); the arc is densified
    th = np.linspace(0, np.pi / 2, 4001)
    arc = Alignment.from_points(list(zip(100 * np.cos(th), 100 * np.sin(th))))
    p = 95 * np.array([[np.cos(np.pi / 6), np.sin(np.pi / 6)]])
    st, off = arc.station_offset(p)
    assert st[0] == pytest.approx(100 * np.pi / 6, abs=1e-3) and off[0] == pytest.approx(5.0, abs=1e-4)
    # mm drawing units: the same point in mm gives metres
    st_mm, off_mm = Alignment.from_points([(0.0, 0.0), (100000.0, 0.0)]).station_offset(np.array([[30000.0, 5000.0]]), 0.001)
    assert (st_mm[0], off_mm[0]) == pytest.approx((30.0, 5.0))


def test_the_parameters_written_to_the_runs_table_carry_their_names() -> None:
    # the runs table's fit_params holds these dicts as JSON; Affine uses the EPSG method 9624 parameter
    # names A0..B2 (EPSG Guidance Note 7-2), the projective model h11..h32 with h33 = 1
    s = Similarity(0.6, 0.8, 12.5, -3.0)
    assert s.params() == {"a": 0.6, "b": 0.8, "tx": 12.5, "ty": -3.0, "scale": pytest.approx(1.0),
                          "rotation_deg": pytest.approx(math.degrees(math.atan2(0.8, 0.6)))}
    assert Affine(1.0, 2.0, 3.0, 4.0, 5.0, 6.0).params() == {"A0": 1.0, "A1": 2.0, "A2": 3.0, "B0": 4.0, "B1": 5.0,
                                                              "B2": 6.0}
    h = (1.0, 0.1, 2.0, 0.2, 1.1, -1.0, 0.01, 0.02)
    assert Projective(h).params() == dict(zip(("h11", "h12", "h13", "h21", "h22", "h23", "h31", "h32"), h))


def test_a_projective_transform_takes_one_point_or_many() -> None:
    # x' = (h11·x + h12·y + h13)/(h31·x + h32·y + 1): at (2, 1) with the h below, by hand: w = 1.04,
    # x' = 4.1 / 1.04, y' = 0.5 / 1.04
    t = Projective((1.0, 0.1, 2.0, 0.2, 1.1, -1.0, 0.01, 0.02))
    np.testing.assert_allclose(t.apply(np.array([2.0, 1.0])), [4.1 / 1.04, 0.5 / 1.04], rtol=1e-12)
    np.testing.assert_allclose(t.apply(np.array([[2.0, 1.0], [0.0, 0.0]])), [[4.1 / 1.04, 0.5 / 1.04], [2.0, -1.0]],
                               rtol=1e-12)


def test_a_geometry_moves_vertex_by_vertex_and_its_area_scales_by_the_square() -> None:
    # a similarity scales areas by a² + b² (= scale²): 1.2² + 0.5² = 1.69
    from shapely.geometry import Polygon

    t = Similarity(1.2, 0.5, 100.0, 50.0)  # scale 1.3: area × 1.69
    square = Polygon([(0, 0), (2, 0), (2, 1), (0, 1)])
    moved = t.apply_geometry(square)
    np.testing.assert_allclose(np.asarray(moved.exterior.coords), t.apply(np.asarray(square.exterior.coords)))
    assert moved.area == pytest.approx(2.0 * 1.69, rel=1e-12)


def test_area_scale_of_each_model_against_its_closed_form() -> None:
    # Affine: the determinant a1·b2 − a2·b1 everywhere.  Projective (h33 = 1): det J = det(H) / w³ with
    # w = h31·x + h32·y + 1 (the Jacobian of a plane homography; Hartley & Zisserman — from memory).
    pts = np.array([[0.0, 0.0], [2.0, 1.0], [-3.0, 4.0]])
    shear = Affine(5.0, 1.2, 0.7, -2.0, -0.4, 0.9)
    np.testing.assert_allclose(shear.jacobian_det(pts), 1.2 * 0.9 - 0.7 * (-0.4), rtol=1e-8)
    t = Projective((1.0, 0.1, 2.0, 0.2, 1.1, -1.0, 0.01, 0.02))
    w = 0.01 * pts[:, 0] + 0.02 * pts[:, 1] + 1.0
    np.testing.assert_allclose(t.jacobian_det(pts), np.linalg.det(t.matrix) / w**3, rtol=1e-7)
    assert t.local_scale(pts) == pytest.approx(math.sqrt(np.linalg.det(t.matrix) / np.mean(w) ** 3), rel=1e-7)
