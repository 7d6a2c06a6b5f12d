"""Zones: level sets of analytic fields on regular, curvilinear and scattered grids; nesting,
half-cell bounds (property test), outline model, confidence, footprints and depth."""

from __future__ import annotations

import math

import numpy as np
import pytest
import shapely
from hypothesis import given, settings
from hypothesis import strategies as st
from shapely.geometry import Polygon, box

from overlay.zones.contour import level_polygons
from overlay.zones.grid import ScatterGrid, grid_from_indices
from overlay.zones.plate import clamped_lambda, clamped_mode_shape, plate_frequency
from overlay.zones.zone import (
    Concrete,
    confidence_factors,
    contour_fraction,
    defect_outline,
    depth_range,
    order_key,
    outline_confidence,
    parent_finder,
    peak_spread,
    point_stats,
    repair_footprint,
)

from . import shapes


def _area(grid, ver: np.ndarray, level: float) -> tuple[float, list[Polygon]]:
    polys = level_polygons(grid, grid.contour_values(ver, np.ones(len(ver), bool)), level)
    return sum(p.area for p in polys), polys


@pytest.mark.parametrize("name", list(shapes.FIELDS))
@pytest.mark.parametrize("layout", ["regular", "curvilinear", "scattered"])
def test_level_set_areas(name: str, layout: str) -> None:
    # analytic areas (tests/shapes.py); 2 % on every grid kind
    if layout == "scattered":
        xy = shapes.scattered()
        grid = ScatterGrid(xy)
    else:
        xy, r, c = shapes.regular() if layout == "regular" else shapes.curvilinear()
        grid = grid_from_indices(xy, r, c)
    ver, level, truth = shapes.FIELDS[name](xy)
    area, polys = _area(grid, ver, level)
    assert area == pytest.approx(truth, rel=0.02)
    assert all(p.is_valid for p in polys)
    if name == "annulus":
        assert len(polys) == 1 and len(polys[0].interiors) == 1


def test_scattered_points_are_masked_outside_the_scan() -> None:
    # points only on the left half: nothing is contoured on the right
    xy = shapes.scattered()
    left = xy[:, 0] < 1.5
    grid = ScatterGrid(xy[left])
    ver = np.full(left.sum(), 20.0)
    area, polys = _area(grid, ver, 10.0)
    ext = grid.extent()
    assert ext.bounds[2] < 1.55
    # nothing outside the scan but slivers at its ragged rim (the run clips contours to the extent)
    assert shapely.union_all(polys).difference(ext.buffer(1e-9)).area < 1e-3 * ext.area
    assert area > 0.95 * ext.area  # and the scan itself covered up to the resampling step at its rim


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 10_000), levels=st.lists(st.floats(2.0, 12.0), min_size=2, max_size=3, unique=True))
def test_random_fields_valid_nested_and_within_half_cell_bounds(seed: int, levels: list[float]) -> None:
    # property: polygons valid; each higher level inside the lower; the zone area lies between the
    # outline shrunk and grown by half a spacing, measured against the exceedance area of the
    # field interpolated on a 5× finer grid
    rng = np.random.default_rng(seed)
    n, s = 21, 0.1
    xy, r, c = shapes.regular(n, s)
    grid = grid_from_indices(xy, r, c)
    z = rng.normal(0, 1, (n, n))
    z = np.cumsum(np.cumsum(z, axis=0), axis=1) / 4.0  # a smooth-ish random surface
    ver = 7.0 + 4.0 * (z - z.mean()) / (z.std() + 1e-9)
    levels = sorted(levels)
    unions = []
    for lv in levels:
        _, polys = _area(grid, ver.ravel(), lv)
        assert all(p.is_valid for p in polys)
        u = shapely.union_all(polys) if polys else Polygon()
        unions.append(u)
        # exceedance area of the bilinear field on a fine grid
        fine = np.linspace(0, (n - 1) * s, 5 * (n - 1) + 1)
        import scipy.interpolate

        f = scipy.interpolate.RegularGridInterpolator((np.arange(n) * s, np.arange(n) * s), ver.reshape(n, n))
        fx, fy = np.meshgrid(fine, fine)
        exceed = (f(np.column_stack([fy.ravel(), fx.ravel()])) >= lv).mean() * ((n - 1) * s) ** 2
        low = u.buffer(-s / 2).area if not u.is_empty else 0.0
        high = u.buffer(s / 2).intersection(box(0, 0, (n - 1) * s, (n - 1) * s)).area if not u.is_empty else 0.0
        assert low - 1e-9 <= exceed <= high + (s * s) + 1e-9
    for lo, hi in zip(unions, unions[1:]):
        assert lo.buffer(1e-7).contains(hi) or hi.is_empty


