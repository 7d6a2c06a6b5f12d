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
    from overlay.job import RunResult
    from overlay.settings import ZoneClass
    from overlay.zones.zone import Zone


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


COLUMNS = (
    "row_kind", "element", "class", "zone_id", "defect_id", "scan_id", "n_defects", "basis",
    "contour_area_m2", "outline_area_m2", "outline_basis", "affected_area_m2",
    "footprint_length_m", "footprint_width_m", "footprint_area_m2",
    "depth_low_m", "depth_high_m", "volume_low_m3", "volume_high_m3",
    "element_area_m2", "element_share_pct", "peak_hz", "confidence", "note",
)
ROW_KINDS = {
    "defect": "one per defect, at the highest class it reaches: what a contractor prices (each defect once)",
    "element_total": "per element and highest class: the defect rows added up (each defect in exactly one class)",
    "asset_total": "per owner's asset and highest class: the defects' outlines cut by the asset outlines; "
                   "footprint and volume shared out by the outline's share on the asset",
    "zone": "one per class contour (information: a defect has a zone in every class it reaches)",
    "caution": "the cautions, which travel with the quantities",
}


def class_columns(classes: Sequence["ZoneClass"]) -> tuple[str, ...]:
    """A contour-area column per class, beside the priced quantities."""
    return tuple(f"contour_{c.name.lower().replace('-', '_')}_m2" for c in classes)


def affected_area(z: "Zone", basis: str) -> float:
    """What is priced for a defect: its estimated outline, or its lowest-class contour."""
    return z.outline_area_m2 if basis == "outline" else z.area_m2


def defect_rows(zones: Sequence["Zone"], classes: Sequence["ZoneClass"], basis: str) -> list[dict[str, object]]:
    """One row per defect, at the highest class it reaches: what a repair contractor prices.

    Affected area, footprint and volume are the defect's (its lowest-class zone carries the
    estimated outline); peak frequency and confidence those of its highest-class zone; the
    contour area of every class beside them.
    """
    rows: list[dict[str, object]] = []
    cols = class_columns(classes)
    for d in defects(zones, classes):
        z, top = d.lowest, d.top
        rows.append({
            "row_kind": "defect", "element": z.element, "class": d.highest_class, "zone_id": top.zone_id,
            "defect_id": d.defect_id, "scan_id": z.scan_id, "n_defects": 1, "basis": basis,
            "contour_area_m2": rounded(d.contour_area_m2(d.highest_class), 4),
            "outline_area_m2": rounded(z.outline_area_m2, 4), "outline_basis": z.outline_basis,
            "affected_area_m2": rounded(affected_area(z, basis), 4),
            "footprint_length_m": rounded(z.footprint_length_m, 3), "footprint_width_m": rounded(z.footprint_width_m, 3),
            "footprint_area_m2": rounded(z.footprint_area_m2, 4), "depth_low_m": rounded(z.depth_low_m, 3),
            "depth_high_m": rounded(z.depth_high_m, 3), "volume_low_m3": rounded(z.volume_low_m3, 5),
            "volume_high_m3": rounded(z.volume_high_m3, 5), "peak_hz": rounded(top.peak_hz, 0),
            "confidence": round(top.confidence, 2),
            **{col: rounded(d.contour_area_m2(c.name), 4) for col, c in zip(cols, classes)},
        })
    order = [c.name for c in classes]
    return sorted(rows, key=lambda r: (str(r["element"]), -order.index(str(r["class"])), str(r["defect_id"])))


def _total(rows: list[dict[str, object]], key: str) -> object:
    vals = [r[key] for r in rows if r[key] != ""]
    return rounded(float(sum(vals)), 5 if key.startswith("volume") else 4) if vals else ""  # type: ignore[arg-type]


