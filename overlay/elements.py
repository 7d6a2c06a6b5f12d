"""The owner's element (asset) layer: outlines for area shares, and zones split by the assets they touch."""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import pyogrio
import pyproj
import shapely

from .errors import SiteFileError
from .frames import reproject
from .site import Elements
from .transforms import Similarity

if TYPE_CHECKING:
    from .zones import Zone


@dataclass
class ElementLayer:
    """Asset ids and outlines in the map CRS (reprojected if needed), with surface areas in m²."""

    ids: list[str]
    outlines: np.ndarray  # shapely polygons, map CRS
    areas_m2: dict[str, float]
    area_factor: float  # map area per surface m² (the placement's scale squared)


def read_elements(elements: Elements, crs: pyproj.CRS | None, to_map: Similarity | None, drawing_unit_m: float) -> ElementLayer:
    """Read the layer, bring it into the map CRS through our CRS checks, and take each asset's area."""
    src = str(elements.source)
    try:
        frame = pyogrio.read_dataframe(elements.source, layer=elements.layer)
    except Exception as exc:  # GDAL's own message names the problem
        raise SiteFileError(f"cannot read the element layer ({exc})", source=src, field="elements") from exc
    if elements.id_field not in frame.columns:
        raise SiteFileError(
            f"no field {elements.id_field!r}; the layer has {', '.join(c for c in frame.columns if c != 'geometry')}",
            source=src, field="elements.id_field")
    geoms = np.asarray(frame.geometry.values, dtype=object)
    if crs is not None and frame.crs is not None and not frame.crs.equals(crs):
        geoms, _, _ = reproject(geoms, frame.crs, crs, source=src)  # never a silent ballpark datum shift
    elif crs is None or frame.crs is None:
        warnings.warn(f"{src}: element layer or map frame has no CRS; outlines taken as they are", stacklevel=2)
    k = 1.0 if to_map is None else (to_map.scale / drawing_unit_m) ** 2
    ids = [str(i) for i in frame[elements.id_field]]
    return ElementLayer(ids, geoms, {i: float(g.area) / k for i, g in zip(ids, geoms)}, k)


def split_by_assets(zones: list["Zone"], basis: str, to_map: Similarity | None, layer: ElementLayer) -> list[dict]:
    """Each zone's affected polygon (defect outline or contour) cut by the assets it overlaps.

    Every piece belongs to one asset; pieces of one zone add up to its area
    where the zone lies within the assets.  Geometries in the map CRS, areas in surface m².
    """
    tree = shapely.STRtree(layer.outlines)
    pieces: list[dict] = []
    for z in zones:
        poly = z.defect if basis == "outline" else z.contour
        g = to_map.apply_geometry(poly) if to_map is not None else poly
        for k in tree.query(g, predicate="intersects"):
            part = shapely.intersection(g, layer.outlines[k])
            if part.is_empty or part.area <= 0:
                continue
            pieces.append({"asset_id": layer.ids[k], "zone_id": z.zone_id, "defect_id": z.defect_id,
                           "scan_id": z.scan_id, "class": z.class_name, "area_m2": part.area / layer.area_factor,
                           "geometry": part})
    return pieces
