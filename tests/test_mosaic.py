"""Zones of overlapping scans united (overlay.zones.mosaic), worked by hand on boxes and diamonds.

Drawing unit millimetre (unit_m = 0.001), so every area below is the shape's area in mm² × 1e-6.
The rules are the module's documented ones (docs/campaigns.md); the numbers are plane geometry:
a box's area and perimeter, a diamond |x| + |y| ≤ r of area 2r², two diamonds offset by d along x
overlapping in a diamond of half-diagonal r − d/2.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from shapely.geometry import Polygon, box

from overlay.zones.mosaic import _groups, _unite, mosaic_zones
from tests.zones_by_hand import CLASSES, site, zone

UNIT_M = 0.001


def diamond(cx: float, cy: float, r: float) -> Polygon:
    return Polygon([(cx - r, cy), (cx, cy - r), (cx + r, cy), (cx, cy + r)])


def _pair():
    """Two scans' Low zones overlapping by half: contours 2 m × 2 m boxes 1 m apart, outlines diamonds."""
    a = zone("s1-L-1", "Low", scan_id="s1", contour=box(0, 0, 2000, 2000), defect=diamond(1000, 1000, 500),
             area_m2=4.0, area_low_m2=3.6, area_high_m2=4.4, n_points=30, ver_max_db=5.0, ver_mean_db=4.0,
             peak_hz=1000.0, peak_spread=0.1, confidence=0.51234, conf_support=0.2, conf_contrast=0.4,
             conf_coherence=0.6, conf_quality=0.8, conf_outline=1.0, outline_basis="model", outline_shape="ellipse",
             outline_misfit=0.5, depth_low_m=0.03, depth_high_m=0.06, spectrum=np.array([1.0]))
    b = zone("s2-L-1", "Low", scan_id="s2", contour=box(1000, 0, 3000, 2000), defect=diamond(1300, 1000, 500),
             area_m2=4.0, area_low_m2=3.2, area_high_m2=4.2, n_points=10, ver_max_db=7.0, ver_mean_db=6.0,
             peak_hz=1400.0, peak_spread=math.nan, confidence=0.6, conf_support=0.6, conf_contrast=0.8,
             conf_coherence=1.0, conf_quality=0.4, conf_outline=0.5, outline_basis="model", outline_shape="ellipse",
             outline_misfit=math.nan, depth_low_m=0.02, depth_high_m=0.05, spectrum=np.array([2.0]))
    return a, b


def test_two_scans_united_by_the_documented_rules() -> None:
    a, b = _pair()
    z = _unite([a, b], site(margin_m=0.1), UNIT_M)
    assert (z.zone_id, z.provenance, z.scan_id) == ("s1-L-1+1", "s1-L-1;s2-L-1", "s1;s2")
    assert z.contour.equals(box(0, 0, 3000, 2000))
    assert z.area_m2 == pytest.approx(6.0) and z.perimeter_m == pytest.approx(10.0)
    assert z.area_low_m2 == pytest.approx(6.0 * 0.8) and z.area_high_m2 == pytest.approx(6.0 * 1.1)
    assert z.n_points == 40 and z.ver_max_db == 7.0
    # means weighted by points, 30 : 10; an unknown value (b's spread) left out
    assert z.ver_mean_db == pytest.approx(4.5) and z.peak_hz == pytest.approx(1100.0)
    assert z.peak_spread == pytest.approx(0.1)
    assert (z.conf_support, z.conf_contrast, z.conf_coherence, z.conf_quality, z.conf_outline) == pytest.approx(
        (0.3, 0.5, 0.7, 0.7, 0.875))
    assert z.confidence == 0.8049  # two independent sightings: 1 − 0.48766 × 0.4 = 0.804936, to 4 places
    assert (z.outline_basis, z.outline_shape, z.outline_misfit) == ("model", "ellipse", 0.5)
    # outlines: diamonds of r = 0.5 m, 0.3 m apart, overlap a diamond of half-diagonal 0.35 m
    assert z.outline_area_m2 == pytest.approx(2 * 0.5**2 * 2 - 2 * 0.35**2)
    assert (z.depth_low_m, z.depth_high_m) == (0.02, 0.06)
    # aligned footprint: the outlines span x 500–1800, y 500–1500 mm; grown by 100 mm
    assert (z.footprint_length_m, z.footprint_width_m) == pytest.approx((1.5, 1.2))
    assert z.footprint_area_m2 == pytest.approx(1.8)
    assert (z.volume_low_m3, z.volume_high_m3) == pytest.approx((1.8 * 0.02, 1.8 * 0.06))
    assert z.spectrum[0] == 1.0  # the part with more points
    assert (a.zone_id, a.n_points, a.provenance) == ("s1-L-1", 30, "")  # the parts are not changed


