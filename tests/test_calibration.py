"""Calibration against sounding: the statistics against outside references, the readers' refusals,
and `overlay calibrate` on the demo with its provenance in a later run.

Outside references: scikit-learn (roc_curve, roc_auc_score, cohen_kappa_score) as the reference
library; the Cohen's kappa worked example of the Wikipedia article "Cohen's kappa" (50 proposals,
two readers: 20 both yes, 15 both no, 5 and 10 split; p_o = 0.7, p_e = 0.5, kappa = 0.4 — from
memory); Wilson score intervals from R. G. Newcombe, Statistics in Medicine 17 (1998) 857–872,
Table I, method 3 (81/263, 15/148, 0/20, 1/29); the area of the lens shared by two circles (the
circular-segment formula, computed here); GDAL's GeoPackage validator on the disagreement layer.
"""

from __future__ import annotations

import json
import math
import shutil
import sqlite3
import warnings
from pathlib import Path

import numpy as np
import pytest
import shapely

from overlay.calibration.agreement import (
    Counts,
    area_agreement,
    auc,
    best_youden,
    bootstrap_level,
    cohen_kappa,
    counts_at,
    roc,
    sweep,
    wilson,
)
from overlay.cli.main import main

from .test_gis_clients import needs_validator, validate

sklearn_metrics = pytest.importorskip("sklearn.metrics")


def test_cohen_kappa_worked_example_and_scikit_learn() -> None:
    # Wikipedia "Cohen's kappa" worked example (from memory): kappa 0.4
    assert abs(cohen_kappa(Counts(tp=20, fp=5, fn=10, tn=15)) - 0.4) <= 1e-6
    rng = np.random.default_rng(4)
    for _ in range(20):
        truth = rng.uniform(size=200) < rng.uniform(0.1, 0.9)
        ver = rng.normal(size=200) + 1.5 * truth
        level = float(rng.uniform(-1, 2))
        c = counts_at(level, ver, truth)
        ref = sklearn_metrics.cohen_kappa_score(truth, ver >= level)
        assert abs(c.kappa - ref) <= 1e-12


def test_roc_and_auc_equal_scikit_learn_on_random_data_with_ties() -> None:
    rng = np.random.default_rng(5)
    for _ in range(20):
        n = int(rng.integers(5, 300))
        truth = rng.uniform(size=n) < 0.3
        truth[:2] = [True, False]  # both kinds present
        ver = np.round(rng.normal(size=n) + truth, 1)  # rounded: many ties
        fpr, tpr, thr = roc(ver, truth)
        r_fpr, r_tpr, r_thr = sklearn_metrics.roc_curve(truth, ver, drop_intermediate=False)
        assert np.allclose(fpr, r_fpr, atol=1e-12) and np.allclose(tpr, r_tpr, atol=1e-12)
        assert np.array_equal(thr[1:], r_thr[1:])
        assert abs(auc(ver, truth) - sklearn_metrics.roc_auc_score(truth, ver)) <= 1e-12


@pytest.mark.parametrize("k, n, lo, hi", [(81, 263, 0.2553, 0.3662), (15, 148, 0.0624, 0.1605), (0, 20, 0.0, 0.1611),
                                          (1, 29, 0.0061, 0.1718)])
def test_wilson_interval_against_newcombe_1998(k: int, n: int, lo: float, hi: float) -> None:
    a, b = wilson(k, n)
    assert abs(a - lo) <= 5e-5 and abs(b - hi) <= 5e-5


def lens(r1: float, r2: float, d: float) -> float:
    """Area shared by two circles d apart (circular segments; the reference for the area agreement)."""
    a1 = r1 * r1 * math.acos((d * d + r1 * r1 - r2 * r2) / (2 * d * r1))
    a2 = r2 * r2 * math.acos((d * d + r2 * r2 - r1 * r1) / (2 * d * r2))
    return a1 + a2 - 0.5 * math.sqrt((-d + r1 + r2) * (d + r1 - r2) * (d - r1 + r2) * (d + r1 + r2))