def test_confidence_is_monotone_in_each_factor() -> None:
    base = dict(n_points=6, ver_max_db=12.0, threshold_db=10.0, peak_spread=0.1, valid_share=0.9, snr_db=8.0)
    ref = np.prod(confidence_factors(**base))
    for key, better in (("n_points", 12), ("ver_max_db", 15.0), ("peak_spread", 0.02), ("valid_share", 1.0), ("snr_db", 15.0)):
        assert np.prod(confidence_factors(**{**base, key: better})) > ref, key
    f = confidence_factors(**base)
    assert all(0.0 <= x <= 1.0 for x in f)
    # unknown spread and SNR (ready VER) leave their factors at 1
    unknown = confidence_factors(**{**base, "peak_spread": float("nan"), "snr_db": float("nan")})
    assert unknown[2] == 1.0 and unknown[3] == pytest.approx(0.9)


def test_peak_spread() -> None:
    # quartiles 990, 1000, 1010 → (1010 − 990)/1000 = 0.02 (hand-worked)
    assert peak_spread(np.array([980.0, 990.0, 1000.0, 1010.0, 1020.0])) == pytest.approx(0.02)
    assert math.isnan(peak_spread(np.array([1000.0])))
    # two peaks are enough: quartiles by linear interpolation (numpy's default) 1025, 1050, 1075 Hz
    assert peak_spread(np.array([1000.0, 1100.0])) == pytest.approx(50.0 / 1050.0, rel=1e-12)
    assert peak_spread(np.array([0.4, 0.5, 0.6])) == pytest.approx(0.2, rel=1e-12)  # a median under 1 Hz still counts
    assert math.isnan(peak_spread(np.array([0.0, 0.0, 0.0])))  # no median to divide by


def test_footprint_hand_worked() -> None:
    # a 1.0 × 0.4 m rectangle, margin 0.15 m, aligned: 1.3 × 0.7 = 0.91 m² (hand-worked)
    rect, length, width = repair_footprint(box(0, 0, 1.0, 0.4), 0.15, "aligned")
    assert (length, width) == pytest.approx((1.3, 0.7), abs=1e-9)
    assert rect.area == pytest.approx(0.91, abs=1e-9)
    # the same rectangle turned 30°: the rotated footprint is still 1.3 × 0.7 m, the aligned one larger
    turned = shapely.affinity.rotate(box(0, 0, 1.0, 0.4), 30, origin=(0, 0))
    r2, l2, w2 = repair_footprint(turned, 0.15, "rotated")
    assert (l2, w2) == pytest.approx((1.3, 0.7), abs=2e-3)
    r3, _, _ = repair_footprint(turned, 0.15, "aligned")
    assert r3.area > r2.area


