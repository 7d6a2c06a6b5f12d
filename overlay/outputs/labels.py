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
from typing import Callable, Sequence

import numpy as np
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
MAX_PIECES = 1024  # per straight segment of an obstacle line: a long line and a tiny gap cost no more
LINE_PIECE = 4  # gaps: the caller's lines are cut into pieces this long for the STR-trees (_pieces)
LEADER_PIECE = 16  # gaps: a placed leader's keep-off band, in pieces this long (each one buffered)


Bounds = tuple[float, float, float, float]


class _Layer:
    """Labels and leaders placed so far: the newest in a _Recent, the others settled in _Fixed trees of
    SETTLE, 2·SETTLE, 4·SETTLE … geometries (two of a size are merged into one of twice the size, so
    each geometry is settled again only log₂ times: a campaign's thousands of labels stay linear).  A
    crowded drawing's candidates spread over rings as wide as the drawing: compared with every placed
    box at once, the comparisons grew with the square of the labels."""

    SETTLE = 64

    def __init__(self) -> None:
        self.newest: list[BaseGeometry] = []
        self.recent = _Recent()
        self.settled: list[tuple[list[BaseGeometry], _Fixed]] = []  # largest first

    def add(self, g: BaseGeometry) -> None:
        self.newest.append(g)
        self.recent.add(g)
        if len(self.newest) == self.SETTLE:
            geoms, self.newest, self.recent = self.newest, [], _Recent()
            while self.settled and len(self.settled[-1][0]) == len(geoms):
                geoms = self.settled.pop()[0] + geoms
            self.settled.append((geoms, _Fixed(geoms, piece=math.inf)))

    def blocked(self, boxes: np.ndarray) -> np.ndarray:
        """For each box (k, 4) whether anything placed meets it."""
        return _any_of([self.recent.blocked] + [tree.blocked for _, tree in self.settled], boxes)

    def crossing(self, lines: np.ndarray) -> np.ndarray:
        """For each line whether it meets anything placed."""
        return _any_of([self.recent.crossing] + [tree.crossing for _, tree in self.settled], lines)


def _any_of(tests: list[Callable[[np.ndarray], np.ndarray]], items: np.ndarray) -> np.ndarray:
    """For each item whether any test holds for it; a test is asked only about the items no earlier one held for."""
    out = np.zeros(len(items), dtype=bool)
    for test in tests:
        free = np.flatnonzero(~out)
        if free.size:
            out[free] = test(items[free])
    return out


class _Recent:
    """Geometries as numpy arrays of their bounds: a candidate box is tested against all of them at once
    (the rectangles — labels, text boxes — by their bounds alone, the other shapes by their bounds first
    and their outline only where those meet), sixteen candidates a ring."""

    def __init__(self) -> None:
        self._rects, self._other = np.zeros((64, 4)), np.zeros((64, 4))  # room to grow, doubled when full
        self._shapes = np.empty(64, dtype=object)  # the other shapes, row for row with _other
        self.n_rects = self.n_other = 0

    @property
    def rects(self) -> np.ndarray:
        return self._rects[: self.n_rects]

    @property
    def other(self) -> np.ndarray:
        return self._other[: self.n_other]

    def add(self, g: BaseGeometry) -> None:
        b = g.bounds
        if _is_rect(g):
            self._rects = _put(self._rects, self.n_rects, b)
            self.n_rects += 1
        else:
            self._other = _put(self._other, self.n_other, b)
            if self.n_other == len(self._shapes):
                self._shapes = np.concatenate([self._shapes, np.empty_like(self._shapes)])
            self._shapes[self.n_other] = g
            self.n_other += 1

    def blocked(self, boxes: np.ndarray) -> np.ndarray:
        """For each box (k, 4) whether anything here meets it; only what lies within the boxes' joint
        bounds is compared box by box."""
        if not (self.n_rects or self.n_other):
            return np.zeros(len(boxes), dtype=bool)
        region = np.array([[boxes[:, 0].min(), boxes[:, 1].min(), boxes[:, 2].max(), boxes[:, 3].max()]])
        rects = self.rects[_overlaps(region, self.rects)[0]]
        out = _overlaps(boxes, rects).any(axis=1)
        idx = np.nonzero(_overlaps(region, self.other)[0])[0]
        ii, jj = np.nonzero(_overlaps(boxes, self.other[idx]) & ~out[:, None])  # outlines only where bounds meet
        if ii.size:  # one box geometry per candidate, however many shapes it is tested against
            out[ii[shapely.intersects(shapely.box(*boxes.T)[ii], self._shapes[idx[jj]])]] = True
        return out

    def crossing(self, lines: np.ndarray) -> np.ndarray:
        """For each line whether it meets anything here (bounds first, then the outline)."""
        out = np.zeros(len(lines), dtype=bool)
        b = shapely.bounds(lines).reshape(-1, 4)
        ii, jj = np.nonzero(_overlaps(b, self.rects))
        out[ii[shapely.intersects(lines[ii], shapely.box(*self.rects[jj].T))]] = True
        ii, jj = np.nonzero(_overlaps(b, self.other) & ~out[:, None])
        out[ii[shapely.intersects(lines[ii], self._shapes[jj])]] = True
        return out