def test_footprint_follows_the_repair_basis_and_mode() -> None:
    a, b = _pair()
    by_contour = _unite([a, b], site(basis="contour", margin_m=0.1), UNIT_M)
    assert by_contour.footprint_area_m2 == pytest.approx(3.2 * 2.2)  # the united box grown by 0.1 m
    rotated = _unite([a, b], site(margin_m=0.0, footprint="rotated"), UNIT_M)
    assert rotated.footprint_area_m2 < 0.9 * (1.3 * 1.0)  # tilted outlines: a rotated box beats the aligned one


def test_outline_basis_is_the_model_only_where_every_part_was() -> None:
    a, b = _pair()
    b.outline_basis, b.outline_shape = "contour", ""
    z = _unite([a, b], site(), UNIT_M)
    assert (z.outline_basis, z.outline_shape) == ("contour", "")
    a, b = _pair()
    b.outline_shape = "rectangle"
    z = _unite([a, b], site(), UNIT_M)
    assert (z.outline_basis, z.outline_shape) == ("model", "")
    a, b = _pair()
    a.outline_misfit, b.outline_misfit = 0.5, 1.5
    assert _unite([a, b], site(), UNIT_M).outline_misfit == 1.5
    a.outline_misfit = b.outline_misfit = math.nan
    assert math.isnan(_unite([a, b], site(), UNIT_M).outline_misfit)


def test_unknown_everywhere_stays_unknown_and_zero_points_still_weigh() -> None:
    a, b = _pair()
    a.peak_spread = math.nan
    a.n_points = b.n_points = 0  # each part weighs 1: the plain mean
    z = _unite([a, b], site(), UNIT_M)
    assert math.isnan(z.peak_spread) and z.peak_hz == pytest.approx(1200.0) and z.n_points == 0


def test_weights_count_a_part_without_points_as_one() -> None:
    a, b = _pair()
    a.n_points, b.n_points = 1, 3
    assert _unite([a, b], site(), UNIT_M).peak_hz == pytest.approx((1000.0 + 3 * 1400.0) / 4)


def test_outlines_that_do_not_meet_keep_the_largest() -> None:
    a, b = _pair()
    b.defect = box(2500, 500, 2600, 600)
    z = _unite([a, b], site(), UNIT_M)
    assert z.defect.equals(a.defect) and z.outline_area_m2 == pytest.approx(0.5)


def test_a_zone_seen_once_passes_through() -> None:
    a, _ = _pair()
    z = _unite([a], site(), UNIT_M)
    assert z is not a and z.provenance == "s1-L-1" and z.area_m2 == 4.0 and z.zone_id == "s1-L-1"
    assert a.provenance == ""


def test_groups_need_other_scans_and_overlapping_area() -> None:
    zs = [zone("c", "Low", scan_id="s3", contour=box(2000, 0, 3000, 1000)),  # overlaps b only
          zone("a", "Low", scan_id="s1", contour=box(0, 0, 1000, 1000)),
          zone("b", "Low", scan_id="s2", contour=box(500, 0, 2500, 1000)),
          zone("a2", "Low", scan_id="s1", contour=box(600, 200, 800, 400)),  # inside a (same scan) and b
          zone("t", "Low", scan_id="s4", contour=box(3000, 0, 4000, 1000)),  # touches c along an edge only
          zone("f", "Low", scan_id="s2", contour=box(9000, 0, 9100, 100))]
    groups = sorted(([z.zone_id for z in g] for g in _groups(zs)), key=len)
    assert groups[-1] == ["a", "a2", "b", "c"]  # a–b–c chained; a2 joins through b, not through a
    assert sorted(groups[:-1]) == [["f"], ["t"]]


