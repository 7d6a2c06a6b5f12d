"""The quantities table worked by hand from zones written out in full (no pipeline run).

The rule checked is the trade's (common practice): a contractor prices each defect once, at the
highest class it reaches, and totals add defects, never nested class contours.  Every expected
number below is the arithmetic of the zone values in this file, rounded as the table states
(areas 4 places, lengths 3, volumes 5, frequency to the hertz, confidence 2).
"""

from __future__ import annotations

import math

import pytest

from overlay import quantities as q
from tests.zones_by_hand import CLASSES, result, zone

NAN = math.nan


def _zones() -> list:
    """Four defects on two elements; the input order is shuffled on purpose."""
    l1 = zone("s1-L-1", "Low", defect_id="s1-L-1", area_m2=0.51234567, outline_area_m2=0.61234567,
              outline_basis="model", footprint_length_m=1.23456, footprint_width_m=0.98765,
              footprint_area_m2=1.21931234, depth_low_m=0.04321, depth_high_m=0.08765, volume_low_m3=0.052687654,
              volume_high_m3=0.106876543, peak_hz=1234.4, confidence=0.61234, ver_max_db=4.0)
    m1 = zone("s1-M-1", "mid-band", defect_id="s1-L-1", area_m2=0.21234567, peak_hz=1500.6, confidence=0.7,
              ver_max_db=8.0)
    h1 = zone("s1-H-1", "high", defect_id="s1-L-1", area_m2=0.05234567, peak_hz=1800.4, confidence=0.81234,
              ver_max_db=12.0)
    h2 = zone("s1-H-2", "high", defect_id="s1-L-1", area_m2=0.03123456, peak_hz=2100.2, confidence=0.9,
              ver_max_db=11.0)
    l2 = zone("s1-L-2", "Low", area_m2=0.30004444, outline_basis="contour", footprint_length_m=0.7,
              footprint_width_m=0.6, footprint_area_m2=0.42, peak_hz=900.0, confidence=0.33333)
    l0 = zone("s1-L-0", "Low", defect_id="s1-L-0", area_m2=0.1, outline_area_m2=0.12345678, outline_basis="model",
              footprint_length_m=0.5, footprint_width_m=0.4, footprint_area_m2=0.2, depth_low_m=0.01,
              depth_high_m=0.02, volume_low_m3=0.001234567, volume_high_m3=0.002345678, peak_hz=1111.6,
              confidence=0.40404)
    l3 = zone("s2-L-1", "Low", element="P0", scan_id="s2", defect_id="s2-L-1", area_m2=0.8, outline_area_m2=0.9)
    m3 = zone("s2-M-1", "mid-band", element="P0", scan_id="s2", defect_id="s2-L-1", area_m2=0.25, peak_hz=1400.0,
              confidence=0.55)
    return [h2, m1, l2, m3, l1, h1, l0, l3]


P0_MID = {"row_kind": "defect", "element": "P0", "class": "mid-band", "zone_id": "s2-M-1", "defect_id": "s2-L-1",
          "scan_id": "s2", "n_defects": 1, "basis": "outline", "contour_area_m2": 0.25, "outline_area_m2": 0.9,
          "outline_basis": "", "affected_area_m2": 0.9, "footprint_length_m": "", "footprint_width_m": "",
          "footprint_area_m2": "", "depth_low_m": "", "depth_high_m": "", "volume_low_m3": "", "volume_high_m3": "",
          "peak_hz": 1400.0, "confidence": 0.55, "contour_low_m2": 0.8, "contour_mid_band_m2": 0.25,
          "contour_high_m2": 0.0}
P1_HIGH = {"row_kind": "defect", "element": "P1", "class": "high", "zone_id": "s1-H-1", "defect_id": "s1-L-1",
           "scan_id": "s1", "n_defects": 1, "basis": "outline", "contour_area_m2": 0.0836, "outline_area_m2": 0.6123,
           "outline_basis": "model", "affected_area_m2": 0.6123, "footprint_length_m": 1.235,
           "footprint_width_m": 0.988, "footprint_area_m2": 1.2193, "depth_low_m": 0.043, "depth_high_m": 0.088,
           "volume_low_m3": 0.05269, "volume_high_m3": 0.10688, "peak_hz": 1800.0, "confidence": 0.81,
           "contour_low_m2": 0.5123, "contour_mid_band_m2": 0.2123, "contour_high_m2": 0.0836}
