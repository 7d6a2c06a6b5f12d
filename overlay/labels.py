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


Bounds = tuple[float, float, float, float]


def _overlap(a: Bounds, b: Bounds) -> bool:
    return a[0] <= b[2] and b[0] <= a[2] and a[1] <= b[3] and b[1] <= a[3]


class _Grid:
    """Geometries bucketed by a square grid, so a check looks only at what lies near (a drawing of a
    thousand scans places its labels in seconds, not minutes); the few that span many cells are
    checked always.  Axis-parallel rectangles (labels, text boxes) are told apart by their bounds
    alone, without building a geometry per candidate."""

    def __init__(self, cell: float):
        self.cell = cell
        self.buckets: dict[tuple[int, int], list[int]] = {}
        self.items: list[tuple[Bounds, BaseGeometry | None]] = []  # (bounds, geometry unless a rectangle)
        self.big: list[int] = []

    def _span(self, bounds: Bounds) -> tuple[range, range]:
        x0, y0, x1, y1 = bounds
        c = self.cell
        return range(math.floor(x0 / c), math.floor(x1 / c) + 1), range(math.floor(y0 / c), math.floor(y1 / c) + 1)

    def add(self, g: BaseGeometry) -> None:
        k = len(self.items)
        bounds = g.bounds
        rect = g.geom_type == "Polygon" and abs(g.area - (bounds[2] - bounds[0]) * (bounds[3] - bounds[1])) <= 1e-12 * (
            1.0 + g.area) and len(g.exterior.coords) == 5
        self.items.append((bounds, None if rect else g))
        xs, ys = self._span(bounds)
        if len(xs) * len(ys) > 64:
            self.big.append(k)
            return
        for i in xs:
            for j in ys:
                self.buckets.setdefault((i, j), []).append(k)

    def _near(self, bounds: Bounds) -> list[int]:
        xs, ys = self._span(bounds)
        if len(xs) * len(ys) > 64:
            return list(range(len(self.items)))
        near = set(self.big)
        for i in xs:
            for j in ys:
                near.update(self.buckets.get((i, j), ()))
        return sorted(near)

    def hits(self, bounds: Bounds, g: BaseGeometry | None = None) -> bool:
        """Whether anything here meets the rectangle ``bounds`` (or, given, the geometry ``g`` within them)."""
        shape = g
        for k in self._near(bounds):
            theirs, geom = self.items[k]
            if not _overlap(bounds, theirs):
                continue
            if geom is None and g is None:
                return True
            if shape is None:
                shape = box(*bounds)
            if shape.intersects(geom if geom is not None else box(*theirs)):
                return True
        return False


class _Board:
    """What is on the drawing so far: labels and leaders placed (never crossed), the caller's obstacles
    and the items' zones (kept clear by boxes; a leader crosses them only where nothing else is near)."""

    def __init__(self, items: Sequence[Item], obstacles: Sequence[BaseGeometry], gap: float, within: Bounds | None):
        self.gap, self.within = gap, within
        cell = max([max(it.width, it.height) for it in items] + [gap]) * 2
        self.placed = _Grid(cell)
        self.obstacles = _Grid(cell)
        for o in obstacles:
            if not o.is_empty:
                self.obstacles.add(o)
        self.zones = shapely.STRtree([it.zone for it in items]) if items else None

    def box_clear(self, b: Bounds, own: int) -> bool:
        g = self.gap / 2
        grown = (b[0] - g, b[1] - g, b[2] + g, b[3] + g)
        w = self.within
        if w is not None and not (w[0] <= grown[0] and grown[2] <= w[2] and w[1] <= grown[1] and grown[3] <= w[3]):
            return False
        return (not self.placed.hits(grown) and not self.obstacles.hits(grown)
                and self._zones_clear(box(*grown), own))

    def leader_clear(self, line: LineString, own: int) -> tuple[bool, bool]:
        """(crosses no label or leader, crosses nothing else either)."""
        if self.placed.hits(line.bounds, line):
            return False, False
        return True, not self.obstacles.hits(line.bounds, line) and self._zones_clear(line, own)

    def _zones_clear(self, g: BaseGeometry, own: int) -> bool:
        return self.zones is None or all(int(k) == own for k in self.zones.query(g, predicate="intersects"))

    def add(self, b: Polygon, leader: LineString | None) -> None:
        self.placed.add(b)
        if leader is not None:
            self.placed.add(leader.buffer(self.gap / 4))  # later labels and leaders keep off it


