"""Frames and the transforms between them: scanner → drawing → map.

The plane transforms live in ``transforms``, their fits in ``fits``; this
module places the drawing in the map (declared placement) and checks CRSs with
pyproj.  CRS input of any usual form goes through ``to_crs``.
"""

from __future__ import annotations

import math
import warnings
from typing import Any

import numpy as np
import pyproj
import shapely
from pyproj.exceptions import CRSError

from overlay.errors import CRSCheckError, RegistrationWarning
from overlay.geometry.transforms import Similarity
from overlay.units import LENGTH_TO_M

AREA_MARGIN_DEG = 3.0  # a site this far outside its CRS's area of use is a wrong CRS or placement, not an edge case


def from_placement(origin: tuple[float, float], bearing_deg: float, scale: float, drawing_unit: str) -> Similarity:
    """Drawing → map from the map position of the drawing origin and the bearing of the drawing's +x axis.

    The bearing is measured clockwise from grid north; the drawing's +y axis
    is 90° counter-clockwise from +x (a right-handed drawing).
    """
    k = scale * LENGTH_TO_M[drawing_unit]
    beta = math.radians(bearing_deg)
    return Similarity(a=k * math.sin(beta), b=k * math.cos(beta), tx=origin[0], ty=origin[1])


def to_crs(value: Any, *, source: str | None = None, field: str | None = "crs") -> pyproj.CRS:
    """One normaliser for every way of naming a CRS: EPSG int, "EPSG:n", WKT, PROJ JSON, pyproj.CRS."""
    try:
        return pyproj.CRS.from_user_input(value)
    except (CRSError, TypeError, ValueError) as exc:
        raise CRSCheckError(f"unknown or invalid CRS {value!r} ({exc})", source=source, field=field) from exc


def check_map_crs(crs: pyproj.CRS, site_xy: np.ndarray, *, source: str | None = None) -> None:
    """The map CRS must be projected, in metres, and (warning otherwise) cover the site."""
    label = crs.to_string()
    if not crs.is_projected:
        raise CRSCheckError(f"{label} is not a projected CRS; the map frame needs one in metres", source=source, field="map.crs")
    units = {ax.unit_name for ax in crs.axis_info}
    if not units <= {"metre", "meter", "m"}:
        raise CRSCheckError(f"{label} has axis units {', '.join(sorted(units))}; metres are required", source=source, field="map.crs")
    area = crs.area_of_use
    if area is None or len(site_xy) == 0:
        return
    to_geo = pyproj.Transformer.from_crs(crs, crs.geodetic_crs, always_xy=True)
    with np.errstate(all="ignore"):
        lon, lat = to_geo.transform(site_xy[:, 0], site_xy[:, 1])
    if not (np.all(np.isfinite(lon)) and np.all(np.isfinite(lat))):
        raise CRSCheckError(f"the site's map coordinates (around {np.mean(site_xy[:, 0]):.6g}, {np.mean(site_xy[:, 1]):.6g}) "
                            f"are not a place on the earth in {label}; check [map] origin or monuments",
                            source=source, field="map.origin")

    def within(m: float) -> np.ndarray:
        return (lon >= area.west - m) & (lon <= area.east + m) & (lat >= area.south - m) & (lat <= area.north + m)

    if not np.all(within(AREA_MARGIN_DEG)):
        raise CRSCheckError(
            f"site at lon {np.mean(lon):.5f}, lat {np.mean(lat):.5f} lies more than {AREA_MARGIN_DEG:g} degrees outside "
            f"the area of use of {label} ({area.name}: {area.west:g}..{area.east:g} E, {area.south:g}..{area.north:g} N); "
            "the CRS or the placement is wrong", source=source, field="map")
    if not np.all(within(0.0)):
        warnings.warn(
            f"{source + ': ' if source else ''}site at lon {np.mean(lon):.5f}, lat {np.mean(lat):.5f} lies outside "
            f"the area of use of {label} ({area.name}: {area.west:g}..{area.east:g} E, {area.south:g}..{area.north:g} N)",
            RegistrationWarning,
            stacklevel=2,
        )


def crs_transformer(src: Any, dst: Any, lonlat: tuple[float, float] | None = None, *,
                    source: str | None = None) -> tuple[pyproj.Transformer, float]:
    """The transformation from ``src`` to ``dst`` that PROJ rates best for the site, and its accuracy (m).

    Refuses a ballpark transformation (datum shift unknown to PROJ, off by up to
    hundreds of metres) instead of applying it silently; warns when the best
    operation needs a grid that is not installed, or when the accuracy is unknown.
    """
    a, b = to_crs(src, source=source), to_crs(dst, source=source)
    aoi = None
    if lonlat is not None:
        lon, lat = lonlat
        aoi = pyproj.aoi.AreaOfInterest(lon - 0.01, lat - 0.01, lon + 0.01, lat + 0.01)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # pyproj warns about missing grids; we say it ourselves below
        group = pyproj.transformer.TransformerGroup(a, b, always_xy=True, area_of_interest=aoi)
    if not group.transformers:
        raise CRSCheckError(f"no transformation from {a.to_string()} to {b.to_string()} is available", source=source)
    t = group.transformers[0]
    label = f"{a.to_string()} -> {b.to_string()}"
    if "ballpark" in t.description.lower():
        raise CRSCheckError(
            f"only a ballpark transformation {label} is available ({t.description}); it can be off by hundreds of "
            "metres — install the PROJ grids for it or give the layer in the map CRS", source=source, field="crs")
    if not group.best_available:
        warnings.warn(f"{label}: the best transformation needs a grid that is not installed; using "
                      f"'{t.description}' (accuracy {t.accuracy:g} m)", RegistrationWarning, stacklevel=2)
    elif t.accuracy is None or t.accuracy < 0:
        warnings.warn(f"{label}: accuracy of '{t.description}' is unknown", RegistrationWarning, stacklevel=2)
    return t, float(t.accuracy if t.accuracy is not None else -1.0)


def site_scale_factor(crs: pyproj.CRS, site_xy: np.ndarray) -> tuple[float, float]:
    """(point scale k, areal scale) of the map projection at the site's centre.

    A surface area of A m² shows as A·areal_scale in the map CRS.
    """
    c = np.mean(np.atleast_2d(site_xy), axis=0)
    lon, lat = pyproj.Transformer.from_crs(crs, crs.geodetic_crs, always_xy=True).transform(c[0], c[1])
    f = pyproj.Proj(crs).get_factors(lon, lat)
    return float(math.sqrt(f.meridional_scale * f.parallel_scale)), float(f.areal_scale)


def reproject(geoms: Any, src: Any, dst: Any, *, source: str | None = None) -> tuple[Any, pyproj.Transformer, float]:
    """Shapely geometries (one or an array) from ``src`` to ``dst`` through ``crs_transformer``, the
    transformation chosen for where the geometries are; returns (geometries, transformer, accuracy)."""
    a = to_crs(src, source=source)
    centre = shapely.union_all(geoms).centroid
    lonlat = None
    if not centre.is_empty:
        lonlat = pyproj.Transformer.from_crs(a, a.geodetic_crs, always_xy=True).transform(centre.x, centre.y)
    t, accuracy = crs_transformer(a, dst, lonlat, source=source)
    moved = shapely.transform(geoms, lambda xy: np.column_stack(t.transform(xy[:, 0], xy[:, 1])))
    return moved, t, accuracy
