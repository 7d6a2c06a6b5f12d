"""Zones that hold up where the sound field is not uniform, and outlines only where the plate model fits.

Checked on scans built independently of the demo (tests/independent_cases.py: finite-difference
plate modes, flat-topped and double-peaked responses, plane and loudspeaker-beam fields).
Outside references: Leissa, *Vibration of Plates* (NASA SP-160, 1969) — clamped circle
λ² = 10.2158 (Table 2.1), clamped square 35.992 and clamped 2:1 rectangle 98.31 on the long side
(= 4 × 24.578 on the short side; rectangle values from memory), simply supported rectangle
ω = π²(1/a² + 1/b²)·√(D/ρh) exactly; the finite-difference biharmonic eigenproblem as an
independent numerical reference for the ellipse.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import shapely

from overlay.field import fit_field
from overlay.outline import MISFIT_MAX, clamped_lambda2_eq, simply_supported_lambda2_eq

from .independent_cases import Case, Defect, cases, fd_lambda2, run_case


# --- plate frequency constants --------------------------------------------------------------------

def test_clamped_circle_is_exact() -> None:
    assert clamped_lambda2_eq("ellipse", 1.0) == pytest.approx(10.2158, abs=1e-4)  # Leissa Table 2.1


def test_clamped_rectangles_against_leissa() -> None:
    # our constants are referred to the equal-area radius r: λ²_side = λ²_eq · side² / r²
    square = clamped_lambda2_eq("rectangle", 1.0) * math.pi  # side 1: r² = 1/π
    assert square == pytest.approx(35.992, rel=0.005)  # Leissa, CCCC square (from memory); beam functions +0.3 %
    long_side = clamped_lambda2_eq("rectangle", 0.5) * 4 / (2 / math.pi)  # sides 2 × 1: r² = 2/π
    assert long_side == pytest.approx(4 * 24.578, rel=0.005)  # Leissa, CCCC a/b = 2 (from memory)


def test_simply_supported_rectangle_is_exact() -> None:
    # ω = π²(1/a² + 1/b²)·sqrt(D/ρh): the square's λ² on its side is 2π² = 19.739 (Leissa §4.1)
    assert simply_supported_lambda2_eq("rectangle", 1.0, 0.2) * math.pi == pytest.approx(2 * math.pi**2, rel=1e-12)


def test_finite_differences_agree_with_leissa_and_with_our_ellipse() -> None:
    # the independent solver first: first-order in the step, so extrapolated from h and h/2 (Richardson)
    def extrapolated(shape: shapely.Polygon, length: float, h: float) -> float:
        return 2 * fd_lambda2(shape, length, h / 2) - fd_lambda2(shape, length, h)

    circle = extrapolated(shapely.Point(0, 0).buffer(0.1, quad_segs=128), 0.1, 0.004)
    assert circle == pytest.approx(10.2158, rel=0.01)  # Leissa Table 2.1
    ellipse = shapely.affinity.scale(shapely.Point(0, 0).buffer(0.1, quad_segs=128), 1.0, 0.5)
    fd_eq = extrapolated(ellipse, math.sqrt(ellipse.area / math.pi), 0.004)
    assert clamped_lambda2_eq("ellipse", 0.5) == pytest.approx(fd_eq, rel=0.02)


# --- the sound field ------------------------------------------------------------------------------

@pytest.mark.parametrize("kind", ["plane", "quadratic"])
def test_fitted_field_follows_a_known_field_within_0_3_db(kind: str) -> None:
    rng = np.random.default_rng(7)
    rr, cc = np.mgrid[0:41, 0:51]
    xy = np.column_stack([cc.ravel(), rr.ravel()]) * 0.04  # 2.0 m × 1.6 m
    x, y = xy[:, 0] - 1.0, xy[:, 1] - 0.8
    truth_db = 3.0 * x + 1.5 * y if kind == "plane" else 6.0 - 4.0 * x * x - 3.0 * y * y + 1.0 * x * y
    energy = 1e-8 * 10 ** ((truth_db + rng.normal(0, 0.7, len(xy))) / 10)
    fit = fit_field(xy, energy, np.ones(len(xy), bool))
    assert fit is not None
    err = (fit.level_db - np.median(fit.level_db)) - (truth_db - np.median(truth_db))
    assert np.abs(err).max() < 0.3
    assert fit.span_db == pytest.approx(np.ptp(truth_db), abs=0.3)
    assert fit.scatter_db == pytest.approx(0.7, abs=0.1)


@pytest.mark.parametrize("kind", ["plane", "beam"])
@pytest.mark.parametrize("span", [4.0, 8.0])
def test_wide_scans_in_a_varying_field_find_the_defect_and_no_false_zone(tmp_path: Path, kind: str, span: float) -> None:
    defect = next(c for c in cases() if c.name == f"field-{kind}-{span:g}dB")
    sound = next(c for c in cases() if c.name == f"field-{kind}-{span:g}dB-sound")
    row = run_case(defect, tmp_path)
    assert row["reference"] == "trend"  # chosen by default: the field spans more than 1 dB
    assert row["zones"] == 1 and row["false_m2"] == 0
    assert abs(row["contour_err"]) < 0.08  # against the level set computed against the local field
    assert run_case(sound, tmp_path)["zones"] == 0


def test_a_scan_wide_reference_makes_false_zones_in_the_same_field(tmp_path: Path) -> None:
    # the measurement the issue started from: a scan-wide reference reads the strong side of the field as VER
    sound = next(c for c in cases() if c.name == "field-beam-8dB-sound")
    assert run_case(sound, tmp_path, reference="percentile")["zones"] >= 1


def test_uniform_field_trend_and_percentile_agree(tmp_path: Path) -> None:
    case = next(c for c in cases() if c.name == "field-plane-0dB")
    a = run_case(case, tmp_path / "t", reference="trend")
    b = run_case(case, tmp_path / "p", reference="percentile")
    za = sorted(z.area_m2 for z in a["result"].zones)
    zb = sorted(z.area_m2 for z in b["result"].zones)
    assert len(za) == len(zb) > 0
    assert np.allclose(za, zb, rtol=0.01)
    assert run_case(case, tmp_path / "a")["reference"] == "percentile"  # "auto" keeps the scan-wide reference


# --- the outline only where the model fits --------------------------------------------------------

def test_outline_falls_back_on_a_flat_topped_response_and_stays_on_a_plate(tmp_path: Path) -> None:
    flat = run_case(Case("flat", (Defect("circle", (0.6, 0.5), 0.3, response="flat"),), spacing=0.03), tmp_path)
    modal = run_case(Case("modal", (Defect("circle", (0.6, 0.5), 0.3),), spacing=0.03), tmp_path)
    assert flat["basis"] == "contour" and flat["misfit"] > MISFIT_MAX
    assert modal["basis"].startswith("model") and modal["misfit"] <= MISFIT_MAX
    assert abs(modal["outline_err"]) < 0.15
    assert flat["outline_err"] < 0.3
    z = flat["result"].zones[0]
    assert z.conf_outline < 0.75 < modal["result"].zones[0].conf_outline  # the outline's weight in the confidence


def test_no_outline_on_a_non_modal_response_is_larger_than_1_3_times_the_hollow(tmp_path: Path) -> None:
    checked = 0
    for case in cases():
        if case.name.endswith(("-flat", "-double")):
            row = run_case(case, tmp_path)
            if "outline_err" in row:
                assert row["outline_err"] <= 0.30, row["case"]
                checked += 1
    assert checked >= 20


def test_plate_outlines_on_modal_responses_of_every_shape(tmp_path: Path) -> None:
    for case in cases():
        if case.name.endswith("-modal") and "-6cells" in case.name:
            row = run_case(case, tmp_path)
            assert row["basis"].startswith("model"), row
            assert abs(row["outline_err"]) < 0.15, row