def test_a_small_overlap_is_an_overlap() -> None:
    zs = [zone("a", "Low", scan_id="s1", contour=box(0, 0, 1, 1)),  # drawing in metres: 0.25 m² in common
          zone("b", "Low", scan_id="s2", contour=box(0.5, 0.5, 1.5, 1.5))]
    assert [len(g) for g in _groups(zs)] == [2]


def test_same_scan_overlap_alone_is_not_a_group() -> None:
    zs = [zone("a", "Low", scan_id="s1", contour=box(0, 0, 10, 10)),
          zone("b", "Low", scan_id="s1", contour=box(5, 0, 15, 10))]
    assert sorted(len(g) for g in _groups(zs)) == [1, 1]


def test_mosaic_gives_higher_classes_the_united_defect() -> None:
    a, b = _pair()
    lone = zone("s1-L-9", "Low", scan_id="s1", contour=box(5000, 0, 6000, 1000), defect=box(5200, 200, 5800, 800),
                outline_area_m2=0.36, depth_low_m=0.1, depth_high_m=0.2, footprint_area_m2=0.64)
    mid = zone("s2-M-1", "mid-band", scan_id="s2", contour=box(1200, 200, 1800, 800), footprint_area_m2=0.5,
               footprint_length_m=0.8, footprint_width_m=0.6, volume_low_m3=0.01, volume_high_m3=0.02)
    orphan = zone("s2-M-2", "mid-band", scan_id="s2", contour=box(8000, 0, 8100, 100), defect_id="own")
    out = mosaic_zones([mid, b, orphan, lone, a], site(margin_m=0.1), UNIT_M)
    assert [z.zone_id for z in out] == ["s1-L-9", "s1-L-1+1", "s2-M-2", "s2-M-1"]  # class, scan, then position
    united, m = out[1], out[3]
    assert (out[0].defect_id, united.defect_id) == ("s1-L-9", "s1-L-1+1")
    assert m.defect_id == "s1-L-1+1" and m.defect.equals(united.defect)
    assert m.outline_area_m2 == pytest.approx(united.outline_area_m2)
    assert (m.depth_low_m, m.depth_high_m) == (0.02, 0.06)
    assert (m.footprint_area_m2, m.footprint_length_m, m.footprint_width_m) == pytest.approx((1.8, 1.5, 1.2))
    assert (m.volume_low_m3, m.volume_high_m3) == pytest.approx((1.8 * 0.02, 1.8 * 0.06))
    assert out[2].defect_id == "own"  # no lower-class zone under it


def test_mosaic_on_contour_basis_keeps_each_zones_own_footprint() -> None:
    a, b = _pair()
    mid = zone("s2-M-1", "mid-band", scan_id="s2", contour=box(1200, 200, 1800, 800), footprint_area_m2=0.5,
               footprint_length_m=0.8, footprint_width_m=0.6, volume_low_m3=0.01, volume_high_m3=0.02)
    out = mosaic_zones([a, b, mid], site(basis="contour", margin_m=0.1), UNIT_M)
    m = out[-1]
    assert m.defect_id == "s1-L-1+1" and (m.depth_low_m, m.depth_high_m) == (0.02, 0.06)
    assert (m.footprint_area_m2, m.footprint_length_m, m.footprint_width_m) == (0.5, 0.8, 0.6)
    assert (m.volume_low_m3, m.volume_high_m3) == (0.01, 0.02)


def test_no_zones_no_mosaic() -> None:
    assert mosaic_zones([], site(), UNIT_M) == []
    assert mosaic_zones(list(_pair()), site(classes=()), UNIT_M) == []  # no classes: nothing is a zone
    assert [z.class_name for z in mosaic_zones(list(_pair()), site(classes=CLASSES[:1]), UNIT_M)] == ["Low"]
