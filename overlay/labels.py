"""Label placement: one box per defect, none on another, none on a defect it does not belong to.

A label goes inside its zone when it fits there; otherwise it is moved out on
rings of growing radius around the zone, in sixteen directions per ring, and
the first position whose box is clear of every label placed so far and of every
other defect's zone wins (a leader then joins it to its zone).  Items are taken
in a fixed order, so the result is the same on every run.  Pure geometry: the
boxes are in drawing units, the caller sizes them from the text.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import shapely
import shapely.ops
from shapely.geometry import Polygon, box


@dataclass(frozen=True)
class Item:
    key: str
    zone: Polygon  # what the label belongs to (it may sit on it)
    width: float
    height: float


@dataclass(frozen=True)
class Placed:
    key: str
    box: Polygon
    inside: bool  # True: on its zone, no leader needed
    anchor: tuple[float, float]  # where a leader meets the zone


DIRECTIONS = 16
MAX_RINGS = 400


def place_labels(items: Sequence[Item], gap: float, obstacles: Sequence[Polygon] = ()) -> list[Placed]:
    """A clear box for every item (see the module docstring); ``gap`` is the clearance kept around boxes.
    ``obstacles`` (other text, symbols) are kept clear like placed labels."""
    zones = [it.zone for it in items]
    zone_tree = shapely.STRtree(zones) if zones else None
    placed: list[Placed] = []
    boxes: list[Polygon] = list(obstacles)
    order = sorted(range(len(items)), key=lambda i: (-items[i].zone.centroid.y, items[i].zone.centroid.x, items[i].key))
    for i in order:
        it = items[i]
        spot = _inside(it, gap)
        if spot is not None and _clear(spot, i, boxes, zone_tree, gap):
            p = it.zone.representative_point()
            placed.append(Placed(it.key, spot, True, (p.x, p.y)))
            boxes.append(spot)
            continue
        b, anchor = _outside(it, i, boxes, zone_tree, gap)
        placed.append(Placed(it.key, b, False, anchor))
        boxes.append(b)
    by_key = {p.key: p for p in placed}
    return [by_key[it.key] for it in items]


def _box(cx: float, cy: float, w: float, h: float) -> Polygon:
    return box(cx - w / 2, cy - h / 2, cx + w / 2, cy + h / 2)


def _inside(it: Item, gap: float) -> Polygon | None:
    """The box centred on the zone's pole of inaccessibility, if it fits within the zone."""
    core = it.zone.buffer(-gap)
    if core.is_empty:
        return None
    c = shapely.ops.polylabel(core if core.geom_type == "Polygon" else max(core.geoms, key=lambda g: g.area), 1e-3 * gap)
    b = _box(c.x, c.y, it.width, it.height)
    return b if it.zone.contains(b) else None


def _clear(b: Polygon, own: int, boxes: list[Polygon], zone_tree: shapely.STRtree | None, gap: float) -> bool:
    grown = b.buffer(gap / 2, join_style="mitre")
    x0, y0, x1, y1 = grown.bounds
    if any(o.bounds[0] < x1 and o.bounds[2] > x0 and o.bounds[1] < y1 and o.bounds[3] > y0 and grown.intersects(o)
           for o in boxes):
        return False
    if zone_tree is not None:
        hits = zone_tree.query(grown, predicate="intersects")
        if any(int(k) != own for k in hits):
            return False
    return True


def _outside(it: Item, own: int, boxes: list[Polygon], zone_tree: shapely.STRtree | None, gap: float
             ) -> tuple[Polygon, tuple[float, float]]:
    """The first clear box on rings around the zone, and the zone point nearest to it."""
    x0, y0, x1, y1 = it.zone.bounds
    cx, cy = (x0 + x1) / 2, (y0 + y1) / 2
    step = max(it.height, gap) * 1.5
    for ring in range(1, MAX_RINGS + 1):
        for k in range(DIRECTIONS):
            a = 2 * math.pi * k / DIRECTIONS + (math.pi / DIRECTIONS if ring % 2 else 0.0)
            ca, sa = math.cos(a), math.sin(a)
            # the box's near edge sits ring·step beyond the zone's bounding box in direction a
            dx = (x1 - x0) / 2 + it.width / 2 + ring * step
            dy = (y1 - y0) / 2 + it.height / 2 + ring * step
            b = _box(cx + ca * dx, cy + sa * dy, it.width, it.height)
            if _clear(b, own, boxes, zone_tree, gap):
                return b, _nearest(it.zone, b)
    raise RuntimeError(f"no place for the label of {it.key} within {MAX_RINGS} rings")  # pragma: no cover


def _nearest(zone: Polygon, b: Polygon) -> tuple[float, float]:
    p, _ = shapely.ops.nearest_points(zone.boundary, b)
    return p.x, p.y


def leader_end(b: Polygon, anchor: tuple[float, float]) -> tuple[float, float]:
    """Where a leader from ``anchor`` meets the label box (the box point nearest to it)."""
    _, q = shapely.ops.nearest_points(shapely.Point(anchor), b.boundary)
    return q.x, q.y