@pytest.mark.parametrize("margin", [0.025, 0.15, 0.30])
def test_footprint_contains_grown_outline_with_right_angles(margin: float) -> None:
    # UFGS 03 93 10: saw cut outside the repair area, no angles under 90° (docs/references.md) — the footprint
    # contains the outline grown by the margin, its corners are right angles, it grows with the margin
    outline = Polygon([(0, 0), (0.8, 0.1), (1.0, 0.6), (0.3, 0.9), (-0.1, 0.5)])
    rect, _, _ = repair_footprint(outline, margin, "rotated")
    assert rect.buffer(1e-9).contains(outline.buffer(margin))
    xy = np.asarray(rect.exterior.coords)[:-1]
    for k in range(4):
        a, b, c = xy[k - 1], xy[k], xy[(k + 1) % 4]
        assert abs(np.dot(a - b, c - b)) < 1e-9
    bigger, _, _ = repair_footprint(outline, margin + 0.05, "rotated")
    assert bigger.area > rect.area


@pytest.mark.parametrize("radius", [0.15, 0.25, 0.4])
@pytest.mark.parametrize("gain_db", [12.0, 20.0, 28.0])
def test_outline_model_on_synthetic_plates(radius: float, gain_db: float) -> None:
    # a plate of known radius: VER = 10·log10(1 + G·φ(r/a)²), the clamped mode shape φ; grid 5 cm.
    # The outline estimate must lie within 15 % of πa² and closer than the 6 dB contour's area.
    xy, r, c = shapes.regular()
    grid = grid_from_indices(xy, r, c)
    rho = np.hypot(xy[:, 0] - 2.0, xy[:, 1] - 2.0) / radius
    ver = 10 * np.log10(1 + (10 ** (gain_db / 10) - 1) * clamped_mode_shape(rho) ** 2)
    (contour,) = level_polygons(grid, grid.contour_values(ver, np.ones(len(ver), bool)), 6.0)
    vmax = float(ver.max())
    outline, _ = defect_outline(contour, vmax, 6.0)
    truth = math.pi * radius**2
    assert outline.area == pytest.approx(truth, rel=0.15)
    assert abs(outline.area - truth) < abs(contour.area - truth)


def test_contour_fraction_inverts_the_mode_shape() -> None:
    # at the level where G·φ² = 10^(L/10) − 1 with φ = φ(0.6), the contour lies at ρ = 0.6
    gain = 10 ** 2.0 - 1
    phi = float(clamped_mode_shape(0.6))
    level = 10 * math.log10(1 + gain * phi**2)
    assert contour_fraction(20.0, level) == pytest.approx(0.6, abs=1e-3)


def test_depth_range_contains_the_plate_that_made_the_frequency() -> None:
    # forward: clamped plate a = 0.3 m, h = 50 mm, E 27.8 GPa (ACI 318, f'c 35), ρ 2400, ν 0.2
    conc = Concrete(modulus_pa=4700 * math.sqrt(35) * 1e6, density=2400, poisson=0.2)
    f = plate_frequency(0.3, 0.05, conc.modulus_pa, conc.density, conc.poisson, clamped_lambda() ** 2)
    area = math.pi * 0.3**2
    lo, hi = depth_range(f, area, area, conc)
    assert lo == pytest.approx(0.05, rel=1e-9)  # the clamped end recovers it exactly
    # the simply supported end: thickness scales with λ²_clamped/λ²_ss = 10.2158/4.7826 (Leissa)
    assert hi / lo == pytest.approx(10.2158 / 4.7826, rel=1e-3)