def test_area_agreement_of_offset_circles_against_the_lens_formula() -> None:
    r1, r2, d = 0.3, 0.25, 0.2
    a = shapely.Point(0, 0).buffer(r1, quad_segs=512)
    b = shapely.Point(d, 0).buffer(r2, quad_segs=512)
    agree = area_agreement(6.0, a, b, shapely.box(-1, -1, 1, 1), area_per_unit=1.0)
    both = lens(r1, r2, d)
    either = math.pi * (r1 * r1 + r2 * r2) - both
    assert abs(agree.both_m2 - both) <= 2e-4 * both and abs(agree.either_m2 - either) <= 2e-4 * either
    assert abs(agree.iou - both / either) <= 3e-4 and abs(agree.found - both / (math.pi * r2 * r2)) <= 3e-4
    assert abs(agree.scan_only_m2 - (math.pi * r1 * r1 - both)) <= 2e-4 * math.pi * r1 * r1
    clipped = area_agreement(6.0, a, b, shapely.box(-1, -1, 0.0, 1))  # only the left half was looked at
    assert clipped.either_m2 < agree.either_m2 and abs(clipped.scan_only_m2 + clipped.both_m2 - math.pi * r1 * r1 / 2) < 1e-3


def test_youden_finds_the_level_that_separates_the_points() -> None:
    # hollow points read 8–12 dB, sound ones 0–5 dB: every level in (5, 8] separates them (J = 1);
    # the sweep's first such level is 5.5 dB
    levels = [float(v) for v in np.arange(2.0, 20.01, 0.5)]
    ver = np.r_[np.linspace(8, 12, 20), np.linspace(0, 5, 40)]
    hollow = np.r_[np.ones(20, bool), np.zeros(40, bool)]
    tables = sweep(levels, ver, hollow)
    k = best_youden(levels, tables)
    assert levels[k] == 5.5 and tables[k].youden == 1.0
    assert auc(ver, hollow) == 1.0


# --- the readers refuse bad sounding input --------------------------------------------------------

@pytest.fixture(scope="module")
def demo_cal(demo: dict, tmp_path_factory: pytest.TempPathFactory) -> dict:
    """The demo site and `overlay calibrate` run on it with the verdict points and with the traced areas."""
    root = demo["root"] / "site"
    out = tmp_path_factory.mktemp("cal")
    assert main(["calibrate", str(root / "site.toml"), "--sounding", str(root / "sounding-points.csv"),
                 "--out", str(out / "points"), "-q"]) == 0
    assert main(["calibrate", str(root / "site.toml"), "--sounding", str(root / "sounding.gpkg"),
                 "--elements", "KLO2-S1-B2,KLO2-S2-B1,KLO2-S2-B3", "--out", str(out / "areas"), "-q"]) == 0
    return {"root": root, "out": out}


def _refused(demo_cal: dict, tmp_path: Path, sounding: Path, capsys, *extra: str) -> str:
    out = tmp_path / "cal"
    code = main(["calibrate", str(demo_cal["root"] / "site.toml"), "--sounding", str(sounding), "--out", str(out),
                 "--cache", str(demo_cal["out"] / "points" / ".overlay-cache"), *extra])
    err = capsys.readouterr().err
    assert not out.exists() or not [p for p in out.rglob("*") if p.is_file()], "a refused calibration wrote files"
    return f"{code} {err}"


@pytest.mark.parametrize("edit, fragment", [
    (lambda t: t.replace("sound,", "maybe,", 1), "verdict must be 'hollow' or 'sound', got 'maybe'"),
    (lambda t: t.replace(",KLO2-S1-B2,", ",,", 1), "element is empty"),
    (lambda t: t.replace("2026-05-20", "20 May", 1), "not a date"),
    (lambda t: t.replace("x,y,verdict", "x,y,call", 1), "column(s) verdict missing"),
])
def test_bad_sounding_tables_are_refused_naming_the_line(demo_cal: dict, tmp_path: Path, capsys, edit, fragment) -> None:
    bad = tmp_path / "bad.csv"
    bad.write_text(edit((demo_cal["root"] / "sounding-points.csv").read_text()))
    said = _refused(demo_cal, tmp_path, bad, capsys)
    assert said.startswith("3 ") and fragment in said and "bad.csv" in said, said
    if "line 1" not in said and "column" not in fragment:
        assert "line 2," in said  # the first data row


def _polygons(path: Path, geoms: list, crs: str, **fields) -> Path:
    import geopandas as gpd

    n = len(geoms)
    gpd.GeoDataFrame({"element": ["KLO2-S1-B2"] * n, "date": ["2026-05-20"] * n, **fields}, geometry=geoms,
                     crs=crs).to_file(path, layer="hollow_areas", driver="GPKG")
    return path


def test_a_self_intersecting_traced_area_is_refused(demo_cal: dict, tmp_path: Path, capsys) -> None:
    bow = shapely.Polygon([(512350, 5712475), (512351, 5712476), (512351, 5712475), (512350, 5712476)])
    said = _refused(demo_cal, tmp_path, _polygons(tmp_path / "bow.gpkg", [bow], "EPSG:25832"), capsys)
    assert said.startswith("3 ") and "feature 1" in said and "not valid" in said, said


