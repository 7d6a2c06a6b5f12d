"""Reference choices and VER in dB."""

from __future__ import annotations

import numpy as np
import pytest

from overlay.energy import reference_energy, ver_db
from overlay.errors import SignalError


def test_db_values() -> None:
    # dB: 10·log10(2) = 3.0103, ratio 4 → 6.0206 (docs/references.md, Spectra)
    np.testing.assert_allclose(ver_db(np.array([2.0, 4.0, 1.0]), 1.0), [3.0103, 6.0206, 0.0], atol=1e-4)


def _map_with_dropout() -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(2)
    e = rng.uniform(0.9, 1.1, 200)  # healthy population around 1.0
    e[17] = 0.0  # a dropout marked valid by mistake
    e[18] = 1e-4  # a shadowed point
    return e, np.ones(200, dtype=bool)


def test_minimum_is_pulled_by_a_dropout_percentile_is_not() -> None:
    e, valid = _map_with_dropout()
    with pytest.raises(SignalError, match="reference energy is 0"):
        reference_energy(e, valid, "minimum")
    e[17] = 1e-6
    mn = reference_energy(e, valid, "minimum")
    pc = reference_energy(e, valid, "percentile", 10.0)
    assert mn.energy == pytest.approx(1e-6)
    assert 0.9 <= pc.energy <= 1.0
    # healthy points read ~60 dB against the minimum, ~0.2 dB against the percentile
    assert np.median(ver_db(e, mn.energy)) > 55
    assert abs(np.median(ver_db(e, pc.energy))) < 0.5


def test_invalid_points_are_not_used() -> None:
    e, valid = _map_with_dropout()
    valid[[17, 18]] = False
    assert reference_energy(e, valid, "minimum").energy >= 0.9


def test_no_valid_point_is_an_error() -> None:
    with pytest.raises(SignalError, match="no valid point"):
        reference_energy(np.ones(5), np.zeros(5, dtype=bool))


def test_unknown_method_names_choices() -> None:
    with pytest.raises(SignalError, match="choose from auto, percentile, trend, minimum"):
        reference_energy(np.ones(5), np.ones(5, dtype=bool), "mean")


def test_median_and_region_references() -> None:
    e, valid = _map_with_dropout()
    e[17] = 1e-6
    assert reference_energy(e, valid, "median").energy == pytest.approx(np.median(e), rel=1e-12)
    region = np.zeros(200, dtype=bool)
    region[100:120] = True
    ref = reference_energy(e, valid, "region", region=region)
    assert ref.energy == pytest.approx(np.median(e[100:120])) and ref.n_points == 20
    with pytest.raises(SignalError, match="healthy region holds 2 valid point"):
        reference_energy(e, valid, "region", region=np.arange(200) < 2)
    with pytest.raises(SignalError, match="needs a healthy_region"):
        reference_energy(e, valid, "region")
