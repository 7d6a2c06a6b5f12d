"""Incidence correction: geometry of the beam against hand-worked values."""

from __future__ import annotations

import numpy as np
import pytest

from overlay.signal.incidence import (
    cos_incidence_from_angles,
    cos_incidence_from_head,
    normal_energy,
)


def test_angles_on_boresight_and_off() -> None:
    # (0, 0) is normal incidence; (30°, 0) gives cos 30° = 0.8660; (30°, 30°): 1/sqrt(1 + 2·tan²30°) = 0.7746
    c = cos_incidence_from_angles(np.array([[0.0, 0.0], [30.0, 0.0], [30.0, 30.0]]))
    np.testing.assert_allclose(c, [1.0, 0.866025, 0.774597], atol=1e-6)


def test_head_standoff() -> None:
    # standoff 5 m, point 5 m aside: 45°, cos = 0.7071; under the head: 1
    c = cos_incidence_from_head(np.array([[6.0, 2.0], [1.0, 2.0]]), (1.0, 2.0), 5.0)
    np.testing.assert_allclose(c, [np.sqrt(0.5), 1.0], atol=1e-12)


def test_energy_to_normal() -> None:
    # measured energy 0.75 at 30°: normal energy 0.75 / cos²30° = 0.75 / 0.75 = 1.0 (hand-worked)
    assert normal_energy(np.array([0.75]), np.array([np.cos(np.radians(30.0))]))[0] == pytest.approx(1.0)
