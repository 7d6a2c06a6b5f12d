"""Arrange scan points on their (possibly curvilinear, possibly incomplete) grid."""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import shapely
import shapely.errors
from shapely.geometry import Polygon

from overlay.errors import BundleError

if TYPE_CHECKING:
    from overlay.io.bundle import Scan


@dataclass(frozen=True)
class Grid:
    """Node coordinates ``x``, ``y`` (rows × cols) and the point index at each node (-1: no point)."""

    x: np.ndarray
    y: np.ndarray
    index: np.ndarray

    @property
    def shape(self) -> tuple[int, int]:
        return self.index.shape  # type: ignore[return-value]

    def values(self, per_point: np.ndarray, usable: np.ndarray) -> np.ma.MaskedArray:
        """Per-point values on the grid, masked where there is no point or it is not usable."""
        has = self.index >= 0
        out = np.zeros(self.shape, dtype=np.float64)
        out[has] = per_point[self.index[has]]
        mask = ~has
        mask[has] |= ~usable[self.index[has]]
        mask |= ~np.isfinite(out)
        out[~np.isfinite(out)] = 0.0
        return np.ma.MaskedArray(out, mask=mask)

    def contour_values(self, per_point: np.ndarray, usable: np.ndarray) -> np.ma.MaskedArray:
        """Values to contour: isolated dropouts filled from their neighbours (see fill_isolated)."""
        return fill_isolated(self.values(per_point, usable), self.index >= 0)

    def extent(self) -> Polygon:
        """The scanned area: union of the grid cells whose four corners all carry a point."""
        has = self.index >= 0
        cell = has[:-1, :-1] & has[1:, :-1] & has[1:, 1:] & has[:-1, 1:]
        r, c = np.nonzero(cell)
        if r.size == 0:
            return Polygon()
        corners = [(r, c), (r + 1, c), (r + 1, c + 1), (r, c + 1), (r, c)]
        rings = np.stack([np.stack([self.x[i, j], self.y[i, j]], axis=-1) for i, j in corners], axis=1)
        _check_unfolded(rings, r, c)
        cells = shapely.polygons(rings)
        total = float(shapely.area(cells).sum())
        # cells that tile the area (shared edges, no overlap) are united by matching their edges — fifty
        # times faster than a general union on a 50,000-point scan; anything else shows as an invalid or
        # smaller result and goes through the general union, which tells how much overlaps
        try:
            union = shapely.coverage_union_all(cells)
        except shapely.errors.GEOSException:
            union = Polygon()  # not a tiling: the general union below says what is wrong
        if not union.is_valid or abs(union.area - total) > 1e-6 * total:
            try:
                union = shapely.union_all(cells)
            except shapely.errors.GEOSException as exc:
                raise BundleError(f"the grid's cells overlap ({exc}); a point's coordinates do not fit its row/col",
                                  field="points.csv") from exc
            if union.area < total * (1 - 1e-6):
                raise BundleError(f"the grid's cells overlap ({total - union.area:.3g} of {total:.3g} area units "
                                  "twice); a point's coordinates do not fit its row/col", field="points.csv")
        return _largest(union)

    def spacing(self) -> float:
        """Median distance between neighbouring nodes, in the grid's coordinate unit."""
        has = self.index >= 0
        pairs = [(has[1:, :] & has[:-1, :], 0), (has[:, 1:] & has[:, :-1], 1)]
        d = [np.hypot(np.diff(self.x, axis=a)[both], np.diff(self.y, axis=a)[both]) for both, a in pairs]
        all_d = np.concatenate(d)
        if all_d.size == 0:
            raise BundleError("grid has no neighbouring points; cannot tell its spacing")
        step = float(np.median(all_d))
        if not step > 0 or not np.isfinite(step):
            raise BundleError(f"grid spacing is {step:g}: neighbouring points coincide", field="points.csv")
        return step


def _check_unfolded(rings: np.ndarray, r: np.ndarray, c: np.ndarray) -> None:
    """Every cell turns the same way round: a point displaced across its neighbours folds the grid."""
    x, y = rings[:, :4, 0], rings[:, :4, 1]
    signed = 0.5 * np.sum(x * np.roll(y, -1, axis=1) - np.roll(x, -1, axis=1) * y, axis=1)
    ref = np.median(signed)
    bad = ~(signed * np.sign(ref) > 1e-9 * abs(ref)) if ref != 0 else np.ones(len(signed), bool)
    if bad.any():
        k = int(np.argmax(bad))
        raise BundleError(f"the grid folds over itself at the cell of row {int(r[k])}, col {int(c[k])} (counted from the "
                          "smallest index): a point's coordinates do not fit its row/col", field="points.csv")