def test_a_traced_area_in_a_crs_without_a_transformation_is_refused(demo_cal: dict, tmp_path: Path, capsys) -> None:
    # a layer saved in New Zealand's grid (NZGD2000 / NZTM, EPSG:2193): to ETRS89 / UTM 32N there is only a
    # ballpark transformation, refused like every frame change (a CRS check: exit 4, README "Exit codes")
    sq = shapely.box(1.5e6, 5e6, 1.5e6 + 1, 5e6 + 1)
    said = _refused(demo_cal, tmp_path, _polygons(tmp_path / "nz.gpkg", [sq], "EPSG:2193"), capsys)
    assert said.startswith("4 ") and "ballpark" in said, said


def test_a_sounding_drawing_needs_its_layer_and_closed_outlines(demo_cal: dict, tmp_path: Path, capsys) -> None:
    import ezdxf

    doc = ezdxf.new("R2013")
    doc.header["$INSUNITS"] = 6
    doc.layers.add("HOLLOW")
    doc.modelspace().add_lwpolyline([(4.0, 4.8), (4.5, 4.8), (4.5, 5.2)], close=False, dxfattribs={"layer": "HOLLOW"})
    doc.saveas(tmp_path / "s.dxf")
    said = _refused(demo_cal, tmp_path, tmp_path / "s.dxf", capsys, "--layer", "HOLLOW", "--date", "2026-05-20")
    assert said.startswith("3 ") and "open polyline" in said, said
    said = _refused(demo_cal, tmp_path, tmp_path / "s.dxf", capsys, "--date", "2026-05-20")
    assert said.startswith("3 ") and "needs --layer" in said, said


def test_a_sounding_drawing_is_read_in_the_drawing_frame(demo: dict, tmp_path: Path) -> None:
    import ezdxf

    from overlay.calibration.sounding import read_sounding

    doc = ezdxf.new("R2013")
    doc.header["$INSUNITS"] = 6
    doc.layers.add("HOLLOW")
    ring = [(4.2 + 0.35 * math.cos(a), 5.0 + 0.3 * math.sin(a)) for a in np.linspace(0, 2 * math.pi, 40, endpoint=False)]
    doc.modelspace().add_lwpolyline(ring, close=True, dxfattribs={"layer": "HOLLOW"})
    doc.saveas(tmp_path / "s.dxf")
    s = read_sounding(tmp_path / "s.dxf", demo["result"], layer="HOLLOW", date="2026-05-20")
    assert len(s.polygons) == 1 and s.polygon_elements == ("KLO2-S1-B2",) and s.dates == ("2026-05-20",)
    assert abs(s.polygons[0].area - math.pi * 0.35 * 0.3) < 0.01


# --- overlay calibrate on the demo, and its provenance --------------------------------------------

def test_calibrate_on_the_demo_writes_report_roc_and_disagreements(demo_cal: dict) -> None:
    points, areas = demo_cal["out"] / "points", demo_cal["out"] / "areas"
    names = sorted(p.name for p in points.iterdir() if p.is_file())
    assert names == sorted(["klo2-soffit-calibration.txt", "klo2-soffit-calibration.html", "klo2-soffit-calibration.json",
                            "klo2-soffit-calibration-classes.toml", "klo2-soffit-disagreements.gpkg",
                            "klo2-soffit-calibration-roc.png", "klo2-soffit-calibration-map.png"])
    data = json.loads((points / "klo2-soffit-calibration.json").read_text())
    assert data["format"] == "overlay-calibration/1" and data["n_points"] > 500 and 0.5 < data["auc"] <= 1.0
    site = data["suggestions"][0]
    lo, hi = site["youden_interval"]
    assert lo <= site["youden_db"] <= hi and site["n_hollow"] > 10  # a suggestion with its interval and count
    text = (points / "klo2-soffit-calibration.txt").read_text()
    assert "Sounding is a reference, not the truth" in text and "Loose concrete" in text and "Wilson" in text
    area = json.loads((areas / "klo2-soffit-calibration.json").read_text())
    outline, watch = area["outline_area"], area["class_areas"][0]
    assert outline["found"] > watch["found"]  # the priced outlines reach further into the traced areas than 6 dB
    assert 0 < watch["iou"] < 1
    con = sqlite3.connect(areas / "klo2-soffit-disagreements.gpkg")
    kinds = {r[0] for r in con.execute("SELECT kind FROM disagreements")}
    con.close()
    assert kinds == {"scan only", "sounding only"}  # the deep D3 the hammer missed; the generous tracing