def element_rows(result: "RunResult") -> list[dict[str, object]]:
    """Per element and highest class: the defect rows added up, and the element's area and share."""
    basis = result.site.repair.basis
    groups: dict[tuple[str, str], list[dict[str, object]]] = {}
    for r in defect_rows(result.zones, result.site.zones.classes, basis):
        groups.setdefault((str(r["element"]), str(r["class"])), []).append(r)
    order = [c.name for c in result.site.zones.classes]
    cols = class_columns(result.site.zones.classes)
    out = []
    for (element, cls), members in sorted(groups.items(), key=lambda kv: (kv[0][0], -order.index(kv[0][1]))):
        el = result.element_areas.get(element, float("nan"))
        affected = _total(members, "affected_area_m2")
        out.append({
            "row_kind": "element_total", "element": element, "class": cls, "n_defects": len(members), "basis": basis,
            **{k: _total(members, k) for k in ("contour_area_m2", "outline_area_m2", "affected_area_m2",
                                               "footprint_area_m2", "volume_low_m3", "volume_high_m3", *cols)},
            "element_area_m2": rounded(el, 3),
            "element_share_pct": rounded(100 * float(affected) / el, 3) if affected != "" else "",
        })
    return out


def asset_rows(result: "RunResult") -> list[dict[str, object]]:
    """Per owner's asset and highest class: each defect's outline cut by the asset; footprint and
    volume shared out by the outline's share on that asset (a defect across two panels counts in
    both, each with its part)."""
    basis = result.site.repair.basis
    found = {d.defect_id: d for d in defects(result.zones, result.site.zones.classes)}
    groups: dict[tuple[str, str], dict[str, float]] = {}
    for p in result.asset_pieces:
        if basis == "outline" and p["zone_id"] != p["defect_id"]:
            continue  # the defect's outline is cut once, through its lowest-class zone
        d = found.get(p["defect_id"])
        if d is None or (basis == "contour" and p["zone_id"] != d.lowest.zone_id):
            continue
        g = groups.setdefault((p["asset_id"], d.highest_class), {})
        z = d.lowest
        whole = affected_area(z, basis)
        share = p["area_m2"] / whole if whole > 0 else 0.0
        for k, v in (("n", 1.0), ("affected", p["area_m2"]), ("footprint", z.footprint_area_m2 * share),
                     ("vlow", z.volume_low_m3 * share), ("vhigh", z.volume_high_m3 * share)):
            g[k] = g.get(k, 0.0) + v
    order = [c.name for c in result.site.zones.classes]
    out = []
    for (asset, cls), g in sorted(groups.items(), key=lambda kv: (kv[0][0], -order.index(kv[0][1]))):
        el = result.element_areas.get(asset, float("nan"))
        out.append({"row_kind": "asset_total", "element": asset, "class": cls, "n_defects": int(g["n"]), "basis": basis,
                    "affected_area_m2": rounded(g["affected"], 4), "footprint_area_m2": rounded(g["footprint"], 4),
                    "volume_low_m3": rounded(g["vlow"], 5), "volume_high_m3": rounded(g["vhigh"], 5),
                    "element_area_m2": rounded(el, 3), "element_share_pct": rounded(100 * g["affected"] / el, 3)})
    return out


def zone_rows(result: "RunResult") -> list[dict[str, object]]:
    """One row per class contour: information beside the priced rows."""
    order = {c.name: i for i, c in enumerate(result.site.zones.classes)}
    rows = []
    for z in sorted(result.zones, key=lambda z: (z.element, order[z.class_name], z.zone_id)):
        rows.append({
            "row_kind": "zone", "element": z.element, "class": z.class_name, "zone_id": z.zone_id,
            "defect_id": z.defect_id, "scan_id": z.scan_id, "n_defects": "", "basis": result.site.repair.basis,
            "contour_area_m2": rounded(z.area_m2, 4), "outline_area_m2": rounded(z.outline_area_m2, 4),
            "outline_basis": z.outline_basis, "affected_area_m2": "", "footprint_length_m": "",
            "footprint_width_m": "", "footprint_area_m2": "", "depth_low_m": rounded(z.depth_low_m, 3),
            "depth_high_m": rounded(z.depth_high_m, 3), "peak_hz": rounded(z.peak_hz, 0),
            "confidence": round(z.confidence, 2),
        })
    return rows


def quantity_rows(result: "RunResult") -> list[dict[str, object]]:
    """Every row of the quantities table, primary first: defects, element and asset totals, class
    contours, cautions (row kinds: ``ROW_KINDS``); areas m², lengths and depths m, volumes m³."""
    rows = defect_rows(result.zones, result.site.zones.classes, result.site.repair.basis)
    rows += element_rows(result) + asset_rows(result) + zone_rows(result)
    rows += [{"row_kind": "caution", "note": c} for c in result.cautions]
    return rows
