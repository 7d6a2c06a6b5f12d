"""Element outlines from the owner's GIS layer, for the share of each element a defect affects."""

from __future__ import annotations

import warnings

import numpy as np
import pyogrio
import pyproj
import shapely

from .errors import SiteFileError
from .frames import crs_transformer
from .transforms import Similarity
from .site import Elements


def element_areas(elements: Elements, crs: object, to_map: Similarity | None, drawing_unit_m: float) -> dict[str, float]:
    """Area in m² (surface) of each element of the layer, keyed by its id field.

    The layer is reprojected into the map CRS if it is in another one; map area
    is turned into surface area through the drawing placement's scale.
    """
    src = str(elements.source)
    try:
        frame = pyogrio.read_dataframe(elements.source, layer=elements.layer)
    except Exception as exc:  # GDAL's own message names the problem
        raise SiteFileError(f"cannot read the element layer ({exc})", source=src, field="elements") from exc
    if elements.id_field not in frame.columns:
        raise SiteFileError(
            f"no field {elements.id_field!r}; the layer has {', '.join(c for c in frame.columns if c != 'geometry')}",
            source=src, field="elements.id_field")
    if crs is not None and frame.crs is not None and not frame.crs.equals(crs):
        # through our own check: never a silent ballpark datum shift
        lonlat = pyproj.Transformer.from_crs(frame.crs, frame.crs.geodetic_crs, always_xy=True).transform(
            *frame.geometry.union_all().centroid.coords[0])
        t, _ = crs_transformer(frame.crs, crs, lonlat, source=src)
        frame = frame.set_geometry(shapely.transform(frame.geometry.values, lambda xy: np.column_stack(t.transform(xy[:, 0], xy[:, 1]))),
                                   crs=crs)
    elif crs is None or frame.crs is None:
        warnings.warn(f"{src}: element layer or map frame has no CRS; areas taken as they are", stacklevel=2)
    k = 1.0 if to_map is None else (to_map.scale / drawing_unit_m) ** 2
    return {str(i): float(a) / k for i, a in zip(frame[elements.id_field], frame.geometry.area)}
