"""GeoJSON exporter (RFC 7946) for quick sharing: zones as WGS 84 longitude/latitude features.

RFC 7946 fixes the CRS to WGS 84 with longitude first, wants exterior rings
counter-clockwise and holes clockwise, and has no "crs" member.  The map CRS
is transformed to WGS 84 through our transformation check (its accuracy goes
into the file's "overlay" member); without a map frame there is nothing
geographic to write and the exporter says so.
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pyproj
import shapely
from shapely.geometry import mapping
from shapely.geometry.polygon import orient

from ..cautions import CAUTIONS
from ..errors import SiteFileError
from ..frames import crs_transformer

if TYPE_CHECKING:
    from ..pipeline import RunResult

DECIMALS = 8  # about a millimetre in longitude and latitude


def _clean(v: object) -> object:
    if isinstance(v, float) and not math.isfinite(v):
        return None
    if isinstance(v, (np.floating, np.integer)):
        return v.item()
    return v


class GeoJsonExporter:
    name = "geojson"
    suffix = ".geojson"
    description = "zones as RFC 7946 GeoJSON (WGS 84 longitude/latitude) for quick sharing"

    def write(self, result: "RunResult", path: Path) -> None:
        if result.to_map is None or result.crs is None:
            raise SiteFileError("GeoJSON needs a [map] frame in the site file (RFC 7946 is WGS 84 only)",
                                source=result.site.path, field="outputs.formats")
        zones = result.zones
        mapped = [result.to_map.apply_geometry(z.contour) for z in zones]
        centre = shapely.union_all(mapped).centroid if mapped else None
        lonlat = None
        if centre is not None:
            lonlat = pyproj.Transformer.from_crs(result.crs, result.crs.geodetic_crs, always_xy=True).transform(centre.x, centre.y)
        t, accuracy = crs_transformer(result.crs, "EPSG:4326", lonlat, source=str(result.site.path))
        feats = []
        for z, g in zip(zones, mapped):
            wgs = shapely.transform(g, lambda xy: np.column_stack(t.transform(xy[:, 0], xy[:, 1])))
            wgs = orient(wgs, sign=1.0)  # exterior counter-clockwise, holes clockwise (RFC 7946 §3.1.6)
            geom = json.loads(json.dumps(mapping(wgs)), parse_float=lambda s: round(float(s), DECIMALS))
            feats.append({"type": "Feature", "id": z.zone_id, "geometry": geom,
                          "properties": {k: _clean(v) for k, v in z.record().items()}})
        doc = {
            "type": "FeatureCollection",
            "features": feats,
            "overlay": {"site": result.site.name, "structure": result.site.structure, "run": result.started,
                        "tool_version": result.tool_version, "from_crs": result.crs.to_string(),
                        "transformation": t.description, "transformation_accuracy_m": accuracy,
                        "cautions": list(CAUTIONS)},
        }
        path.write_text(json.dumps(doc, ensure_ascii=False), encoding="utf-8")
