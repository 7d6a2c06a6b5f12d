"""Zones written out by hand, for unit tests of what is built from zones (quantities, mosaic, merge rows)
without running the pipeline: every attribute is a number a test can check by hand."""

from __future__ import annotations

from types import SimpleNamespace

from shapely.geometry import Polygon, box

from overlay.settings import ZoneClass
from overlay.zones.zone import Zone

CLASSES = (ZoneClass("Low", 3.0), ZoneClass("mid-band", 6.0), ZoneClass("high", 10.0))


def zone(zone_id: str, class_name: str, *, element: str = "P1", scan_id: str = "s1", defect_id: str = "",
         contour: Polygon | None = None, **values: object) -> Zone:
    """A zone with neutral values for whatever the test does not name."""
    base: dict[str, object] = dict(
        threshold_db={c.name: c.threshold_db for c in CLASSES}.get(class_name, 0.0),
        contour=contour if contour is not None else box(0, 0, 1, 1), area_m2=1.0, area_low_m2=0.9,
        area_high_m2=1.1, perimeter_m=4.0, n_points=10, ver_max_db=5.0, ver_mean_db=4.0, peak_hz=1000.0,
        peak_spread=0.1, confidence=0.5, conf_support=1.0, conf_contrast=1.0, conf_coherence=1.0, conf_quality=1.0,
    )
    base.update(values)
    return Zone(zone_id=zone_id, scan_id=scan_id, element=element, class_name=class_name, defect_id=defect_id,
                **base)  # type: ignore[arg-type]


def site(basis: str = "outline", margin_m: float = 0.1, footprint: str = "aligned", classes=CLASSES,
         method: str = "acoustic scan") -> SimpleNamespace:
    """The parts of a site the zone builders read."""
    return SimpleNamespace(repair=SimpleNamespace(basis=basis, margin_m=margin_m, footprint=footprint),
                           zones=SimpleNamespace(classes=tuple(classes)), merge=SimpleNamespace(method=method),
                           path="site.toml")


def result(zones: list[Zone], *, basis: str = "outline", element_areas: dict[str, float] | None = None,
           asset_pieces: list[dict] | None = None, cautions: tuple[str, ...] = ("mind the gap",)) -> SimpleNamespace:
    """The parts of a run result the quantity and findings rows read."""
    return SimpleNamespace(site=site(basis), zones=zones, element_areas=element_areas or {},
                           asset_pieces=asset_pieces or [], cautions=cautions, tool_version="0.0-test",
                           settings=lambda: {"basis": basis})