def grid_from_indices(xy: np.ndarray, row: np.ndarray, col: np.ndarray) -> Grid:
    """Grid from explicit ``row``/``col``; nodes without a point get coordinates from an affine fit of the rest."""
    r0, c0 = row - row.min(), col - col.min()
    shape = (int(r0.max()) + 1, int(c0.max()) + 1)
    index = np.full(shape, -1, dtype=np.int64)
    index[r0, c0] = np.arange(len(row))
    x = np.empty(shape)
    y = np.empty(shape)
    design = np.column_stack([np.ones(len(row)), r0, c0])
    coef, *_ = np.linalg.lstsq(design, xy, rcond=None)
    rr, cc = np.mgrid[0 : shape[0], 0 : shape[1]]
    filled = np.stack([np.ones_like(rr), rr, cc], axis=-1) @ coef
    x[:], y[:] = filled[..., 0], filled[..., 1]
    x[r0, c0], y[r0, c0] = xy[:, 0], xy[:, 1]
    return Grid(x, y, index)


def infer_grid(xy: np.ndarray, rel_tol: float = 1e-3) -> Grid | None:
    """A regular axis-aligned grid from coordinates alone, or ``None`` if the points do not form one."""
    ux = _levels(xy[:, 0], rel_tol)
    uy = _levels(xy[:, 1], rel_tol)
    if ux is None or uy is None or len(ux) < 2 or len(uy) < 2:
        return None
    col = np.rint((xy[:, 0] - ux[0]) / (ux[1] - ux[0])).astype(np.int64)
    row = np.rint((xy[:, 1] - uy[0]) / (uy[1] - uy[0])).astype(np.int64)
    if len(np.unique(row * (col.max() + 1) + col)) != len(xy):
        return None
    return grid_from_indices(xy, row, col)


def _levels(v: np.ndarray, rel_tol: float) -> np.ndarray | None:
    u = np.unique(v)
    if len(u) < 2:
        return None
    step = np.diff(u)
    ref = np.median(step)
    if ref <= 0 or np.any(np.abs(step / ref - np.rint(step / ref)) > 0.05):
        return None
    k = np.rint((u - u[0]) / ref)
    if np.max(np.abs(u - (u[0] + k * ref))) > rel_tol * max(ref, 1e-12) * 50:
        return None
    return u[0] + np.arange(int(k.max()) + 1) * ref


def fill_isolated(values: np.ma.MaskedArray, fillable: np.ndarray) -> np.ma.MaskedArray:
    """Fill masked nodes marked ``fillable`` that have at least two unmasked 4-neighbours with their mean.

    A single dropout inside a zone should not punch a hole into it; nodes
    with no point at all (outside the scan) are never filled.
    """
    v = values.filled(np.nan)
    pad = np.pad(v, 1, constant_values=np.nan)
    neigh = np.stack([pad[:-2, 1:-1], pad[2:, 1:-1], pad[1:-1, :-2], pad[1:-1, 2:]])
    count = np.isfinite(neigh).sum(axis=0)
    mean = np.nansum(neigh, axis=0) / np.maximum(count, 1)
    take = np.ma.getmaskarray(values) & fillable & (count >= 2)
    out = values.copy()
    out[take] = mean[take]
    return out


def _largest(geom: Any) -> Polygon:
    geom = shapely.simplify(geom, 0)
    if geom.geom_type == "MultiPolygon":
        geom = max(geom.geoms, key=lambda g: g.area)
    return geom if geom.geom_type == "Polygon" else Polygon()


