"""Label placement's geometry tests against shapely's own predicates (the reference: GEOS's
intersects, tested pairwise one box and one shape at a time), on layouts built here, not by
the demo: rectangles, turned squares, lines and a ring-shaped polygon, boxes touching edge to edge."""

from __future__ import annotations

import numpy as np
import pytest
import shapely
from shapely.geometry import LineString, Polygon, box

from overlay.outputs.labels import MAX_PIECES, Item, _Fixed, _Layer, _pieces, place_labels


def _obstacles(rng: np.random.Generator, n: int) -> list:
    out: list = []
    for i in range(n):
        x, y = rng.uniform(0, 50, 2)
        kind = i % 4
        if kind == 0:
            out.append(box(x, y, x + rng.uniform(0.2, 3), y + rng.uniform(0.2, 3)))
        elif kind == 1:
            out.append(shapely.affinity.rotate(box(x, y, x + 2, y + 2), 30))  # not axis-aligned
        elif kind == 2:
            out.append(LineString([(x, y), (x + rng.uniform(-6, 6), y + rng.uniform(-6, 6))]))
        elif kind == 3 and i % 8 == 3:  # a long leader on a slant, and one with a bend
            out.append(LineString([(x, y), (x + rng.uniform(-40, 40), y + rng.uniform(-40, 40))]))
            out.append(LineString([(x, y), (x + 5, y + 9), (x + 17, y - 3)]))
        else:
            out.append(Polygon([(x, y), (x + 4, y), (x + 4, y + 4), (x, y + 4)], [[(x + 1, y + 1), (x + 3, y + 1),
                                                                                  (x + 3, y + 3), (x + 1, y + 3)]]))
    out.append(box(10, 10, 12, 12))  # candidates below touch it edge to edge: touching counts as meeting
    return out


def _boxes(rng: np.random.Generator, k: int) -> np.ndarray:
    x, y = rng.uniform(-2, 52, k), rng.uniform(-2, 52, k)
    w, h = rng.uniform(0.1, 2.5, k), rng.uniform(0.1, 1.0, k)
    b = np.column_stack([x, y, x + w, y + h])
    b[:3] = [[12, 10, 13, 11], [8, 11, 10, 12.5], [11, 12, 11.5, 13]]  # right, left and top edges of the 2 × 2 box
    b[3] = [2.2, 2.2, 2.8, 2.8]  # inside a ring's hole, or not: whatever the layout says
    return b


def _reference(boxes: np.ndarray, obstacles: list) -> np.ndarray:
    return np.array([any(box(*b).intersects(o) for o in obstacles) for b in boxes])


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_fixed_obstacles_meet_a_box_exactly_when_shapely_says_so(seed: int) -> None:
    rng = np.random.default_rng(seed)
    obstacles, boxes = _obstacles(rng, 120), _boxes(rng, 400)
    want = _reference(boxes, obstacles)
    assert want[:3].all() and 0.1 < want.mean() < 0.9  # the touching cases, and both answers occur often
    for piece in (0.7, 3.0, 1e9):  # leaders cut into short pieces, or left whole
        assert np.array_equal(_Fixed(obstacles, piece).blocked(boxes), want)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_placed_layer_meets_a_box_exactly_when_shapely_says_so(seed: int) -> None:
    rng = np.random.default_rng(seed)
    obstacles, boxes = _obstacles(rng, 120), _boxes(rng, 400)
    layer = _Layer()
    for o in obstacles:  # more than its first 64 rows: it has to grow
        layer.add(o)
    assert np.array_equal(layer.blocked(boxes), _reference(boxes, obstacles))


def test_placed_layer_settles_in_trees_of_doubling_size_and_still_answers_exactly() -> None:
    rng = np.random.default_rng(6)
    obstacles, boxes = _obstacles(rng, 7 * _Layer.SETTLE + 5), _boxes(rng, 300)
    layer = _Layer()
    for o in obstacles:
        layer.add(o)
    sizes = [len(g) for g, _ in layer.settled]
    full = len(obstacles) // _Layer.SETTLE  # trees as the binary digits of the settled batches, largest first
    assert full >= 7 and sizes == [_Layer.SETTLE << b for b in reversed(range(full.bit_length())) if full >> b & 1]
    assert sum(sizes) + len(layer.newest) == len(obstacles)
    assert np.array_equal(layer.blocked(boxes), _reference(boxes, obstacles))