P1_LOW0 = {"row_kind": "defect", "element": "P1", "class": "Low", "zone_id": "s1-L-0", "defect_id": "s1-L-0",
           "scan_id": "s1", "n_defects": 1, "basis": "outline", "contour_area_m2": 0.1, "outline_area_m2": 0.1235,
           "outline_basis": "model", "affected_area_m2": 0.1235, "footprint_length_m": 0.5, "footprint_width_m": 0.4,
           "footprint_area_m2": 0.2, "depth_low_m": 0.01, "depth_high_m": 0.02, "volume_low_m3": 0.00123,
           "volume_high_m3": 0.00235, "peak_hz": 1112.0, "confidence": 0.4, "contour_low_m2": 0.1,
           "contour_mid_band_m2": 0.0, "contour_high_m2": 0.0}
P1_LOW2 = {"row_kind": "defect", "element": "P1", "class": "Low", "zone_id": "s1-L-2", "defect_id": "s1-L-2",
           "scan_id": "s1", "n_defects": 1, "basis": "outline", "contour_area_m2": 0.3, "outline_area_m2": "",
           "outline_basis": "contour", "affected_area_m2": "", "footprint_length_m": 0.7, "footprint_width_m": 0.6,
           "footprint_area_m2": 0.42, "depth_low_m": "", "depth_high_m": "", "volume_low_m3": "",
           "volume_high_m3": "", "peak_hz": 900.0, "confidence": 0.33, "contour_low_m2": 0.3,
           "contour_mid_band_m2": 0.0, "contour_high_m2": 0.0}


def test_defects_group_nested_zones_and_pick_the_strongest_top() -> None:
    found = {d.defect_id: d for d in q.defects(_zones(), CLASSES)}
    assert list(found) == ["s1-L-1", "s1-L-2", "s2-L-1", "s1-L-0"]  # first seen first
    d = found["s1-L-1"]
    assert [z.zone_id for z in d.zones] == ["s1-L-1", "s1-M-1", "s1-H-1", "s1-H-2"]  # class order, then id
    assert d.lowest.zone_id == "s1-L-1"
    assert d.highest_class == "high"
    assert d.top.zone_id == "s1-H-1"  # 12 dB beats 11 dB although its confidence is lower
    assert d.contour_area_m2("high") == pytest.approx(0.05234567 + 0.03123456, abs=1e-15)
    assert d.contour_area_m2("Low") == 0.51234567
    assert d.contour_area_m2("no such class") == 0.0
    assert found["s2-L-1"].highest_class == "mid-band"
    assert found["s1-L-2"].highest_class == "Low"  # a zone without defect id is its own defect


def test_top_zone_on_equal_level_is_the_surer_one() -> None:
    zs = [zone("a", "Low", defect_id="a"), zone("b", "high", defect_id="a", ver_max_db=9.0, confidence=0.4),
          zone("c", "high", defect_id="a", ver_max_db=9.0, confidence=0.6),
          zone("d", "high", defect_id="a", ver_max_db=8.0, confidence=0.9)]
    assert q.defects(zs, CLASSES)[0].top.zone_id == "c"


def test_defect_rows_are_each_defect_once_at_its_highest_class() -> None:
    rows = q.defect_rows(_zones(), CLASSES, "outline")
    assert rows == [P0_MID, P1_HIGH, P1_LOW0, P1_LOW2]  # element, highest class first, then defect id
    assert all(type(r["peak_hz"]) is float for r in rows)  # 1800.0, as the other numbers: a float


def test_contour_basis_prices_the_lowest_class_contour() -> None:
    rows = {r["defect_id"]: r for r in q.defect_rows(_zones(), CLASSES, "contour")}
    assert rows["s1-L-1"]["affected_area_m2"] == 0.5123 and rows["s1-L-1"]["basis"] == "contour"
    assert rows["s1-L-2"]["affected_area_m2"] == 0.3  # known although its outline is not
    assert rows["s1-L-1"]["outline_area_m2"] == 0.6123  # the outline is still shown beside it


