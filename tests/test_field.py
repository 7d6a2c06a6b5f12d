"""The sound field under a scan's energies, fitted robustly (a known plane and quadratic field)."""

from __future__ import annotations

import numpy as np
import pytest

from overlay.signal.field import fit_field


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