def place_labels(items: Sequence[Item], gap: float, obstacles: Sequence[BaseGeometry] = (), *,
                 within: Bounds | None = None, rings: int = MAX_RINGS, optional: bool = False) -> list[Placed]:
    """A clear box for every item (see the module docstring); ``gap`` is the clearance kept around boxes.
    ``obstacles`` (other text, symbols, lines) are kept clear by the boxes, and by the leaders where
    there is any choice; ``within`` (x0, y0, x1, y1) keeps every box inside a frame.  ``optional``
    items that find no clear box within ``rings`` rings are left out (a secondary name in a crowded
    drawing); the others always get one."""
    board = _Board(items, obstacles, gap, within)
    placed: list[Placed] = []
    order = sorted(range(len(items)), key=lambda i: (-items[i].zone.centroid.y, items[i].zone.centroid.x, items[i].key))
    for i in order:
        it = items[i]
        spot = _inside(it, gap)
        if spot is not None and board.box_clear(spot.bounds, i):
            p = it.zone.representative_point()
            placed.append(Placed(it.key, spot, True, (p.x, p.y)))
            board.add(spot, None)
            continue
        found = _outside(it, i, board, rings, optional)
        if found is None:
            continue
        b, anchor = found
        placed.append(Placed(it.key, b, False, anchor))
        board.add(b, _leader(b, anchor))
    by_key = {p.key: p for p in placed}
    return [by_key[it.key] for it in items if it.key in by_key]


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


def _outside(it: Item, own: int, board: _Board, rings: int, optional: bool
             ) -> tuple[Polygon, tuple[float, float]] | None:
    """The first box on rings around the zone that is clear and whose leader crosses nothing.  Where
    every such leader near the zone crosses a zone or symbol, the nearest clear box whose leader
    crosses no label wins after LEADER_DETOUR more rings (that reads better than a label far away).
    Where labels wall a zone in, the nearest clear box, after as many more rings (its leader crosses a
    label); where no box is clear within ``rings``, the first ring's box: every label is drawn, never
    an error (None instead for an ``optional`` one)."""
    x0, y0, x1, y1 = it.zone.bounds
    cx, cy = (x0 + x1) / 2, (y0 + y1) / 2
    step = max(it.height, board.gap) * 1.5
    nearest: tuple[Polygon, tuple[float, float], int] | None = None
    boxed: tuple[Polygon, tuple[float, float], int] | None = None  # a clear box whose leader crosses a label
    first: Polygon | None = None
    for ring in range(1, rings + 1):
        for k in range(DIRECTIONS):
            a = 2 * math.pi * k / DIRECTIONS + (math.pi / DIRECTIONS if ring % 2 else 0.0)
            # the box's near edge sits ring·step beyond the zone's bounding box in direction a
            dx = (x1 - x0) / 2 + it.width / 2 + ring * step
            dy = (y1 - y0) / 2 + it.height / 2 + ring * step
            bx, by = cx + math.cos(a) * dx, cy + math.sin(a) * dy
            bounds = (bx - it.width / 2, by - it.height / 2, bx + it.width / 2, by + it.height / 2)
            if first is None:
                first = box(*bounds)
            if board.box_clear(bounds, own):
                b = box(*bounds)
                anchor = _nearest(it.zone, b)
                no_label, nothing = board.leader_clear(_leader(b, anchor), own)
                if nothing:
                    return b, anchor
                if no_label and nearest is None:
                    nearest = (b, anchor, ring)
                boxed = boxed or (b, anchor, ring)
        found = nearest or boxed
        if found is not None and ring >= found[2] + LEADER_DETOUR:
            break
    if nearest is not None:
        return nearest[0], nearest[1]
    if boxed is not None:
        return boxed[0], boxed[1]
    if optional:
        return None
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