class _Fixed:
    """The caller's obstacles, which do not change while labels are placed, in two STR-trees: rectangles
    (text boxes, symbols' boxes), met wherever their bounds meet a box, and the other shapes (zones,
    leaders), tested by outline against the boxes no rectangle blocks.  A campaign's drawing has
    thousands of obstacles: comparing each candidate with all their bounds was most of the time."""

    def __init__(self, geoms: Sequence[BaseGeometry], piece: float) -> None:
        kept = [g for g in geoms if not g.is_empty]
        rect = [_is_rect(g) for g in kept]
        line = [g.geom_type == "LineString" for g in kept]
        self.rects = shapely.STRtree([g for g, r in zip(kept, rect) if r])
        shapes = np.array([g for g, r, ln in zip(kept, rect, line) if not (r or ln)], dtype=object)
        self.shapes = np.concatenate([shapes, _pieces([g for g, ln in zip(kept, line) if ln], piece)])
        self.other = shapely.STRtree(self.shapes)

    def blocked(self, boxes: np.ndarray) -> np.ndarray:
        """For each box (k, 4) whether an obstacle meets it."""
        out = np.zeros(len(boxes), dtype=bool)
        geoms = shapely.box(*boxes.T)
        out[self.rects.query(geoms)[0]] = True
        free = np.flatnonzero(~out)
        ii, jj = self.other.query(geoms[free])  # bounds first, then the outline where they meet
        hit = shapely.intersects(geoms[free[ii]], self.shapes[jj])
        out[free[ii[hit]]] = True
        return out

    def crossing(self, lines: np.ndarray) -> np.ndarray:
        """For each line whether it meets an obstacle."""
        out = np.zeros(len(lines), dtype=bool)
        out[self.rects.query(lines, predicate="intersects")[0]] = True
        free = np.flatnonzero(~out)
        out[free[self.other.query(lines[free], predicate="intersects")[0]]] = True
        return out


def _pieces(lines: Sequence[LineString], piece: float) -> np.ndarray:
    """The lines cut into straight pieces at most ``piece`` long (the cut points interpolated, so the
    same points to within rounding; the ends exact; at most MAX_PIECES a segment).  A long leader's
    bounds cover a wide area on a slant: whole, it was matched with every candidate box around it
    (millions of outline tests on a campaign's drawing); its pieces meet only those near them."""
    if not lines:
        return np.empty(0, dtype=object)
    xy, which = shapely.get_coordinates(lines, return_index=True)
    same = which[1:] == which[:-1]  # consecutive points of one line: a segment
    a, b = xy[:-1][same], xy[1:][same]
    n = np.clip(np.ceil(np.hypot(*(b - a).T) / piece), 1, MAX_PIECES).astype(int)
    seg = np.repeat(np.arange(len(a)), n)
    k = np.arange(len(seg)) - np.repeat(np.cumsum(n) - n, n)
    t0, t1 = k / n[seg], (k + 1) / n[seg]
    start = a[seg] + (b - a)[seg] * t0[:, None]
    end = np.where((k + 1 == n[seg])[:, None], b[seg], a[seg] + (b - a)[seg] * t1[:, None])
    return shapely.linestrings(np.stack([start, end], axis=1))


