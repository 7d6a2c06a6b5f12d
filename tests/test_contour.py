"""Contours of analytic level sets: areas against πr², centroids, holes, dropouts."""

from __future__ import annotations

import numpy as np
import pytest

from overlay.zones.contour import level_polygons
from overlay.zones.grid import fill_isolated, grid_from_indices, infer_grid


def _grid(n: int = 81, spacing: float = 0.05):
    rr, cc = np.mgrid[0:n, 0:n]
    xy = np.column_stack([cc.ravel() * spacing, rr.ravel() * spacing])
    return grid_from_indices(xy, rr.ravel(), cc.ravel()), xy


def test_circular_bump_level_set_is_the_circle() -> None:
    # VER = 20 − 40·r² dB: the 10 dB level set is the circle r = 0.5 m; area π·0.25 = 0.7854 m²
    grid, xy = _grid()
    cx, cy = 2.013, 1.987
    r2 = (xy[:, 0] - cx) ** 2 + (xy[:, 1] - cy) ** 2
    ver = 20.0 - 40.0 * r2
    polys = level_polygons(grid, grid.values(ver, np.ones(len(ver), bool)), 10.0)
    assert len(polys) == 1
    p = polys[0]
    assert p.is_valid
    assert p.area == pytest.approx(np.pi * 0.25, rel=0.02)
    assert np.hypot(p.centroid.x - cx, p.centroid.y - cy) < 0.1 * 0.05


def test_annulus_keeps_its_hole() -> None:
    # ring between r = 0.4 and r = 0.8: area π(0.64 − 0.16) = 1.508 m²
    grid, xy = _grid()
    r = np.hypot(xy[:, 0] - 2.0, xy[:, 1] - 2.0)
    ver = 20.0 - 100.0 * (r - 0.6) ** 2  # ≥ 16 dB for |r − 0.6| ≤ 0.2
    (p,) = level_polygons(grid, grid.values(ver, np.ones(len(ver), bool)), 16.0)
    assert len(p.interiors) == 1 and p.is_valid
    assert p.area == pytest.approx(np.pi * (0.64 - 0.16), rel=0.02)


def test_two_bumps_two_polygons_largest_first() -> None:
    grid, xy = _grid()
    r1 = np.hypot(xy[:, 0] - 1.0, xy[:, 1] - 1.0)
    r2 = np.hypot(xy[:, 0] - 3.0, xy[:, 1] - 3.0)
    ver = np.maximum(20 - 40 * r1**2, 20 - 80 * r2**2)
    polys = level_polygons(grid, grid.values(ver, np.ones(len(ver), bool)), 10.0)
    assert len(polys) == 2 and polys[0].area > polys[1].area
    assert polys[0].area == pytest.approx(np.pi * 0.25, rel=0.02)
    assert polys[1].area == pytest.approx(np.pi * 0.125, rel=0.02)


def test_nothing_above_level_gives_no_polygon() -> None:
    grid, xy = _grid(11)
    assert level_polygons(grid, grid.values(np.zeros(len(xy)), np.ones(len(xy), bool)), 6.0) == []


def test_single_dropout_inside_a_zone_does_not_punch_a_hole() -> None:
    grid, xy = _grid()
    r2 = (xy[:, 0] - 2.0) ** 2 + (xy[:, 1] - 2.0) ** 2
    ver = 20.0 - 40.0 * r2
    usable = np.ones(len(ver), bool)
    usable[grid.index[40, 40]] = False  # the centre point is a dropout
    raw = grid.values(ver, usable)
    holed = level_polygons(grid, raw, 10.0)
    filled = level_polygons(grid, fill_isolated(raw, grid.index >= 0), 10.0)
    assert len(holed[0].interiors) == 1  # without filling, the dropout is a hole
    assert len(filled[0].interiors) == 0
    assert filled[0].area == pytest.approx(np.pi * 0.25, rel=0.02)


