"""The owner's element (asset) layer: outlines for area shares, and zones split by the assets they touch."""

from __future__ import annotations

import sqlite3
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pyproj
import shapely

from overlay.assets import gpkg_sql
from overlay.errors import CRSCheckError, OutputConflictError, SiteFileError
from overlay.geometry.crs import reproject
from overlay.geometry.transforms import Similarity

if TYPE_CHECKING:
    from overlay.settings import Elements
    from overlay.zones.zone import Zone


@dataclass(frozen=True)
class AssetTable:
    """The asset layer as stored: ids, outlines in the layer's own CRS, that CRS."""

    layer: str
    ids: tuple[str, ...]
    outlines: np.ndarray  # shapely polygons
    crs: pyproj.CRS | None

    def same_as(self, other: "AssetTable") -> bool:
        """True when both hold the same ids with exactly the same outlines, in the same CRS."""
        return (self.layer == other.layer and self.ids == other.ids and len(self.outlines) == len(other.outlines)
                and bool(np.all(shapely.equals_exact(self.outlines, other.outlines, 0.0)))
                and (self.crs == other.crs))


@dataclass
class ElementLayer:
    """Asset ids and outlines in the map CRS (reprojected if needed), with surface areas in m²."""

    ids: list[str]
    outlines: np.ndarray  # shapely polygons, map CRS
    areas_m2: dict[str, float]
    area_factor: float  # map area per surface m² (the placement's scale squared)


def is_geopackage_file(path: Path) -> bool:
    """A file that starts as SQLite does (GeoPackage standard, Req 1)."""
    with path.open("rb") as fh:
        return fh.read(16) == b"SQLite format 3\x00"


def read_asset_table(elements: "Elements") -> AssetTable:
    """Read the asset layer: through SQLite for a GeoPackage and through psycopg for a PostgreSQL
    database (the merge reads it the same way under its lock, so the two reads can be compared
    exactly), through GDAL for any other format."""
    if elements.database is not None:
        from overlay.assets.postgis import read_assets

        return read_assets(elements)
    assert elements.source is not None
    src = str(elements.source)
    if is_geopackage_file(elements.source):
        from overlay.assets.merge import WAIT_S

        try:
            con = sqlite3.connect(f"{elements.source.resolve().as_uri()}?mode=ro", uri=True, timeout=WAIT_S)
        except sqlite3.Error as exc:
            raise SiteFileError(f"cannot open the asset GeoPackage ({exc})", source=src, field="elements") from exc
        try:
            return asset_table_sql(con, elements, src)
        except sqlite3.OperationalError as exc:
            if "locked" in str(exc):
                raise OutputConflictError(f"the asset GeoPackage is locked by another program (waited {WAIT_S:g} s); "
                                          "close its edit session and rerun", source=src) from exc
            raise SiteFileError(f"cannot read the asset GeoPackage ({exc})", source=src, field="elements") from exc
        except sqlite3.Error as exc:
            raise SiteFileError(f"cannot read the asset GeoPackage ({exc})", source=src, field="elements") from exc
        finally:
            con.close()
    try:
        import pyogrio  # GDAL only for an asset layer that is not a GeoPackage

        frame = pyogrio.read_dataframe(elements.source, layer=elements.layer)
    except Exception as exc:  # GDAL's own message names the problem
        raise SiteFileError(f"cannot read the element layer ({exc})", source=src, field="elements") from exc
    if elements.id_field not in frame.columns:
        raise SiteFileError(
            f"no field {elements.id_field!r}; the layer has {', '.join(c for c in frame.columns if c != 'geometry')}",
            source=src, field="elements.id_field")
    return AssetTable(elements.layer or "", tuple(str(i) for i in frame[elements.id_field]),
                      np.asarray(frame.geometry.values, dtype=object), frame.crs)


def asset_table_sql(con: sqlite3.Connection, elements: "Elements", src: str) -> AssetTable:
    """The asset layer read on an open SQLite connection to the owner's GeoPackage."""
    found = gpkg_sql.layers(con)
    if elements.layer is None:
        if len(found) != 1:
            raise SiteFileError(f"the file has {len(found)} feature layers ({', '.join(sorted(found)) or 'none'}); "
                                "name one with [elements] layer", source=src, field="elements.layer")
        layer = next(iter(found.values()))
    else:
        match = {k.lower(): v for k, v in found.items()}.get(elements.layer.lower())
        if match is None:
            raise SiteFileError(f"no feature layer {elements.layer!r}; the file has {', '.join(sorted(found)) or 'none'}",
                                source=src, field="elements.layer")
        layer = match
    fields = gpkg_sql.columns(con, layer.table)
    if elements.id_field not in fields:
        raise SiteFileError(f"no field {elements.id_field!r}; the layer has {', '.join(fields)}", source=src,
                            field="elements.id_field")
    rows, geoms = gpkg_sql.read_features(con, layer, [elements.id_field])
    return AssetTable(layer.table, tuple(str(r[0]) for r in rows), np.asarray(geoms, dtype=object), layer.crs)


def element_layer(table: AssetTable, crs: pyproj.CRS | None, to_map: Similarity | None, drawing_unit_m: float,
                  source: str) -> ElementLayer:
    """The assets in the map CRS (through our CRS checks, never a ballpark shift) with their areas in m²."""
    geoms = table.outlines
    if crs is not None and table.crs is not None:
        if not table.crs.equals(crs):
            geoms, _, _ = reproject(geoms, table.crs, crs, source=source)
    elif crs is not None or table.crs is not None:
        which = "the asset layer has no CRS" if table.crs is None else "the site file has no [map] frame"
        raise CRSCheckError(f"{which}: the asset outlines cannot be placed against the zones; give both a CRS "
                            "(or neither, when the layer is in the drawing frame)", source=source, field="elements")
    k = 1.0 if to_map is None else (to_map.scale / drawing_unit_m) ** 2
    ids = list(table.ids)
    return ElementLayer(ids, geoms, {i: float(g.area) / k for i, g in zip(ids, geoms)}, k)


def split_by_assets(zones: list["Zone"], basis: str, to_map: Similarity | None, layer: ElementLayer) -> list[dict[str, Any]]:
    """Each zone's affected polygon (defect outline or contour) cut by the assets it overlaps.

    Every piece belongs to one asset; pieces of one zone add up to its area
    where the zone lies within the assets.  Each piece also carries the area of the zone's
    class contour on that asset.  Geometries in the map CRS, areas in surface m².
    """
    tree = shapely.STRtree(layer.outlines)
    pieces: list[dict[str, Any]] = []
    for z in zones:
        poly = z.defect if basis == "outline" else z.contour
        g = to_map.apply_geometry(poly) if to_map is not None else poly
        contour = to_map.apply_geometry(z.contour) if to_map is not None else z.contour
        for k in tree.query(g, predicate="intersects"):
            part = shapely.intersection(g, layer.outlines[k])
            if part.is_empty or part.area <= 0:
                continue
            on_asset = shapely.intersection(contour, layer.outlines[k]).area
            pieces.append({"asset_id": layer.ids[k], "zone_id": z.zone_id, "defect_id": z.defect_id,
                           "scan_id": z.scan_id, "class": z.class_name, "area_m2": part.area / layer.area_factor,
                           "contour_area_m2": on_asset / layer.area_factor, "geometry": part})
    return pieces
