"""Frequency constants of the plate outlines the zone model fits: clamped circle, rectangles, ellipses.

Outside references: Leissa, *Vibration of Plates* (NASA SP-160, 1969) — clamped circle λ² = 10.2158
(Table 2.1), clamped square 35.992 and clamped 2:1 rectangle 98.31 on the long side (= 4 × 24.578 on
the short side; rectangle values from memory), simply supported rectangle ω = π²(1/a² + 1/b²)·√(D/ρh)
exactly; the finite-difference biharmonic eigenproblem (tests/independent_cases.py) as an
independent numerical reference for the ellipse.
"""

from __future__ import annotations

import math

import pytest
import shapely
import shapely.affinity

from overlay.zones.outline import clamped_lambda2_eq, simply_supported_lambda2_eq

from .independent_cases import fd_lambda2


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
    # sides 2 × 1: π²(1/4 + 1) on the equal-area radius² 2/π gives 2.5π
    assert simply_supported_lambda2_eq("rectangle", 0.5, 0.2) == pytest.approx(2.5 * math.pi, rel=1e-12)


def test_finite_differences_agree_with_leissa_and_with_our_ellipse() -> None:
    # the independent solver first: first-order in the step, so extrapolated from h and h/2 (Richardson)
    def extrapolated(shape: shapely.Polygon, length: float, h: float) -> float:
        return 2 * fd_lambda2(shape, length, h / 2) - fd_lambda2(shape, length, h)

    circle = extrapolated(shapely.Point(0, 0).buffer(0.1, quad_segs=128), 0.1, 0.004)
    assert circle == pytest.approx(10.2158, rel=0.01)  # Leissa Table 2.1
    ellipse = shapely.affinity.scale(shapely.Point(0, 0).buffer(0.1, quad_segs=128), 1.0, 0.5)
    fd_eq = extrapolated(ellipse, math.sqrt(ellipse.area / math.pi), 0.004)
    assert clamped_lambda2_eq("ellipse", 0.5) == pytest.approx(fd_eq, rel=0.02)