def test_zone_statistics_leave_dropouts_out() -> None:
    # a hand-worked 4 × 4 grid at 0.1 m: the zone (a square around the middle four points) holds points
    # of VER 8, 10, 12 and 14 dB with peaks 1000–1300 Hz, plus a dropout of VER 40 dB / 9000 Hz that must
    # count for nothing: n = 4, max 14, mean 11, peak median 1150, the dropout lowers the valid share only
    rr, cc = np.mgrid[0:4, 0:4]
    xy = np.column_stack([cc.ravel(), rr.ravel()]) * 0.1
    ver = np.zeros(16)
    peak = np.full(16, 500.0)
    snr = np.full(16, 20.0)
    usable = np.ones(16, dtype=bool)
    for k, (v, f) in zip((5, 6, 9, 10), ((8.0, 1000.0), (10.0, 1100.0), (12.0, 1200.0), (14.0, 1300.0))):
        ver[k], peak[k] = v, f
    ver[11], peak[11], snr[11], usable[11] = 40.0, 9000.0, -5.0, False  # a dropout inside the zone
    zone = shapely.union(box(0.05, 0.05, 0.25, 0.25), box(0.25, 0.15, 0.35, 0.25))  # points 5, 6, 9, 10 and 11
    st_ = point_stats(zone, xy, ver, peak, snr, usable, 0.1)
    assert st_["n_points"] == 4
    assert st_["ver_max_db"] == 14.0 and st_["ver_mean_db"] == pytest.approx(11.0)
    assert st_["peak_hz"] == pytest.approx(1150.0)  # median of 1000, 1100, 1200, 1300
    assert st_["snr_db"] == pytest.approx(20.0)
    assert st_["inside"].sum() == 4 and not st_["inside"][11]
    # valid share: points within one spacing of the zone — all 16 here (the farthest, (0.3, 0), lies 0.07 m
    # from the zone's corner (0.25, 0.05)); only the dropout is not usable: 15/16
    assert st_["valid_share"] == 15 / 16
    # a zone with no point near it: nothing counted, no VER, a valid share of 0
    far = point_stats(box(5.0, 5.0, 5.2, 5.2), xy, ver, peak, snr, usable, 0.1)
    assert far["n_points"] == 0 and far["valid_share"] == 0.0
    assert math.isnan(far["ver_max_db"]) and math.isnan(far["ver_mean_db"]) and math.isnan(far["peak_hz"])


def test_confidence_factors_by_their_formulas() -> None:
    # each factor as docs/zones.md writes it, worked by hand: support 1 − e^(−n/4), contrast
    # 1 − e^(−(VERmax − level)/3 dB), coherence e^(−spread/0.15), quality valid share × (1 − e^(−SNR/6 dB))
    f = confidence_factors(8, 16.0, 10.0, 0.15, 0.9, 12.0)
    assert f == pytest.approx((1 - math.exp(-2), 1 - math.exp(-2), math.exp(-1), 0.9 * (1 - math.exp(-2))), rel=1e-12)
    # at or below their floors: no points, a peak under the level, a negative spread or SNR count as none;
    # unknown spread or SNR (VER given without spectra) leave their factor at 1; a share is at most 1
    assert confidence_factors(0, 8.0, 10.0, -1.0, 1.5, -3.0) == (0.0, 0.0, 1.0, 0.0)
    assert confidence_factors(4, 10.0, 10.0, float("nan"), 1.0, float("nan"))[2:] == (1.0, 1.0)
    assert confidence_factors(4, 10.0, 10.0, 0.0, 1.5, float("nan"))[3] == 1.0


def test_outline_confidence_by_its_formula() -> None:
    # 0.5 + 0.5·e^(−max(misfit − 1, 0)): 1 within the scatter, 0.68 at 2, 0.52 at 5, 0.5 without an outline
    assert outline_confidence(0.3) == 1.0 and outline_confidence(1.0) == 1.0
    assert outline_confidence(2.0) == pytest.approx(0.5 + 0.5 * math.exp(-1.0), rel=1e-12)
    assert outline_confidence(5.0) == pytest.approx(0.5 + 0.5 * math.exp(-4.0), rel=1e-12)
    assert outline_confidence(float("nan")) == 0.5