def test_element_totals_add_defects_and_give_the_share() -> None:
    rows = q.element_rows(result(_zones(), element_areas={"P1": 12.34567}))
    assert rows == [
        {"row_kind": "element_total", "element": "P0", "class": "mid-band", "n_defects": 1, "basis": "outline",
         "contour_area_m2": 0.25, "outline_area_m2": 0.9, "affected_area_m2": 0.9, "footprint_area_m2": "",
         "volume_low_m3": "", "volume_high_m3": "", "contour_low_m2": 0.8, "contour_mid_band_m2": 0.25,
         "contour_high_m2": 0.0, "element_area_m2": "", "element_share_pct": ""},  # P0's area unknown
        {"row_kind": "element_total", "element": "P1", "class": "high", "n_defects": 1, "basis": "outline",
         "contour_area_m2": 0.0836, "outline_area_m2": 0.6123, "affected_area_m2": 0.6123,
         "footprint_area_m2": 1.2193, "volume_low_m3": 0.05269, "volume_high_m3": 0.10688, "contour_low_m2": 0.5123,
         "contour_mid_band_m2": 0.2123, "contour_high_m2": 0.0836, "element_area_m2": 12.346,
         "element_share_pct": 4.96},  # 100 × 0.6123 / 12.34567 = 4.9596
        {"row_kind": "element_total", "element": "P1", "class": "Low", "n_defects": 2, "basis": "outline",
         "contour_area_m2": 0.4, "outline_area_m2": 0.1235, "affected_area_m2": 0.1235, "footprint_area_m2": 0.62,
         "volume_low_m3": 0.00123, "volume_high_m3": 0.00235, "contour_low_m2": 0.4, "contour_mid_band_m2": 0.0,
         "contour_high_m2": 0.0, "element_area_m2": 12.346, "element_share_pct": 1.0},  # 100 × 0.1235 / 12.34567
    ]


def test_element_total_of_unknown_values_is_blank_not_zero() -> None:
    zs = [zone("a", "Low", defect_id="a", element="E"), zone("b", "Low", defect_id="b", element="E")]
    (row,) = q.element_rows(result(zs, element_areas={"E": 10.0}))
    assert row["affected_area_m2"] == "" and row["element_share_pct"] == "" and row["volume_low_m3"] == ""
    assert row["contour_area_m2"] == 2.0 and row["n_defects"] == 2


def _pieces() -> list[dict]:
    return [
        {"asset_id": "A-2", "zone_id": "s1-L-1", "defect_id": "s1-L-1", "area_m2": 0.4},
        {"asset_id": "A-3", "zone_id": "s1-L-1", "defect_id": "s1-L-1", "area_m2": 0.21234567},
        {"asset_id": "A-2", "zone_id": "s1-M-1", "defect_id": "s1-L-1", "area_m2": 0.1},  # a class contour's piece
        {"asset_id": "A-2", "zone_id": "gone", "defect_id": "gone", "area_m2": 1.0},  # no such defect
        {"asset_id": "A-2", "zone_id": "s1-L-0", "defect_id": "s1-L-0", "area_m2": 0.06172839},  # half the outline
        {"asset_id": "A-2", "zone_id": "s1-L-2", "defect_id": "s1-L-2", "area_m2": 0.05},  # outline area unknown
        {"asset_id": "A-1", "zone_id": "s2-L-1", "defect_id": "s2-L-1", "area_m2": 0.45},
    ]


def test_asset_totals_share_footprint_and_volume_by_the_outline_on_each_asset() -> None:
    # s1-L-1's outline (0.61234567 m²) lies 0.4 on A-2 and 0.21234567 on A-3: its footprint 1.21931234 m²
    # and volumes 0.052687654 / 0.106876543 m³ go 0.4/0.61234567 and 0.21234567/0.61234567 to each
    rows = q.asset_rows(result(_zones(), element_areas={"A-1": 2.00049, "A-2": 4.0}, asset_pieces=_pieces()))
    assert rows == [
        {"row_kind": "asset_total", "element": "A-1", "class": "mid-band", "n_defects": 1, "basis": "outline",
         "affected_area_m2": 0.45, "footprint_area_m2": "", "volume_low_m3": "", "volume_high_m3": "",
         "element_area_m2": 2.0, "element_share_pct": 22.494},  # 100 × 0.45 / 2.00049 = 22.4945
        {"row_kind": "asset_total", "element": "A-2", "class": "high", "n_defects": 1, "basis": "outline",
         "affected_area_m2": 0.4, "footprint_area_m2": 0.7965, "volume_low_m3": 0.03442, "volume_high_m3": 0.06981,
         "element_area_m2": 4.0, "element_share_pct": 10.0},
        {"row_kind": "asset_total", "element": "A-2", "class": "Low", "n_defects": 2, "basis": "outline",
         "affected_area_m2": 0.1117, "footprint_area_m2": 0.1, "volume_low_m3": "", "volume_high_m3": "",
         "element_area_m2": 4.0, "element_share_pct": 2.793},  # s1-L-2's unknown outline shares nothing out
        {"row_kind": "asset_total", "element": "A-3", "class": "high", "n_defects": 1, "basis": "outline",
         "affected_area_m2": 0.2123, "footprint_area_m2": 0.4228, "volume_low_m3": 0.01827, "volume_high_m3": 0.03706,
         "element_area_m2": "", "element_share_pct": ""},
    ]
    assert all(type(r["element_area_m2"]) is float for r in rows if r["element_area_m2"] != "")
    parts = [r for r in rows if r["class"] == "high"]
    assert sum(r["footprint_area_m2"] for r in parts) == pytest.approx(1.2193, abs=1e-4)  # conserved


