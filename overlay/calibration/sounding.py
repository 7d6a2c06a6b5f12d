"""The engineer's sounding results, read into the drawing frame: hollow areas and point verdicts.

Three kinds of source, one reader each, all refused row by row with file, row and field:

* a **polygon layer** (GeoPackage, GeoJSON — anything GDAL reads): hollow areas traced on site,
  with ``element`` and ``date`` fields;
* a **point layer** or a **CSV table** (columns ``x, y, verdict, element, date``): a verdict
  ``hollow`` or ``sound`` at each point;
* a **DXF drawing**: closed polylines on a named layer, traced hollow areas; their element is
  the scan's they lie in, the date is given with ``--date``.

A layer with a CRS is in map coordinates and comes to the drawing frame through the site's
map placement (reprojected first, through the same CRS checks, when its CRS is another);
CSV and DXF coordinates are in the drawing frame and unit unless the caller says "map".
"""

from __future__ import annotations

import csv
import datetime as dt
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import shapely
from shapely.geometry import Polygon

from overlay.errors import CRSCheckError, SiteFileError

if TYPE_CHECKING:
    import pyproj

    from overlay.job import RunResult

VERDICTS = ("hollow", "sound")
CSV_COLUMNS = ("x", "y", "verdict", "element", "date")


class SoundingError(SiteFileError):
    """Bad sounding input (exit 3)."""


@dataclass(frozen=True)
class Sounding:
    """Sounding results in the drawing frame: traced hollow polygons and/or verdict points."""

    source: Path
    polygons: tuple[Polygon, ...] = ()
    polygon_elements: tuple[str, ...] = ()
    points: np.ndarray = field(default_factory=lambda: np.zeros((0, 2)))  # (n, 2) drawing frame
    hollow: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=bool))  # per point: True hollow
    point_elements: tuple[str, ...] = ()
    dates: tuple[str, ...] = ()  # every survey date found, ISO

    @property
    def elements(self) -> set[str]:
        return set(self.polygon_elements) | set(self.point_elements)


def _date(value: Any, source: Path, where: str) -> str:
    """A survey date (ISO text, a date or a datetime) as ISO text."""
    if isinstance(value, (dt.date, dt.datetime)):
        return value.isoformat()[:10]
    text = str(value or "").strip()
    try:
        return dt.date.fromisoformat(text[:10]).isoformat() if text else ""
    except ValueError:
        raise SoundingError(f"not a date (YYYY-MM-DD): {text!r}", source=source, field=f"{where}, date") from None


def _required(value: Any, source: Path, where: str, name: str) -> str:
    text = "" if value is None else str(value).strip()
    if not text or text.lower() == "nan":
        raise SoundingError(f"{name} is empty; every sounding row names its {name}", source=source,
                            field=f"{where}, {name}")
    return text


def _verdict(value: Any, source: Path, where: str) -> bool:
    text = str(value or "").strip().lower()
    if text not in VERDICTS:
        raise SoundingError(f"verdict must be 'hollow' or 'sound', got {value!r}", source=source,
                            field=f"{where}, verdict")
    return text == "hollow"


def to_drawing(xy: np.ndarray, frame: str, result: "RunResult", source: Path) -> np.ndarray:
    """Coordinates in the drawing frame from the drawing frame or the site's map CRS."""
    if frame == "drawing":
        return xy
    if result.to_map is None:
        raise CRSCheckError("the sounding is in map coordinates but the site file has no [map] frame", source=source,
                            field="map")
    return result.to_map.inverse().apply(xy)


def read_sounding(path: Path, result: "RunResult", *, layer: str | None = None, frame: str = "drawing",
                  date: str | None = None) -> Sounding:
    """Read a sounding source by its kind (see the module docstring); nothing of it is guessed."""
    if not path.is_file():
        raise SoundingError("file not found", source=path)
    suffix = path.suffix.lower()
    if suffix == ".csv":
        return _csv(path, result, frame)
    if suffix == ".dxf":
        return _dxf(path, result, layer, frame, date)
    return _layer(path, result, layer)


def _csv(path: Path, result: "RunResult", frame: str) -> Sounding:
    try:
        text = path.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError as exc:
        raise SoundingError("not UTF-8 text", source=path) from exc
    rows = list(csv.DictReader(text.splitlines()))
    header = [h.strip() for h in (text.splitlines()[0].split(",") if text.strip() else [])]
    missing = [c for c in CSV_COLUMNS if c not in header]
    if missing:
        raise SoundingError(f"column(s) {', '.join(missing)} missing; a sounding table has {', '.join(CSV_COLUMNS)}",
                            source=path, field="line 1")
    xy, hollow, elements, dates = [], [], [], set()
    for k, r in enumerate(rows, start=2):
        where = f"line {k}"
        try:
            x, y = float(r["x"]), float(r["y"])
        except (TypeError, ValueError):
            raise SoundingError(f"coordinates must be numbers, got {r['x']!r}, {r['y']!r}", source=path,
                                field=f"{where}, x/y") from None
        if not (np.isfinite(x) and np.isfinite(y)):
            raise SoundingError("coordinates must be finite", source=path, field=f"{where}, x/y")
        xy.append((x, y))
        hollow.append(_verdict(r["verdict"], path, where))
        elements.append(_required(r["element"], path, where, "element"))
        dates.add(_date(_required(r["date"], path, where, "date"), path, where))
    if not xy:
        raise SoundingError("no sounding rows after the header", source=path)
    points = to_drawing(np.array(xy, dtype=np.float64), frame, result, path)
    return Sounding(path, points=points, hollow=np.array(hollow), point_elements=tuple(elements),
                    dates=tuple(sorted(dates)))