def test_no_depth_without_a_peak_and_both_areas() -> None:
    c = Concrete()
    assert all(math.isfinite(v) for v in depth_range(1500.0, 0.05, 0.1, c))
    for args in ((0.0, 0.05, 0.1), (1.0, 0.05, 0.1), (1500.0, 0.0, 0.1), (1500.0, 0.05, 0.0), (float("nan"), 0.05, 0.1)):
        lo, hi = depth_range(*args, c)
        assert (math.isnan(lo) and math.isnan(hi)) == (args[0] <= 0 or args[1] <= 0 or args[2] <= 0
                                                       or args[0] != args[0])


def test_zones_are_numbered_row_by_row_at_a_thousandth() -> None:
    # the key rounds the centroid to 3 decimals (1 mm in a metre drawing): centroids less than that apart in
    # y are one row, ordered by x; further apart, by y
    def sq(x: float, y: float) -> Polygon:
        return box(x - 0.01, y - 0.01, x + 0.01, y + 0.01)

    same_row = [sq(2.0, 1.0001), sq(1.0, 1.0004)]
    assert sorted(same_row, key=order_key)[0].centroid.x == pytest.approx(1.0)
    rows = [sq(1.0, 1.6), sq(2.0, 1.4)]
    assert sorted(rows, key=order_key)[0].centroid.y == pytest.approx(1.4)
    same_column = [sq(1.0004, 2.0), sq(1.0001, 1.0)]  # x rounding does not reorder rows
    assert sorted(same_column, key=order_key)[0].centroid.y == pytest.approx(1.0)
    ties = [sq(1.0004, 1.0), sq(1.0001, 1.0)]  # equal keys below a thousandth: the order found is kept
    assert sorted(ties, key=order_key)[0].centroid.x == pytest.approx(1.0004)
    assert order_key(sq(1.23456, 7.65432)) == (7.654, 1.235)


def test_contour_fraction_against_the_bessel_mode_and_at_its_edges() -> None:
    # where the contour at the level lies, as a fraction of the radius: the ρ at which the clamped mode
    # (J0(λρ) − J0(λ)/I0(λ)·I0(λρ), normalised; Leissa Table 2.1, λ² = 10.2158) gives the energy the level
    # needs — solved here with scipy's brentq on the Bessel functions
    from scipy import optimize, special

    lam = math.sqrt(10.2158)
    w0 = 1.0 - special.j0(lam) / special.i0(lam)

    def shape(r: float) -> float:
        return (special.j0(lam * r) - special.j0(lam) / special.i0(lam) * special.i0(lam * r)) / w0

    for peak, level in ((18.0, 6.0), (10.0, 2.0), (2.0, 1.0), (15.0, 14.0)):
        phi = math.sqrt((10 ** (level / 10) - 1) / (10 ** (peak / 10) - 1))
        rho = optimize.brentq(lambda r: shape(r) - phi, 0.0, 1.0, xtol=1e-12)
        assert contour_fraction(peak, level) == pytest.approx(rho, abs=2e-4)
    # no gain over the reference, or a level at or below 0 dB: the contour is the whole plate
    assert contour_fraction(-1.0, 6.0) == 1.0 and contour_fraction(0.0, 6.0) == 1.0
    assert contour_fraction(10.0, 0.0) == 1.0 and contour_fraction(10.0, -3.0) == 1.0


def test_the_parent_zone_is_the_one_that_covers_the_point() -> None:
    # an L-shaped parent whose bounding box holds the child's point but whose area does not; a second
    # parent that does; and a geometry outside both
    from types import SimpleNamespace

    ell = SimpleNamespace(contour=shapely.union(box(0, 0, 3, 1), box(0, 0, 1, 3)))
    square = SimpleNamespace(contour=box(1.5, 1.5, 2.5, 2.5))
    find = parent_finder([ell, square])
    assert find(box(1.9, 1.9, 2.1, 2.1)) is square  # inside the L's bounding box, not inside the L
    assert find(box(0.2, 2.0, 0.4, 2.2)) is ell
    assert find(box(5, 5, 6, 6)) is None
    assert parent_finder([])(box(0, 0, 1, 1)) is None