def test_rotated_grid_gives_same_area() -> None:
    n, s, th = 81, 0.05, np.radians(30)
    rr, cc = np.mgrid[0:n, 0:n]
    u, v = cc.ravel() * s, rr.ravel() * s
    xy = np.column_stack([u * np.cos(th) - v * np.sin(th), u * np.sin(th) + v * np.cos(th)])
    grid = grid_from_indices(xy, rr.ravel(), cc.ravel())
    ver = 20.0 - 40.0 * ((u - 2.0) ** 2 + (v - 2.0) ** 2)
    (p,) = level_polygons(grid, grid.values(ver, np.ones(len(ver), bool)), 10.0)
    assert p.area == pytest.approx(np.pi * 0.25, rel=0.02)


def test_grid_inferred_from_coordinates() -> None:
    grid, xy = _grid(9)
    g = infer_grid(xy[::-1].copy())
    assert g is not None and g.shape == (9, 9) and g.spacing() == pytest.approx(0.05)
    assert infer_grid(np.random.default_rng(0).uniform(size=(30, 2))) is None


def _unit_grid(z: np.ndarray):
    n = z.shape[0]
    rr, cc = np.mgrid[0:n, 0:n]
    xy = np.column_stack([cc.ravel(), rr.ravel()]).astype(float)  # 1 m spacing
    return grid_from_indices(xy, rr.ravel(), cc.ravel())


def test_a_corner_node_above_the_level_gives_its_interpolated_triangle() -> None:
    # corner node 2 dB, its neighbours 0 dB, level 1 dB: linear interpolation puts the crossing half-way
    # along both edges, a right triangle of legs 0.5 m — area 0.125 m² (worked by hand)
    z = np.zeros((5, 5))
    z[0, 0] = 2.0
    grid = _unit_grid(z)
    (p,) = level_polygons(grid, grid.values(z.ravel(), np.ones(25, bool)), 1.0)
    assert p.area == pytest.approx(0.125, abs=1e-12) and len(p.exterior.coords) == 4  # a closed triangle


def test_a_plateau_exactly_at_the_level_encloses_nothing_just_above_it_does() -> None:
    # contourpy fills lower < z <= upper: nodes exactly at the level are boundary, not area.  A 3 × 3
    # plateau a hair above the level, 0 around it, covers the 2 × 2 m² between its nodes plus slivers.
    z = np.zeros((7, 7))
    z[2:5, 2:5] = 6.0
    grid = _unit_grid(z)
    ok = np.ones(49, bool)
    assert level_polygons(grid, grid.values(z.ravel(), ok), 6.0) == []
    z[2:5, 2:5] = 6.0 + 1e-9
    (p,) = level_polygons(grid, grid.values(z.ravel(), ok), 6.0)
    assert p.area == pytest.approx(4.0, abs=1e-6)


def test_a_single_node_exactly_at_the_level_gives_no_zero_area_polygon() -> None:
    z = np.zeros((5, 5))
    z[2, 2] = 6.0
    grid = _unit_grid(z)
    assert level_polygons(grid, grid.values(z.ravel(), np.ones(25, bool)), 6.0) == []


@pytest.mark.parametrize("spike", [False, True], ids=["bow-tie", "bow-tie-with-spike"])
def test_a_self_touching_ring_is_split_into_its_polygons(spike: bool) -> None:
    # a bow-tie (0,0)-(2,2)-(2,0)-(0,2) is two triangles of 1 m² each (shoelace, by hand); with a spike
    # make_valid returns a collection of a multipolygon and a line, and only the polygons may stay
    from overlay.zones.contour import _valid_parts
    from shapely.geometry import Polygon

    coords = [(0, 0), (2, 2), (2, 0), (0, 2), (0, 0)] + ([(0, -2), (0, 0)] if spike else [])
    parts = _valid_parts(Polygon(coords))
    assert len(parts) == 2 and all(p.geom_type == "Polygon" and p.is_valid for p in parts)
    assert sorted(p.area for p in parts) == pytest.approx([1.0, 1.0], abs=1e-12)
