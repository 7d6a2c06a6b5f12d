"""Label placement: one box per defect, none on another, none on a defect it does not belong to.

A label goes inside its zone when it fits there; otherwise it is moved out on
rings of growing radius around the zone, in sixteen directions per ring.  The
first position whose box is clear of every label, leader and obstacle placed so
far and of every other item's zone, and whose leader (the line joining it to
its zone) crosses nothing, wins; failing that, one whose leader crosses no
label or leader.  Items are taken in a fixed order, so the result is the same
on every run.  Pure geometry: the boxes are in drawing units, the caller sizes
them from the text.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import shapely
import shapely.ops
from shapely.geometry import LineString, Polygon, box
from shapely.geometry.base import BaseGeometry


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
LEADER_DETOUR = 4  # rings searched beyond the nearest clear box for one whose leader crosses nothing at all


class _Board:
    """What is on the drawing so far: labels and leaders placed (never crossed), the caller's obstacles
    and the items' zones (kept clear by boxes; a leader crosses them only where nothing else is near)."""

    def __init__(self, items: Sequence[Item], obstacles: Sequence[BaseGeometry], gap: float):
        self.gap = gap
        self.placed: list[BaseGeometry] = []
        self.obstacles = list(obstacles)
        self.zones = shapely.STRtree([it.zone for it in items]) if items else None

    def box_clear(self, b: Polygon, own: int) -> bool:
        grown = b.buffer(self.gap / 2, join_style="mitre")
        return not _hits(grown, self.placed) and not _hits(grown, self.obstacles) and self._zones_clear(grown, own)

    def leader_clear(self, line: LineString, own: int) -> tuple[bool, bool]:
        """(crosses no label or leader, crosses nothing else either)."""
        if _hits(line, self.placed):
            return False, False
        return True, not _hits(line, self.obstacles) and self._zones_clear(line, own)

    def _zones_clear(self, g: BaseGeometry, own: int) -> bool:
        return self.zones is None or all(int(k) == own for k in self.zones.query(g, predicate="intersects"))

    def add(self, b: Polygon, leader: LineString | None) -> None:
        self.placed.append(b)
        if leader is not None:
            self.placed.append(leader.buffer(self.gap / 4))  # later labels and leaders keep off it


def _hits(g: BaseGeometry, others: list[BaseGeometry]) -> bool:
    x0, y0, x1, y1 = g.bounds
    return any(o.bounds[0] <= x1 and o.bounds[2] >= x0 and o.bounds[1] <= y1 and o.bounds[3] >= y0 and g.intersects(o)
               for o in others)


def place_labels(items: Sequence[Item], gap: float, obstacles: Sequence[BaseGeometry] = ()) -> list[Placed]:
    """A clear box for every item (see the module docstring); ``gap`` is the clearance kept around boxes.
    ``obstacles`` (other text, symbols, lines) are kept clear by the boxes, and by the leaders where
    there is any choice."""
    board = _Board(items, obstacles, gap)
    placed: list[Placed] = []
    order = sorted(range(len(items)), key=lambda i: (-items[i].zone.centroid.y, items[i].zone.centroid.x, items[i].key))
    for i in order:
        it = items[i]
        spot = _inside(it, gap)
        if spot is not None and board.box_clear(spot, i):
            p = it.zone.representative_point()
            placed.append(Placed(it.key, spot, True, (p.x, p.y)))
            board.add(spot, None)
            continue
        b, anchor = _outside(it, i, board)
        placed.append(Placed(it.key, b, False, anchor))
        board.add(b, _leader(b, anchor))
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


def _outside(it: Item, own: int, board: _Board) -> tuple[Polygon, tuple[float, float]]:
    """The first box on rings around the zone that is clear and whose leader crosses nothing.  Where
    every such leader near the zone crosses a zone or symbol, the nearest clear box whose leader
    crosses no label wins after LEADER_DETOUR more rings (that reads better than a label far away).
    Where labels wall a zone in, the nearest clear box (its leader crosses a label); where no box is
    clear within MAX_RINGS, the first ring's box: every label is drawn, never an error."""
    x0, y0, x1, y1 = it.zone.bounds
    cx, cy = (x0 + x1) / 2, (y0 + y1) / 2
    step = max(it.height, board.gap) * 1.5
    nearest: tuple[Polygon, tuple[float, float], int] | None = None
    boxed: tuple[Polygon, tuple[float, float]] | None = None  # a clear box whose leader crosses a label
    first: Polygon | None = None
    for ring in range(1, MAX_RINGS + 1):
        for k in range(DIRECTIONS):
            a = 2 * math.pi * k / DIRECTIONS + (math.pi / DIRECTIONS if ring % 2 else 0.0)
            # the box's near edge sits ring·step beyond the zone's bounding box in direction a
            dx = (x1 - x0) / 2 + it.width / 2 + ring * step
            dy = (y1 - y0) / 2 + it.height / 2 + ring * step
            b = _box(cx + math.cos(a) * dx, cy + math.sin(a) * dy, it.width, it.height)
            first = first or b
            if board.box_clear(b, own):
                anchor = _nearest(it.zone, b)
                no_label, nothing = board.leader_clear(_leader(b, anchor), own)
                if nothing:
                    return b, anchor
                if no_label and nearest is None:
                    nearest = (b, anchor, ring)
                boxed = boxed or (b, anchor)
        if nearest is not None and ring >= nearest[2] + LEADER_DETOUR:
            break
    if nearest is not None:
        return nearest[0], nearest[1]
    if boxed is not None:
        return boxed
    assert first is not None
    return first, _nearest(it.zone, first)


def _leader(b: Polygon, anchor: tuple[float, float]) -> LineString:
    return LineString([anchor, leader_end(b, anchor)])


def _nearest(zone: Polygon, b: Polygon) -> tuple[float, float]:
    p, _ = shapely.ops.nearest_points(zone.boundary, b)
    return p.x, p.y


def leader_end(b: Polygon, anchor: tuple[float, float]) -> tuple[float, float]:
    """Where a leader from ``anchor`` meets the label box (the box point nearest to it)."""
    _, q = shapely.ops.nearest_points(shapely.Point(anchor), b.boundary)
    return q.x, q.y