def test_asset_totals_on_contour_basis_use_the_lowest_class_pieces() -> None:
    pieces = [{"asset_id": "A", "zone_id": "s1-L-1", "defect_id": "s1-L-1", "area_m2": 0.25617284},
              {"asset_id": "A", "zone_id": "s1-M-1", "defect_id": "s1-L-1", "area_m2": 0.2}]
    res = result(_zones(), basis="contour", element_areas={"A": 1.0}, asset_pieces=pieces)
    (row,) = q.asset_rows(res)
    # half of the 0.51234567 m² contour: half the footprint and volumes
    assert row == {"row_kind": "asset_total", "element": "A", "class": "high", "n_defects": 1, "basis": "contour",
                   "affected_area_m2": 0.2562, "footprint_area_m2": 0.6097, "volume_low_m3": 0.02634,
                   "volume_high_m3": 0.05344, "element_area_m2": 1.0, "element_share_pct": 25.617}


def test_an_outline_of_no_area_shares_nothing_out() -> None:
    zs = [zone("a", "Low", defect_id="a", outline_area_m2=0.0, footprint_area_m2=0.5, volume_low_m3=0.01,
               volume_high_m3=0.02)]
    pieces = [{"asset_id": "A", "zone_id": "a", "defect_id": "a", "area_m2": 0.0}]
    (row,) = q.asset_rows(result(zs, element_areas={"A": 1.0}, asset_pieces=pieces))
    assert (row["footprint_area_m2"], row["volume_low_m3"], row["volume_high_m3"]) == (0.0, 0.0, 0.0)


def test_zone_rows_list_every_class_contour() -> None:
    rows = q.zone_rows(result(_zones()))
    assert [r["zone_id"] for r in rows] == ["s2-L-1", "s2-M-1", "s1-L-0", "s1-L-1", "s1-L-2", "s1-M-1", "s1-H-1",
                                            "s1-H-2"]
    assert rows[3] == {"row_kind": "zone", "element": "P1", "class": "Low", "zone_id": "s1-L-1",
                       "defect_id": "s1-L-1", "scan_id": "s1", "n_defects": "", "basis": "outline",
                       "contour_area_m2": 0.5123, "outline_area_m2": 0.6123, "outline_basis": "model",
                       "affected_area_m2": "", "footprint_length_m": "", "footprint_width_m": "",
                       "footprint_area_m2": "", "depth_low_m": 0.043, "depth_high_m": 0.088, "peak_hz": 1234.0,
                       "confidence": 0.61}
    assert rows[4]["outline_area_m2"] == "" and rows[4]["depth_low_m"] == ""
    assert all(type(r["peak_hz"]) is float for r in rows)


def test_quantity_rows_put_priced_rows_first_and_the_cautions_last() -> None:
    res = result(_zones(), element_areas={"P1": 5.0}, asset_pieces=_pieces()[:1], cautions=("one", "two"))
    kinds = [r["row_kind"] for r in q.quantity_rows(res)]
    assert q.quantity_rows(res)[:4] == [P0_MID, P1_HIGH, P1_LOW0, P1_LOW2]
    assert kinds == ["defect"] * 4 + ["element_total"] * 3 + ["asset_total"] + ["zone"] * 8 + ["caution"] * 2
    assert q.quantity_rows(res)[-2:] == [{"row_kind": "caution", "note": "one"}, {"row_kind": "caution", "note": "two"}]
    assert set(q.ROW_KINDS) == set(kinds)


def test_names_and_rounding_for_a_person() -> None:
    assert q.area_field("Mid-Band") == "area_mid_band_m2"
    assert q.class_columns(CLASSES) == ("contour_low_m2", "contour_mid_band_m2", "contour_high_m2")
    assert q.rounded(NAN, 3) == "" and q.rounded(1.23456, 3) == 1.235 and q.rounded(2.5, 0) == 2.0
    assert q.affected_area(zone("z", "Low", area_m2=2.0, outline_area_m2=3.0), "outline") == 3.0
    assert q.affected_area(zone("z", "Low", area_m2=2.0, outline_area_m2=3.0), "contour") == 2.0
