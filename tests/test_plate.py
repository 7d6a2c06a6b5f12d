"""Thin-plate physics against Leissa (NASA SP-160) and ACI 318."""

from __future__ import annotations

import pytest

from overlay.zones.plate import (
    aci318_modulus_pa,
    clamped_lambda,
    clamped_mode_shape,
    plate_frequency,
    plate_thickness,
    simply_supported_lambda,
)


def test_clamped_root_against_leissa() -> None:
    # root of J0·I1 + I0·J1 = 0 recomputed with scipy.special: λ = 3.196221, λ² = 10.2158
    # (Leissa, Vibration of Plates, NASA SP-160, 1969, Table 2.1) (docs/references.md, Thin plates; 1e-4)
    assert clamped_lambda() == pytest.approx(3.196221, abs=1e-6)
    assert clamped_lambda() ** 2 == pytest.approx(10.2158, abs=1e-4)


@pytest.mark.parametrize("nu, lam2", [(0.0, 4.4436), (0.2, 4.7826), (0.25, 4.8601), (0.3, 4.9351), (0.5, 5.2127)])
def test_simply_supported_roots(nu: float, lam2: float) -> None:
    # J1/J0 + I1/I0 = 2λ/(1−ν); values of Leissa & Narita, J. Sound Vib. 70(2) 1980 (docs/references.md)
    assert simply_supported_lambda(nu) ** 2 == pytest.approx(lam2, abs=2e-4)


def test_aci318_modulus() -> None:
    # ACI 318: Ec = 4700·sqrt(f'c) MPa: 28 MPa → 24870, 30 → 25743, 35 → 27806 (docs/references.md)
    assert aci318_modulus_pa(28) / 1e6 == pytest.approx(24870, abs=1)
    assert aci318_modulus_pa(30) / 1e6 == pytest.approx(25743, abs=1)
    assert aci318_modulus_pa(35) / 1e6 == pytest.approx(27806, abs=1)
    assert aci318_modulus_pa(25) == pytest.approx(4700 * 5 * 1e6, rel=1e-12)  # √25 = 5: the formula exactly, in Pa


def test_frequency_formula_and_inverse_round_trip() -> None:
    # f = λ²/(2πa²)·sqrt(D/ρh), D = E·h³/(12(1−ν²)); hand-worked for E 30 GPa, ν 0.2, ρ 2400,
    # h 40 mm, a 0.25 m: D = 166 667 N·m, ρh = 96, sqrt = 41.667, λ²/(2πa²) = 26.014 → 1083.9 Hz
    lam2 = clamped_lambda() ** 2
    f = plate_frequency(0.25, 0.04, 30e9, 2400, 0.2, lam2)
    assert f == pytest.approx(1083.9, abs=0.5)
    assert plate_thickness(f, 0.25, 30e9, 2400, 0.2, lam2) == pytest.approx(0.04, rel=1e-12)


def test_mode_shape_ends() -> None:
    assert clamped_mode_shape(0.0) == pytest.approx(1.0)
    assert abs(clamped_mode_shape(1.0)) < 1e-12
    assert clamped_mode_shape(1.5) == pytest.approx(0.0, abs=1e-12)
