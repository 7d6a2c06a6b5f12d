"""Thin circular plate in flexure: the physics behind a delamination's resonance.

Concrete over a shallow, wide delamination behaves like a thin plate of the
cover thickness, held at its edge by the sound concrete around it.  Its
fundamental frequency is f = λ²/(2πa²)·sqrt(D/(ρh)), D = E·h³/(12(1−ν²)),
with λ² from the edge condition (Leissa, Vibration of Plates, NASA SP-160,
1969): about 10.2158 clamped, about 4.9351 simply supported (ν = 0.3).
"""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np
import scipy.special as sp


def aci318_modulus_pa(fc_mpa: float) -> float:
    """Normal-weight concrete modulus from strength, ACI 318: Ec = 4700·sqrt(f'c) MPa; returns Pa."""
    return 4700.0 * math.sqrt(fc_mpa) * 1e6


@lru_cache(maxsize=None)
def clamped_lambda() -> float:
    """Root of J0(λ)I1(λ) + I0(λ)J1(λ) = 0 near 3.196: the clamped fundamental."""
    f = lambda x: sp.j0(x) * sp.i1(x) + sp.i0(x) * sp.j1(x)  # noqa: E731
    import scipy.optimize

    return float(scipy.optimize.brentq(f, 2.5, 3.8, xtol=1e-14))


@lru_cache(maxsize=None)
def simply_supported_lambda(poisson: float) -> float:
    """Root of J1/J0 + I1/I0 = 2λ/(1−ν): the simply supported fundamental."""
    f = lambda x: sp.j1(x) / sp.j0(x) + sp.i1(x) / sp.i0(x) - 2 * x / (1 - poisson)  # noqa: E731
    import scipy.optimize

    return float(scipy.optimize.brentq(f, 1.5, 2.39, xtol=1e-14))


def rigidity(modulus_pa: float, thickness_m: float, poisson: float) -> float:
    """Flexural rigidity D = E·h³/(12(1−ν²)), N·m."""
    return modulus_pa * thickness_m**3 / (12.0 * (1.0 - poisson**2))


def plate_frequency(radius_m: float, thickness_m: float, modulus_pa: float, density: float, poisson: float,
                    lam2: float) -> float:
    """Fundamental frequency (Hz) of a circular plate with frequency parameter ``lam2`` = λ²."""
    d = rigidity(modulus_pa, thickness_m, poisson)
    return lam2 / (2.0 * math.pi * radius_m**2) * math.sqrt(d / (density * thickness_m))


def plate_thickness(frequency_hz: float, radius_m: float, modulus_pa: float, density: float, poisson: float,
                    lam2: float) -> float:
    """Thickness (m) whose fundamental is ``frequency_hz``: f is proportional to h, so the inverse is closed-form."""
    per_metre = plate_frequency(radius_m, 1.0, modulus_pa, density, poisson, lam2)
    return frequency_hz / per_metre


def clamped_mode_shape(rho: np.ndarray) -> np.ndarray:
    """Normalised deflection of the clamped fundamental at r/a = ``rho`` (1 at the centre, 0 at and past the edge)."""
    lam = clamped_lambda()
    rho = np.clip(np.asarray(rho, dtype=np.float64), 0.0, 1.0)
    ratio = sp.j0(lam) / sp.i0(lam)
    w = sp.j0(lam * rho) - ratio * sp.i0(lam * rho)
    return w / (1.0 - ratio)
