"""The grid of a scan: its scanned area and the refusal of grids that fold or overlap.

Reference: GEOS's general polygon union (shapely.union_all) of the same cells — the fast path
unites the cells by their shared edges and must give the identical area."""

from __future__ import annotations

import numpy as np
import pytest
import shapely

from overlay.errors import BundleError
from overlay.zones.grid import grid_from_indices


def _grid(n_rows: int = 12, n_cols: int = 15, spacing: float = 0.05, bend: float = 0.0, drop=()):
    rr, cc = np.mgrid[0:n_rows, 0:n_cols]
    keep = np.ones(rr.shape, dtype=bool)
    for r, c in drop:
        keep[r, c] = False
    r, c = rr[keep], cc[keep]
    x = c * spacing + bend * np.sin(r * 0.4)  # curvilinear: rows shifted sideways
    y = r * spacing + bend * np.cos(c * 0.3)
    return np.column_stack([x, y]).astype(float), r, c


def _cells(xy, r, c):
    index = -np.ones((r.max() + 1, c.max() + 1), dtype=int)
    index[r, c] = np.arange(len(r))
    out = []
    for i in range(index.shape[0] - 1):
        for j in range(index.shape[1] - 1):
            k = [index[i, j], index[i + 1, j], index[i + 1, j + 1], index[i, j + 1]]
            if min(k) >= 0:
                out.append(shapely.Polygon(xy[k]))
    return out


@pytest.mark.parametrize("bend, drop", [(0.0, ()), (0.02, ()), (0.02, ((3, 4), (3, 5), (8, 0))), (0.0, ((0, 0),))])
def test_scanned_area_equals_the_general_union_of_the_cells(bend: float, drop) -> None:
    xy, r, c = _grid(bend=bend, drop=drop)
    area = grid_from_indices(xy, r, c).extent()
    reference = shapely.union_all(_cells(xy, r, c))  # GEOS's general union
    assert area.is_valid and area.geom_type == "Polygon"
    assert abs(area.area - reference.area) <= 1e-9 * reference.area
    assert area.symmetric_difference(reference).area <= 1e-9 * reference.area


def test_a_grid_that_folds_over_itself_is_refused() -> None:
    xy, r, c = _grid()
    k = np.nonzero((r == 5) & (c == 5))[0][0]
    xy[k, 0] += 0.12  # past two neighbours: its cells turn the other way round
    with pytest.raises(BundleError, match="folds over itself") as info:
        grid_from_indices(xy, r, c).extent()
    assert info.value.exit_code == 3