class ScatterGrid:
    """Scattered points resampled onto a regular grid at their own spacing.

    Values are interpolated (piecewise cubic, Clough-Tocher) over the Delaunay triangles of the usable
    points; nodes outside the scanned area (outside every triangle whose edges
    are at most ``max_edge`` spacings long) are masked.  Same interface as Grid.
    """

    def __init__(self, xy: np.ndarray, max_edge: float = 2.5):
        import scipy.spatial  # scattered points only: a gridded scan need not load it

        if len(xy) < 3:
            raise BundleError("at least 3 points are needed to contour scattered points")
        centred = xy - xy.mean(axis=0)
        sv = np.linalg.svd(centred, compute_uv=False)
        if not sv[0] > 0 or sv[-1] <= 1e-9 * sv[0]:
            raise BundleError("the scattered points coincide or lie on one line; a scan needs points spread over "
                              "the surface (or give row/col)", field="points.csv")
        try:
            hull = scipy.spatial.ConvexHull(xy)
        except scipy.spatial.QhullError as exc:
            raise BundleError(f"the scattered points do not span an area ({exc.args[0].splitlines()[0]})",
                              field="points.csv") from exc
        self.step = float(np.sqrt(hull.volume / len(xy)))  # the spacing of a regular grid of equal density
        if not self.step > 0:
            raise BundleError("scattered points coincide; cannot tell their spacing")
        self.xy = xy
        self.max_edge = max_edge
        lo, hi = xy.min(axis=0), xy.max(axis=0)
        gx = np.arange(lo[0], hi[0] + self.step / 2, self.step / 2)
        gy = np.arange(lo[1], hi[1] + self.step / 2, self.step / 2)
        self.x, self.y = np.meshgrid(gx, gy)
        self.index = np.full(self.x.shape, -1, dtype=np.int64)
        self._area = self._scanned_area(xy)
        self._inside = shapely.contains_xy(self._area, self.x, self.y) | shapely.intersects_xy(self._area.boundary, self.x, self.y)

    @property
    def shape(self) -> tuple[int, int]:
        return self.x.shape  # type: ignore[return-value]

    def _scanned_area(self, xy: np.ndarray) -> Polygon:
        import scipy.spatial

        tri = scipy.spatial.Delaunay(xy)
        pts = xy[tri.simplices]
        edges = np.stack([np.hypot(*(pts[:, i] - pts[:, (i + 1) % 3]).T) for i in range(3)], axis=1)
        keep = edges.max(axis=1) <= self.max_edge * self.step
        rings = np.concatenate([pts[keep], pts[keep][:, :1]], axis=1)
        return _largest(shapely.union_all(shapely.polygons(rings)))

    def values(self, per_point: np.ndarray, usable: np.ndarray) -> np.ma.MaskedArray:
        ok = usable & np.isfinite(per_point)
        if ok.sum() < 3:
            raise BundleError("fewer than 3 usable scattered points to interpolate")
        import scipy.interpolate

        interp = scipy.interpolate.CloughTocher2DInterpolator(self.xy[ok], per_point[ok])
        z = interp(self.x, self.y)
        mask = ~self._inside | ~np.isfinite(z)
        return np.ma.MaskedArray(np.where(mask, 0.0, z), mask=mask)

    def contour_values(self, per_point: np.ndarray, usable: np.ndarray) -> np.ma.MaskedArray:
        return self.values(per_point, usable)

    def extent(self) -> Polygon:
        return self._area

    def spacing(self) -> float:
        """The points' own spacing (that of a regular grid of the same density), not the finer resampling step."""
        return self.step


def scan_grid(scan: "Scan", xy: np.ndarray | None = None) -> Grid | ScatterGrid:
    """The scan's grid on coordinates ``xy`` (default: the bundle's): from row/col, else a regular grid
    inferred from the bundle's coordinates, else the points resampled onto one."""
    xy = scan.xy if xy is None else xy
    if scan.row is not None and scan.col is not None:
        return grid_from_indices(xy, scan.row, scan.col)
    regular = infer_grid(scan.xy)
    if regular is None:
        return ScatterGrid(xy)
    r, c = np.nonzero(regular.index >= 0)
    rows = np.empty(scan.n_points, dtype=np.int64)
    cols = np.empty(scan.n_points, dtype=np.int64)
    rows[regular.index[r, c]], cols[regular.index[r, c]] = r, c
    return grid_from_indices(xy, rows, cols)


def grid_positions(grid: Grid | ScatterGrid, n: int) -> np.ndarray | None:
    """Each point's (row, column) on its grid (-1 where it has none), for pictures drawn cell by cell."""
    if isinstance(grid, ScatterGrid):
        return None
    rc = np.full((n, 2), -1, dtype=np.int64)
    r, c = np.nonzero(grid.index >= 0)
    rc[grid.index[r, c]] = np.column_stack([r, c])
    return rc
