"""Mosaic: zones of one class seen by overlapping scans become one zone, in the drawing frame.

Rules (docs/campaigns.md):

* geometry: the union of the parts' contours (and of their defect outlines);
* area, perimeter, half-cell bounds: of the union;
* ``n_points``: the sum (each scan measured its own points); ``ver_max_db``: the largest;
  ``ver_mean_db``, ``peak_hz``, ``peak_spread`` and the confidence factors: means weighted by
  each part's points;
* ``confidence`` = 1 − Π(1 − cᵢ): independent scans that each saw the zone make it surer;
* depth range: the lowest low and the highest high; footprint and volume from the united outline;
* ``zone_id``: the first contributing zone id (in sorted order) and "+n" for n more, so ids are
  the same for every rerun and worker count; ``provenance`` lists every contributing zone.

Zones seen by one scan only pass through unchanged (their provenance is themselves).
"""

from __future__ import annotations

import copy
from typing import TYPE_CHECKING

import numpy as np
import shapely
from shapely.geometry import Polygon

from overlay.zones.zone import Zone, order_key, parent_finder, repair_footprint

if TYPE_CHECKING:
    from overlay.settings import Site


def _groups(zones: list[Zone]) -> list[list[Zone]]:
    """Connected groups of zones whose contours overlap (area, not just touch)."""
    n = len(zones)
    parent = list(range(n))

    def find(i: int) -> int:
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    tree = shapely.STRtree([z.contour for z in zones])
    for i, z in enumerate(zones):
        for j in tree.query(z.contour, predicate="intersects"):
            if j > i and zones[j].scan_id != z.scan_id and z.contour.intersection(zones[j].contour).area > 0:
                parent[find(i)] = find(int(j))
    groups: dict[int, list[Zone]] = {}
    for i in range(n):
        groups.setdefault(find(i), []).append(zones[i])
    return [sorted(g, key=lambda z: z.zone_id) for g in groups.values()]


def _largest(geom: Polygon) -> Polygon:
    """The largest piece: overlapping contours unite into one, but the parts' outlines need not meet."""
    return max(shapely.get_parts(geom), key=lambda g: g.area)


def _unite(parts: list[Zone], site: "Site", unit_m: float) -> Zone:
    if len(parts) == 1:
        z = copy.copy(parts[0])
        z.provenance = z.zone_id
        return z
    u2 = unit_m * unit_m
    w = np.array([max(p.n_points, 1) for p in parts], dtype=float)

    def mean(attr: str) -> float:
        v = np.array([getattr(p, attr) for p in parts], dtype=float)
        ok = np.isfinite(v)
        return float(np.average(v[ok], weights=w[ok])) if ok.any() else float("nan")

    contour = _largest(shapely.union_all([p.contour for p in parts]))
    defect = _largest(shapely.union_all([p.defect for p in parts]))
    first = parts[0]
    z = copy.copy(first)
    z.zone_id = f"{first.zone_id}+{len(parts) - 1}"
    z.provenance = ";".join(p.zone_id for p in parts)
    z.scan_id = ";".join(sorted({p.scan_id for p in parts}))
    z.contour, z.defect = contour, defect
    z.area_m2 = contour.area * u2
    z.area_low_m2 = z.area_m2 * min(p.area_low_m2 / p.area_m2 for p in parts)
    z.area_high_m2 = max(z.area_m2, z.area_m2 * max(p.area_high_m2 / p.area_m2 for p in parts))
    z.perimeter_m = contour.length * unit_m
    z.n_points = int(sum(p.n_points for p in parts))
    z.ver_max_db = max(p.ver_max_db for p in parts)
    for attr in ("ver_mean_db", "peak_hz", "peak_spread", "conf_support", "conf_contrast", "conf_coherence", "conf_quality",
                 "conf_outline"):
        setattr(z, attr, mean(attr))
    # the united outline is the model's only where every part's was
    z.outline_basis = "model" if all(p.outline_basis == "model" for p in parts) else "contour"
    shapes = {p.outline_shape for p in parts}
    z.outline_shape = shapes.pop() if len(shapes) == 1 and z.outline_basis == "model" else ""
    z.outline_misfit = max((p.outline_misfit for p in parts if p.outline_misfit == p.outline_misfit), default=float("nan"))
    z.confidence = round(1.0 - float(np.prod([1.0 - p.confidence for p in parts])), 4)
    z.outline_area_m2 = defect.area * u2
    z.depth_low_m = min(p.depth_low_m for p in parts)
    z.depth_high_m = max(p.depth_high_m for p in parts)
    basis = defect if site.repair.basis == "outline" else contour
    rect, length, width = repair_footprint(basis, site.repair.margin_m / unit_m, site.repair.footprint)
    z.footprint, z.footprint_area_m2 = rect, rect.area * u2
    z.footprint_length_m, z.footprint_width_m = length * unit_m, width * unit_m
    z.volume_low_m3 = z.footprint_area_m2 * z.depth_low_m
    z.volume_high_m3 = z.footprint_area_m2 * z.depth_high_m
    z.spectrum = max(parts, key=lambda p: p.n_points).spectrum  # the best-measured part's spectrum, for pictures
    return z


def mosaic_zones(zones: list[Zone], site: "Site", unit_m: float) -> list[Zone]:
    """Unite overlapping zones of each class across scans; nested classes keep their lowest-class defect."""
    by_class = [sorted((_unite(g, site, unit_m) for g in _groups([z for z in zones if z.class_name == c.name])),
                       key=lambda z: (z.scan_id, order_key(z.contour))) for c in site.zones.classes]
    if not by_class:
        return []
    for z in by_class[0]:
        z.defect_id = z.zone_id
    find = parent_finder(by_class[0])
    for z in (z for higher in by_class[1:] for z in higher):
        parent = find(z.contour)
        if parent is None:
            continue
        z.defect_id, z.defect, z.outline_area_m2 = parent.defect_id, parent.defect, parent.outline_area_m2
        z.depth_low_m, z.depth_high_m = parent.depth_low_m, parent.depth_high_m
        if site.repair.basis == "outline":
            z.footprint, z.footprint_area_m2 = parent.footprint, parent.footprint_area_m2
            z.footprint_length_m, z.footprint_width_m = parent.footprint_length_m, parent.footprint_width_m
            z.volume_low_m3, z.volume_high_m3 = parent.volume_low_m3, parent.volume_high_m3
    return [z for united in by_class for z in united]
