"""Incidence correction: geometry of the beam against hand-worked values."""

from __future__ import annotations

import numpy as np
import pytest

from overlay.signal.incidence import (
    cos_incidence_from_head,
    normal_energy,
)


def test_head_standoff() -> None:
    # standoff 5 m, point 5 m aside: 45°, cos = 0.7071; under the head: 1
    c = cos_incidence_from_head(np.array([[6.0, 2.0], [1.0, 2.0]]), (1.0, 2.0), 5.0)
    np.testing.assert_allclose(c, [np.sqrt(0.5), 1.0], atol=1e-12)


def test_energy_to_normal() -> None:
    # measured energy 0.75 at 30°: normal energy 0.75 / cos²30° = 0.75 / 0.75 = 1.0 (hand-worked)
    assert normal_energy(np.array([0.75]), np.array([np.cos(np.radians(30.0))]))[0] == pytest.approx(1.0)