def _layer(path: Path, result: "RunResult", layer: str | None) -> Sounding:
    import pyogrio

    try:
        names = [str(n) for n in pyogrio.list_layers(path)[:, 0]]
    except Exception as exc:  # GDAL's message names the problem
        raise SoundingError(f"not a GIS file GDAL can read ({exc})", source=path) from exc
    if layer is None and len(names) != 1:
        raise SoundingError(f"the file has {len(names)} layers ({', '.join(names)}); name one with --layer",
                            source=path)
    name = layer or names[0]
    if name not in names:
        raise SoundingError(f"no layer {name!r}; the file has {', '.join(names)}", source=path, field="layer")
    frame = pyogrio.read_dataframe(path, layer=name)
    for need in ("element", "date"):
        if need not in frame.columns:
            raise SoundingError(f"no field {need!r}; every sounding feature names its element and date", source=path,
                                field=name)
    geoms = np.asarray(frame.geometry.values, dtype=object)
    geoms = _into_drawing(geoms, frame.crs, result, path)
    polys, pelem, pts, hollow, elems, dates = [], [], [], [], [], set()
    for k, (g, (_, r)) in enumerate(zip(geoms, frame.iterrows()), start=1):
        where = f"feature {k}"
        element = _required(r["element"], path, where, "element")
        dates.add(_date(_required(r["date"], path, where, "date"), path, where))
        if g is None or g.is_empty:
            raise SoundingError("feature has no geometry", source=path, field=where)
        if g.geom_type in ("Point", "MultiPoint"):
            if "verdict" not in frame.columns:
                raise SoundingError("a point needs a verdict field ('hollow' or 'sound')", source=path,
                                    field=f"{where}, verdict")
            for p in shapely.get_parts(g):
                pts.append((p.x, p.y))
                hollow.append(_verdict(r["verdict"], path, where))
                elems.append(element)
        elif g.geom_type in ("Polygon", "MultiPolygon"):
            if "verdict" in frame.columns and str(r["verdict"] or "hollow").strip().lower() != "hollow":
                raise SoundingError("a traced polygon marks a hollow area; its verdict must be 'hollow'",
                                    source=path, field=f"{where}, verdict")
            if not g.is_valid:
                raise SoundingError(f"the polygon is not valid ({shapely.is_valid_reason(g)}); redraw it without "
                                    "crossing its own edges", source=path, field=where)
            for part in shapely.get_parts(g):
                polys.append(part)
                pelem.append(element)
        else:
            raise SoundingError(f"{g.geom_type} is neither a traced area nor a sounding point", source=path,
                                field=where)
    return Sounding(path, tuple(polys), tuple(pelem), np.array(pts, dtype=np.float64).reshape(-1, 2),
                    np.array(hollow, dtype=bool), tuple(elems), tuple(sorted(dates)))


def _into_drawing(geoms: np.ndarray, crs: "pyproj.CRS | None", result: "RunResult", source: Path) -> np.ndarray:
    """A layer's geometries in the drawing frame: through the map placement when the layer has a CRS."""
    if crs is None:
        return geoms
    from overlay.geometry.crs import reproject

    if result.crs is None or result.to_map is None:
        raise CRSCheckError("the sounding layer has a CRS but the site file has no [map] frame to bring it onto "
                            "the drawing", source=source, field="map")
    if not result.crs.equals(crs):
        geoms, _, _ = reproject(geoms, crs, result.crs, source=str(source))
    back = result.to_map.inverse()
    return np.asarray([back.apply_geometry(g) if g is not None else None for g in geoms], dtype=object)


def _dxf(path: Path, result: "RunResult", layer: str | None, frame: str, date: str | None) -> Sounding:
    from overlay.exporters.dxf import read_base_dxf

    if layer is None:
        raise SoundingError("a sounding drawing needs --layer: the layer its hollow areas are traced on", source=path)
    if date is None:
        raise SoundingError("a sounding drawing needs --date: when the sounding was done (YYYY-MM-DD)", source=path)
    day = _date(date, path, "--date")
    doc = read_base_dxf(path)
    if not doc.layers.has_entry(layer):
        raise SoundingError(f"no layer {layer!r} in the drawing", source=path, field="layer")
    polys, elements = [], []
    for k, e in enumerate(doc.modelspace().query(f'LWPOLYLINE POLYLINE[layer=="{layer}"]'), start=1):
        where = f"polyline {k} (handle {e.dxf.handle})"
        if not e.is_closed:
            raise SoundingError("an open polyline is not a traced area; close it", source=path, field=where)
        xy = np.array([(p[0], p[1]) for p in e.points()] if e.dxftype() == "POLYLINE" else
                      [(p[0], p[1]) for p in e.get_points()], dtype=np.float64)
        if len(xy) < 3:
            raise SoundingError("a traced area needs at least 3 vertices", source=path, field=where)
        poly = Polygon(to_drawing(xy, frame, result, path))
        if not poly.is_valid:
            raise SoundingError(f"the polygon is not valid ({shapely.is_valid_reason(poly)}); redraw it without "
                                "crossing its own edges", source=path, field=where)
        elements.append(_element_at(poly, result, path, where))
        polys.append(poly)
    if not polys:
        raise SoundingError(f"no closed polyline on layer {layer!r}", source=path, field="layer")
    return Sounding(path, tuple(polys), tuple(elements), dates=(day,))


def _element_at(poly: Polygon, result: "RunResult", source: Path, where: str) -> str:
    """The element of the scan a traced area lies in (a drawing has no fields to say it)."""
    c = poly.representative_point()
    for s in result.scans:
        if s.extent.contains(c) and s.element:
            return s.element
    raise SoundingError("the traced area lies on no scan with an element", source=source, field=where)