@needs_validator
def test_the_disagreement_geopackage_passes_gdals_validator(demo_cal: dict) -> None:
    for folder in ("points", "areas"):
        assert validate(demo_cal["out"] / folder / "klo2-soffit-disagreements.gpkg") == ""


def test_a_run_records_the_calibration_its_levels_come_from(demo_cal: dict, tmp_path: Path) -> None:
    site_dir = tmp_path / "site"
    shutil.copytree(demo_cal["root"], site_dir, ignore=shutil.ignore_patterns("*.before-overlay*"))
    cal = demo_cal["out"] / "points" / "klo2-soffit-calibration.json"
    shutil.copy(cal, site_dir / cal.name)
    text = (site_dir / "site.toml").read_text().replace("min_area_m2 = 0.01", f'min_area_m2 = 0.01\ncalibration = "{cal.name}"')
    (site_dir / "site.toml").write_text(text)
    out = tmp_path / "out"
    assert main(["run", str(site_dir / "site.toml"), "--out", str(out), "--no-merge", "--no-pdf", "-q"]) == 0
    digest = __import__("hashlib").sha256(cal.read_bytes()).hexdigest()
    con = sqlite3.connect(out / "klo2-soffit.gpkg")
    rows = set(con.execute("SELECT calibration_file, calibration_sha256, calibration_auc FROM runs"))
    con.close()
    data = json.loads(cal.read_text())
    assert len(rows) == 1
    name, sha, auc_value = rows.pop()
    assert (name, sha) == (cal.name, digest) and abs(auc_value - data["auc"]) <= 1e-9
    report = (out / "klo2-soffit-report.txt").read_text()
    assert "AGREEMENT WITH SOUNDING" in report and digest[:12] in report
    html = (out / "klo2-soffit-report.html").read_text()
    assert "Agreement with sounding" in html and "ROC curve" in html
    (site_dir / cal.name).write_text("{}")  # a named calibration that is not one: refused before the run
    assert main(["run", str(site_dir / "site.toml"), "--out", str(tmp_path / "o2"), "--no-merge"]) == 3


def test_levels_reaching_a_sensitivity_or_a_specificity() -> None:
    from overlay.calibration.agreement import reaching_sensitivity, reaching_specificity

    levels = [2.0, 4.0, 6.0, 8.0]
    # sensitivity 10/10, 9/10, 8/10, 5/10; specificity 5/10, 9/10, 19/20 (0.95), 1
    tables = [Counts(10, 5, 0, 5), Counts(9, 1, 1, 9), Counts(8, 1, 2, 19), Counts(5, 0, 5, 10)]
    assert reaching_sensitivity(levels, tables, 0.9) == 1  # the highest level still at 0.9 (0.9 counts)
    assert reaching_sensitivity(levels, tables, 1.0) == 0
    assert reaching_sensitivity(levels, tables[1:], 0.95) is None
    assert reaching_specificity(levels, tables, 0.95) == 2  # the lowest level at 0.95 (0.95 counts)
    assert reaching_specificity(levels, tables, 0.99) == 3
    assert reaching_specificity(levels[:2], tables[:2], 0.95) is None


def test_the_bootstrap_interval_is_the_same_every_run_and_narrow_when_the_data_are_clear() -> None:
    from overlay.calibration.agreement import bootstrap_level

    levels = [float(v) for v in np.arange(2.0, 20.01, 0.5)]
    ver = np.r_[np.linspace(8, 12, 20), np.full(40, 3.0)]  # every sound point reads 3 dB
    hollow = np.r_[np.ones(20, bool), np.zeros(40, bool)].astype(int)  # as 0/1: read as booleans
    assert bootstrap_level(levels, ver, hollow) == (3.5, 3.5)  # every resample separates at the same level
    rng = np.random.default_rng(9)
    noisy = np.r_[rng.normal(9, 2, 40), rng.normal(3, 2, 80)]
    truth = np.r_[np.ones(40, bool), np.zeros(80, bool)]
    a, b = bootstrap_level(levels, noisy, truth), bootstrap_level(levels, noisy, truth)
    assert a == b and a[0] < a[1]  # a fixed seed: the same interval on every run; real spread when the data overlap
    assert bootstrap_level(levels, noisy[:3], np.zeros(3, bool)) != bootstrap_level(levels, noisy, truth)


