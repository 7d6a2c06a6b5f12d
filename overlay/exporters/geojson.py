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
from shapely.geometry import mapping
from shapely.geometry.polygon import orient

from overlay.cautions import CAUTIONS
from overlay.errors import SiteFileError
from overlay.geometry.crs import reproject

if TYPE_CHECKING:
    from overlay.job import RunResult

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
        mapped = np.array([result.to_map.apply_geometry(z.contour) for z in zones], dtype=object)
        moved, t, accuracy = reproject(mapped, result.crs, "EPSG:4326", source=str(result.site.path))
        feats = []
        for z, wgs in zip(zones, moved):
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