def test_a_line_crosses_fixed_obstacles_exactly_when_shapely_says_so() -> None:
    rng = np.random.default_rng(4)
    obstacles = _obstacles(rng, 60)
    fixed, layer = _Fixed(obstacles, 0.7), _Layer()
    for o in obstacles:
        layer.add(o)
    (x, y), (dx, dy) = rng.uniform(0, 50, (2, 300)), rng.uniform(-5, 5, (2, 300))
    lines = shapely.linestrings(np.stack([np.column_stack([x, y]), np.column_stack([x + dx, y + dy])], axis=1))
    want = np.array([any(line.intersects(o) for o in obstacles) for line in lines])
    assert 0.1 < want.mean() < 0.9
    assert np.array_equal(fixed.crossing(lines), want) and np.array_equal(layer.crossing(lines), want)


def test_no_obstacles_blocks_nothing() -> None:
    boxes = np.array([[0.0, 0.0, 1.0, 1.0]])
    assert not _Fixed([], 1.0).blocked(boxes).any() and not _Fixed([Polygon()], 1.0).blocked(boxes).any()
    assert not _Fixed([], 1.0).crossing(np.array([LineString([(0, 0), (1, 1)])])).any()


def test_pieces_cover_the_same_line_end_to_end() -> None:
    lines = [LineString([(0, 0), (10, 7)]), LineString([(3, 3), (3.2, 3.1)]), LineString([(0, 0), (4, 0), (4, 9)])]
    pieces = _pieces(lines, 1.5)
    assert shapely.length(pieces).max() <= 1.5 + 1e-12
    # the same points to within rounding (the cut points are interpolated), by GEOS's Hausdorff distance
    assert shapely.hausdorff_distance(shapely.union_all(pieces), shapely.union_all(lines)) < 1e-12
    assert sum(shapely.length(pieces)) == pytest.approx(sum(line.length for line in lines), rel=1e-12)
    ends = shapely.get_coordinates(pieces).reshape(-1, 2, 2)
    joined = ends[1:, 0] == ends[:-1, 1]  # each piece starts exactly where one ends, bar the three starts
    assert joined.all(axis=1).sum() == len(pieces) - 3
    assert len(_pieces([], 1.0)) == 0


def test_a_leaders_band_kept_by_pieces_is_the_band_of_the_whole_leader() -> None:
    """The placed layer keeps a leader's band as the buffers of its pieces: the same area as GEOS's
    buffer of the whole line (their symmetric difference is rounding)."""
    leader = LineString([(2.0, 1.0), (-37.0, 55.0)])
    whole = leader.buffer(0.25)
    parts = shapely.union_all([p.buffer(0.25) for p in _pieces([leader], 4.0)])
    assert len(_pieces([leader], 4.0)) == 17
    assert whole.symmetric_difference(parts).area < 1e-9 * whole.area
    assert len(_pieces([LineString([(0, 0), (1e4, 0)])], 1e-6)) == MAX_PIECES  # bounded, however long


def test_crowded_labels_keep_off_the_obstacles_each_other_and_other_zones() -> None:
    """Forty zones in a row, each with a label wider than the gaps between them, around rectangles and
    lines: every box at least half the gap from every obstacle, every other box and every other zone
    (the clearance place_labels promises; shapely's distance measures it)."""
    rng = np.random.default_rng(5)
    zones = [box(i * 1.5, 0, i * 1.5 + 1, 1) for i in range(40)]
    items = [Item(f"D{i}", z, 3.0, 0.6) for i, z in enumerate(zones)]
    obstacles = [box(x, 2.5, x + 0.8, 3.0) for x in rng.uniform(0, 60, 30)]
    obstacles += [LineString([(x, -3), (x + 2, -1)]) for x in rng.uniform(0, 60, 20)]
    gap = 0.2
    placed = place_labels(items, gap=gap, obstacles=obstacles)
    assert [p.key for p in placed] == [it.key for it in items]
    assert sum(not p.inside for p in placed) > 30  # crowded: most had to move out
    for i, p in enumerate(placed):
        others = obstacles + [z for j, z in enumerate(zones) if j != i] + [q.box for q in placed if q is not p]
        assert min(p.box.distance(o) for o in others) > gap / 2 - 1e-9, p.key


def test_optional_names_with_no_room_are_left_out_and_the_others_kept() -> None:
    walled = box(0, 0, 1, 1)  # wholly walled in by an obstacle ring wider than the rings searched
    wall = box(-30, -30, 31, 31).difference(box(-0.05, -0.05, 1.05, 1.05))
    free = box(100, 0, 101, 1)
    items = [Item("walled", walled, 2.0, 0.5), Item("free", free, 2.0, 0.5)]
    placed = place_labels(items, gap=0.1, obstacles=[wall], rings=6, optional=True)
    assert [p.key for p in placed] == ["free"]