def test_agreement_statistics_at_their_edges() -> None:
    # Wilson (1927) by its formula: no observations give no interval; 1 of 1 (hand-worked, z = 1.96)
    # gives 0.2065..1; an interval never leaves 0..1 even where rounding would push it out (16 of 16
    # sums to 1.0000000000000002 unclipped, 0 of 21 to -1.4e-17)
    assert all(math.isnan(v) for v in wilson(0, 0))
    lo, hi = wilson(1, 1)
    assert abs(lo - 0.2065) <= 5e-5 and hi == 1.0
    assert wilson(16, 16)[1] == 1.0 and wilson(0, 21)[0] == 0.0
    # Cohen's kappa (p_o − p_e) / (1 − p_e): undefined with no observations or when both raters put
    # everything in one class (p_e = 1; scikit-learn gives nan there too); one disagreement: p_o = p_e = 0
    assert math.isnan(cohen_kappa(Counts(0, 0, 0, 0)))
    assert math.isnan(cohen_kappa(Counts(5, 0, 0, 0)))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # scikit-learn says why it is undefined
        assert math.isnan(sklearn_metrics.cohen_kappa_score([1] * 5, [1] * 5))
    assert cohen_kappa(Counts(0, 1, 0, 0)) == 0.0


def test_reaching_levels_go_by_the_level_not_the_order_given() -> None:
    # the same four levels and tables as above, listed in another order: the same levels are chosen
    from overlay.calibration.agreement import reaching_sensitivity, reaching_specificity

    levels = [4.0, 2.0, 8.0, 6.0]
    tables = [Counts(9, 1, 1, 9), Counts(10, 5, 0, 5), Counts(5, 0, 5, 10), Counts(8, 1, 2, 19)]
    assert levels[reaching_sensitivity(levels, tables, 0.9)] == 4.0
    assert levels[reaching_specificity(levels, tables, 0.95)] == 6.0
    # Youden's J ties between 8 and 4 dB (J = 0.5 at both): the lower level is the one suggested
    tied = [Counts(5, 0, 5, 10), Counts(10, 5, 0, 5), Counts(9, 4, 1, 6)]
    assert [t.youden for t in tied] == [0.5, 0.5, 0.5]
    assert [8.0, 2.0, 4.0][best_youden([8.0, 2.0, 4.0], tied)] == 2.0


def test_roc_without_one_kind_of_point_is_undefined_as_in_scikit_learn() -> None:
    # no hollow point: no true-positive rate (scikit-learn: nan, with a warning), and no AUC; no sound
    # point: no false-positive rate. A 0/1 list is read as verdicts, not as numbers.
    ver = [3.0, 1.0, 2.0, 2.0, 5.0]
    fpr, tpr, thr = roc(np.array(ver), np.zeros(5, bool))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        r_fpr, r_tpr, _ = sklearn_metrics.roc_curve([0] * 5, ver, drop_intermediate=False)
    assert np.allclose(fpr, r_fpr) and np.isnan(tpr).all() and np.isnan(r_tpr).all() and len(tpr) == len(thr) == 5
    assert math.isnan(auc(np.array(ver), np.zeros(5, bool)))
    fpr, tpr, _ = roc(np.array(ver), np.ones(5, bool))
    assert np.isnan(fpr).all() and len(fpr) == 5 and math.isnan(auc(np.array(ver), np.ones(5, bool)))
    verdicts = [1, 0, 0, 1, 1]
    fpr, tpr, _ = roc(ver, verdicts)
    r_fpr, r_tpr, _ = sklearn_metrics.roc_curve(verdicts, ver, drop_intermediate=False)
    assert np.allclose(fpr, r_fpr) and np.allclose(tpr, r_tpr)
    assert bootstrap_level([1.5, 2.5, 4.0], np.array(ver), np.array(verdicts), rounds=50) == bootstrap_level(
        [1.5, 2.5, 4.0], np.array(ver), np.array(verdicts, dtype=bool), rounds=50)


def test_area_agreement_in_a_millimetre_drawing() -> None:
    # a drawing in mm: areas in drawing units² times 1e-6 are m² — the same circles as above, 1000× larger
    r1, r2, d = 300.0, 250.0, 200.0
    a = shapely.Point(0, 0).buffer(r1, quad_segs=512)
    b = shapely.Point(d, 0).buffer(r2, quad_segs=512)
    agree = area_agreement(6.0, a, b, shapely.box(-1000, -1000, 1000, 1000), area_per_unit=1e-6)
    both = lens(0.3, 0.25, 0.2)
    assert abs(agree.both_m2 - both) <= 2e-4 * both
    assert abs(agree.either_m2 - (math.pi * (0.3**2 + 0.25**2) - both)) <= 2e-4
    assert abs(agree.scan_only_m2 - (math.pi * 0.09 - both)) <= 2e-4
    assert abs(agree.sounding_only_m2 - (math.pi * 0.0625 - both)) <= 2e-4
