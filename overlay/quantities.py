"""Defects, not class contours, are what a contractor repairs and an owner counts.

Classes are nested: a defect that reaches ``probable`` has a zone in every class
below as well, all sharing one estimated outline (``defect_id``).  Counting or
pricing per class zone counts the defect once per class.  This module groups a
site's zones by defect so each defect is counted once, at the highest class it
reaches, with the contour area of every class beside it.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Sequence

if TYPE_CHECKING:
    from .site import ZoneClass
    from .zones import Zone


@dataclass(frozen=True)
class Defect:
    """One defect: its zones in class order (the first is the lowest class, whose id is the defect's)."""

    defect_id: str
    zones: tuple["Zone", ...]
    class_order: tuple[str, ...]

    @property
    def lowest(self) -> "Zone":
        return self.zones[0]

    @property
    def highest_class(self) -> str:
        return max((z.class_name for z in self.zones), key=self.class_order.index)

    @property
    def top(self) -> "Zone":
        """The zone of the highest class (the strongest of them when the class has several)."""
        top = self.highest_class
        return max((z for z in self.zones if z.class_name == top), key=lambda z: (z.ver_max_db, z.confidence))

    def contour_area_m2(self, class_name: str) -> float:
        """The defect's contour area in one class (0 when it does not reach it)."""
        return float(sum(z.area_m2 for z in self.zones if z.class_name == class_name))


def defects(zones: Sequence["Zone"], classes: Sequence["ZoneClass"]) -> list[Defect]:
    """The site's defects in the order of their lowest-class zones."""
    order = tuple(c.name for c in classes)
    groups: dict[str, list["Zone"]] = {}
    for z in zones:
        groups.setdefault(z.defect_id or z.zone_id, []).append(z)
    out = []
    for did, members in groups.items():
        members.sort(key=lambda z: (order.index(z.class_name), z.zone_id))
        out.append(Defect(did, tuple(members), order))
    return out


def area_field(class_name: str) -> str:
    """The field holding a class's contour area: ``area_<class>_m2`` (a '-' in the name becomes '_')."""
    return f"area_{class_name.lower().replace('-', '_')}_m2"


def rounded(v: float, nd: int) -> object:
    """A number for a table a person reads: rounded, and '' when unknown (never 'nan')."""
    return "" if v != v else round(v, nd)


def defect_rows(zones: Sequence["Zone"], classes: Sequence["ZoneClass"], basis: str) -> list[dict[str, object]]:
    """One row per defect, at the highest class it reaches: what a repair contractor prices.

    Affected area, footprint and volume are the defect's (its lowest-class zone carries the
    estimated outline); peak frequency and confidence those of its highest-class zone.
    """
    rows: list[dict[str, object]] = []
    for d in defects(zones, classes):
        z, top = d.lowest, d.top
        affected = z.outline_area_m2 if basis == "outline" else z.area_m2
        rows.append({
            "row_kind": "defect", "element": z.element, "class": d.highest_class, "zone_id": top.zone_id,
            "defect_id": d.defect_id, "scan_id": z.scan_id, "n_defects": 1, "basis": basis,
            "contour_area_m2": rounded(d.contour_area_m2(d.highest_class), 4),
            "outline_area_m2": rounded(z.outline_area_m2, 4), "affected_area_m2": rounded(affected, 4),
            "footprint_length_m": rounded(z.footprint_length_m, 3), "footprint_width_m": rounded(z.footprint_width_m, 3),
            "footprint_area_m2": rounded(z.footprint_area_m2, 4), "depth_low_m": rounded(z.depth_low_m, 4),
            "depth_high_m": rounded(z.depth_high_m, 4), "volume_low_m3": rounded(z.volume_low_m3, 5),
            "volume_high_m3": rounded(z.volume_high_m3, 5), "peak_hz": rounded(top.peak_hz, 1),
            "confidence": top.confidence,
        })
    order = [c.name for c in classes]
    return sorted(rows, key=lambda r: (str(r["element"]), -order.index(str(r["class"])), str(r["defect_id"])))
