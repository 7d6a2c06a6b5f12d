"""Threshold a VER map on its grid into polygons with holes, with sub-cell boundaries.

contourpy's filled contours interpolate the level crossing linearly along each
grid edge, so a boundary sits between nodes where the field really crosses the
level instead of on the node staircase.
"""

from __future__ import annotations

import contourpy
import numpy as np
import shapely
from shapely.geometry import MultiPolygon, Polygon

from overlay.zones.grid import Grid, ScatterGrid


def level_polygons(grid: Grid | ScatterGrid, values: np.ma.MaskedArray, level: float) -> list[Polygon]:
    """Polygons (with holes) where ``values > level``; masked nodes are outside the scan.

    contourpy fills ``lower < z <= upper``: a node exactly at the level lies on a boundary, and a
    plateau exactly at it encloses no area.  Returned polygons are valid and in the grid's
    coordinates, largest first.
    """
    z = np.ma.MaskedArray(values.data.astype(np.float64), mask=np.ma.getmaskarray(values))
    if z.count() == 0 or not np.ma.max(z) > level:
        return []
    upper = float(np.ma.max(z)) + 1.0
    gen = contourpy.contour_generator(grid.x, grid.y, z, fill_type=contourpy.FillType.OuterOffset)
    points, offsets = gen.filled(level, upper)
    polys: list[Polygon] = []
    for pts, offs in zip(points, offsets):
        rings = [pts[offs[i] : offs[i + 1]] for i in range(len(offs) - 1)]
        rings = [r for r in rings if len(r) >= 4]
        if not rings:
            continue
        poly = Polygon(rings[0], rings[1:])
        polys.extend(_valid_parts(poly))
    polys = [p for p in polys if p.area > 0]
    polys.sort(key=lambda p: -p.area)
    return polys


def _valid_parts(poly: Polygon) -> list[Polygon]:
    """A self-touching ring made valid: its polygons, without the lines ``make_valid`` may leave."""
    if poly.is_valid:
        return [poly]
    fixed = shapely.make_valid(poly)
    return [g for g in shapely.get_parts(fixed) if isinstance(g, Polygon)] + [
        p for g in shapely.get_parts(fixed) if isinstance(g, MultiPolygon) for p in g.geoms
    ]
