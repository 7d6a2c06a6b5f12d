"""Where the laser beam meets the surface, and at what angle of incidence.

A vibrometer measures velocity along its beam.  Concrete over a delamination
moves along the surface normal, so a beam at incidence θ sees v·cos θ and the
energy E·cos²θ; dividing by cos²θ restores the normal energy.  Far off the
boresight this matters: at 30° the raw energy reads 1.25 dB low.
"""

from __future__ import annotations

import numpy as np


def cos_incidence_from_head(xy: np.ndarray, head_xy: tuple[float, float], standoff_m: float) -> np.ndarray:
    """cos θ for surface points ``xy`` (m) seen from a head at ``standoff_m`` above ``head_xy`` on the surface."""
    r = np.hypot(xy[..., 0] - head_xy[0], xy[..., 1] - head_xy[1])
    return standoff_m / np.sqrt(standoff_m**2 + r**2)


def normal_energy(energy: np.ndarray, cos_incidence: np.ndarray) -> np.ndarray:
    """Energy along the surface normal from energy measured along the beam: E / cos²θ."""
    return np.asarray(energy) / np.asarray(cos_incidence) ** 2
