"""What a third-party exporter may rely on: a frozen, versioned view of a run.

The run's own objects (RunResult, Zone, ScanResult) are the tool's working data and change as
the tool grows; a plugin that reads them may break with the next version.  ``result.view()``
gives the same run as plain frozen records under a version string: fields are only ever added
under the same version, and a change that would break a reader gets a new version.  The built-in
exporters may use the working data; the example plugin (docs/examples/overlay-zone-table) uses
this view.

Version ``overlay-result/1``:

* ``site``, ``structure``, ``drawing_unit`` ("m" or "mm"), ``unit_m`` (metres per drawing unit),
  ``crs_wkt`` (the map CRS as WKT, or None), ``to_map`` (drawing → map as a frozen Similarity with
  ``apply``/``apply_geometry``, or None), ``started`` (UTC, ISO 8601), ``tool_version``, ``cautions``;
* ``scans``: per scan ``scan_id``, ``element``, ``surveyed``, ``extent`` (drawing frame), ``n_points``;
* ``zones``: per zone (after the mosaic) ``zone_id``, ``defect_id``, ``scan_id``, ``element``,
  ``class_name``, ``threshold_db``, ``contour`` and ``outline`` (shapely polygons, drawing frame and
  unit), ``footprint``, ``area_m2``, ``outline_area_m2``, ``peak_hz``, ``confidence`` and ``record``
  — every field of the GeoPackage's zones layer, read-only.
"""

from __future__ import annotations

from dataclasses import dataclass
from types import MappingProxyType
from typing import TYPE_CHECKING, Any, Mapping

from shapely.geometry import Polygon

from overlay.geometry.transforms import Similarity

if TYPE_CHECKING:
    from overlay.job import RunResult

VERSION = "overlay-result/1"


@dataclass(frozen=True)
class ZoneView:
    zone_id: str
    defect_id: str
    scan_id: str
    element: str
    class_name: str
    threshold_db: float
    contour: Polygon
    outline: Polygon
    footprint: Polygon
    area_m2: float
    outline_area_m2: float
    peak_hz: float
    confidence: float
    record: Mapping[str, Any]


@dataclass(frozen=True)
class ScanView:
    scan_id: str
    element: str
    surveyed: str
    extent: Polygon
    n_points: int


@dataclass(frozen=True)
class ResultView:
    version: str
    site: str
    structure: str
    drawing_unit: str
    unit_m: float
    crs_wkt: str | None
    to_map: Similarity | None
    started: str
    tool_version: str
    cautions: tuple[str, ...]
    scans: tuple[ScanView, ...]
    zones: tuple[ZoneView, ...]


def result_view(result: "RunResult") -> ResultView:
    """The run as the frozen records a plugin may rely on (see the module docstring)."""
    zones = tuple(ZoneView(z.zone_id, z.defect_id, z.scan_id, z.element, z.class_name, z.threshold_db, z.contour,
                           z.defect, z.footprint, z.area_m2, z.outline_area_m2, z.peak_hz, z.confidence,
                           MappingProxyType(dict(z.record()))) for z in result.zones)
    scans = tuple(ScanView(s.scan_id, s.element, s.surveyed, s.extent, s.n_points) for s in result.scans)
    return ResultView(VERSION, result.site.name, result.site.structure, result.site.drawing_unit, result.unit_m,
                      result.crs.to_wkt() if result.crs is not None else None, result.to_map, result.started,
                      result.tool_version, tuple(result.cautions), scans, zones)