def _is_rect(g: BaseGeometry) -> bool:
    """An axis-aligned rectangle: its bounds alone say what it meets."""
    if g.geom_type != "Polygon" or len(g.exterior.coords) != 5:
        return False
    b = g.bounds
    return abs(g.area - (b[2] - b[0]) * (b[3] - b[1])) <= 1e-12 * (1.0 + g.area)


def _put(rows: np.ndarray, n: int, bounds: Bounds) -> np.ndarray:
    if n == len(rows):
        rows = np.vstack([rows, np.zeros_like(rows)])
    rows[n] = bounds
    return rows


def _overlaps(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """(len(a), len(b)) whether bounds a[i] and b[j] meet."""
    return ((a[:, None, 0] <= b[None, :, 2]) & (b[None, :, 0] <= a[:, None, 2])
            & (a[:, None, 1] <= b[None, :, 3]) & (b[None, :, 1] <= a[:, None, 3]))


class _Board:
    """What is on the drawing so far: labels and leaders placed (never crossed), the caller's obstacles
    and the items' zones (kept clear by boxes; a leader crosses them only where nothing else is near)."""

    def __init__(self, items: Sequence[Item], obstacles: Sequence[BaseGeometry], gap: float, within: Bounds | None):
        self.gap, self.within = gap, within
        self.placed = _Layer()
        self.obstacles = _Fixed(obstacles, piece=LINE_PIECE * gap)
        self.zones = shapely.STRtree([it.zone for it in items]) if items else None

    def clear(self, boxes: np.ndarray, own: int) -> np.ndarray:
        """For each candidate box (k, 4) whether it is clear (see the module docstring)."""
        g = self.gap / 2
        grown = boxes + np.array([-g, -g, g, g])
        ok = np.ones(len(boxes), dtype=bool)
        w = self.within
        if w is not None:
            ok &= (w[0] <= grown[:, 0]) & (grown[:, 2] <= w[2]) & (w[1] <= grown[:, 1]) & (grown[:, 3] <= w[3])
        idx = np.flatnonzero(ok)
        ok[idx] = ~_any_of([self.placed.blocked, self.obstacles.blocked,
                            lambda b: self._others_zones(shapely.box(*b.T), own)], grown[idx])
        return ok

    def leaders_clear(self, lines: np.ndarray, own: int) -> tuple[np.ndarray, np.ndarray]:
        """For each leader: (crosses no label or leader, crosses nothing else either)."""
        no_label = ~self.placed.crossing(lines)
        nothing = no_label.copy()
        idx = np.flatnonzero(nothing)
        nothing[idx] = ~_any_of([self.obstacles.crossing, lambda g: self._others_zones(g, own)], lines[idx])
        return no_label, nothing

    def _others_zones(self, geoms: np.ndarray, own: int) -> np.ndarray:
        """For each geometry whether it meets the zone of an item other than ``own``."""
        out = np.zeros(len(geoms), dtype=bool)
        if self.zones is not None:
            cand, hit = self.zones.query(geoms, predicate="intersects")
            out[cand[hit != own]] = True
        return out

    def add(self, b: Polygon, leader: LineString | None) -> None:
        self.placed.add(b)
        if leader is not None:  # later labels and leaders keep off it; by pieces, as _Fixed keeps lines
            for piece in _pieces([leader], LEADER_PIECE * self.gap):
                self.placed.add(piece.buffer(self.gap / 4))


def place_labels(items: Sequence[Item], gap: float, obstacles: Sequence[BaseGeometry] = (), *,
                 within: Bounds | None = None, rings: int = MAX_RINGS, optional: bool = False) -> list[Placed]:
    """A clear box for every item (see the module docstring); ``gap`` is the clearance kept around boxes:
    each box ends at least gap/2 from every other box, leader, obstacle and other item's zone.
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
        if spot is not None and board.clear(np.asarray([spot.bounds]), i)[0]:
            p = it.zone.representative_point()
            placed.append(Placed(it.key, spot, True, (p.x, p.y)))
            board.add(spot, None)
            continue
        found = _outside(it, i, board, rings, optional)
        if found is None:
            continue
        b, anchor = found
        placed.append(Placed(it.key, b, False, anchor))
        board.add(b, _leaders(np.array([b]), np.array([anchor]))[0])
    by_key = {p.key: p for p in placed}
    return [by_key[it.key] for it in items if it.key in by_key]


def _box(cx: float, cy: float, w: float, h: float) -> Polygon:
    return box(cx - w / 2, cy - h / 2, cx + w / 2, cy + h / 2)


def _inside(it: Item, gap: float) -> Polygon | None:
    """The box centred on the zone's pole of inaccessibility, if it fits within the zone."""
    x0, y0, x1, y1 = it.zone.bounds
    if it.width > x1 - x0 or it.height > y1 - y0:  # it cannot fit (a name beside its symbol, mostly)
        return None
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
    hw, hh = it.width / 2, it.height / 2
    first = box(*_ring_boxes(np.array([1]), cx, cy, x1 - x0, y1 - y0, hw, hh, step)[0])
    ring, block = 1, 1
    while ring <= rings:
        # the rings of a block are tested in one go (the board does not change meanwhile), then read in order;
        # blocks double, so a label placed on its first ring costs one ring and a crowded one few calls
        last = min(ring + block - 1, rings)
        cands = _ring_boxes(np.arange(ring, last + 1), cx, cy, x1 - x0, y1 - y0, hw, hh, step)
        clear = board.clear(cands, own).reshape(-1, DIRECTIONS)
        for r in range(ring, last + 1):
            at = np.flatnonzero(clear[r - ring])  # a ring's clear boxes, their leaders tested at once
            if at.size:
                boxes = shapely.box(*cands[(r - ring) * DIRECTIONS + at].T)
                anchors = _nearest(it.zone, boxes)
                no_label, nothing = board.leaders_clear(_leaders(boxes, anchors), own)
            for j in range(len(at)):
                b, anchor = boxes[j], (float(anchors[j, 0]), float(anchors[j, 1]))
                if nothing[j]:
                    return b, anchor
                if no_label[j] and nearest is None:
                    nearest = (b, anchor, r)
                boxed = boxed or (b, anchor, r)
            found = nearest or boxed
            if found is not None and r >= found[2] + LEADER_DETOUR:
                ring = rings + 1  # done: leave both loops
                break
        else:
            ring, block = last + 1, min(2 * block, 16)
    if nearest is not None:
        return nearest[0], nearest[1]
    if boxed is not None:
        return boxed[0], boxed[1]
    if optional:
        return None
    a = _nearest(it.zone, np.array([first]))[0]
    return first, (float(a[0]), float(a[1]))


def _ring_boxes(rings: np.ndarray, cx: float, cy: float, zw: float, zh: float, hw: float, hh: float,
                step: float) -> np.ndarray:
    """The candidate boxes (x0, y0, x1, y1) of some rings, sixteen a ring in ring order: each box's near
    edge sits ring·step beyond the zone's bounding box (width zw, height zh, centre cx, cy); odd rings
    are turned half a direction."""
    r = rings[:, None]
    a = 2 * math.pi * np.arange(DIRECTIONS)[None, :] / DIRECTIONS + np.where(r % 2 == 1, math.pi / DIRECTIONS, 0.0)
    bx = (cx + np.cos(a) * (zw / 2 + hw + r * step)).ravel()
    by = (cy + np.sin(a) * (zh / 2 + hh + r * step)).ravel()
    return np.column_stack([bx - hw, by - hh, bx + hw, by + hh])


def _leaders(boxes: np.ndarray, anchors: np.ndarray) -> np.ndarray:
    """The leaders from each anchor (m, 2) to the nearest point of its box (leader_end, for many at once)."""
    if not len(boxes):
        return np.empty(0, dtype=object)
    ends = shapely.get_coordinates(shapely.shortest_line(shapely.points(anchors), shapely.boundary(boxes)))
    return shapely.linestrings(np.stack([anchors, ends.reshape(-1, 2, 2)[:, 1]], axis=1))


def _nearest(zone: Polygon, boxes: np.ndarray) -> np.ndarray:
    """(m, 2): for each box the point of the zone's outline nearest to it, where its leader starts."""
    line = shapely.shortest_line(zone.boundary, boxes)
    return shapely.get_coordinates(line).reshape(-1, 2, 2)[:, 0]


def leader_end(b: Polygon, anchor: tuple[float, float]) -> tuple[float, float]:
    """Where a leader from ``anchor`` meets the label box (the box point nearest to it)."""
    x, y = _leaders(np.array([b]), np.array([anchor]))[0].coords[1]
    return x, y
