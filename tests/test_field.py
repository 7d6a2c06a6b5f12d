"""The sound field under a scan's energies, fitted robustly (a known plane and quadratic field)."""

from __future__ import annotations

import numpy as np
import pytest

from scipy.stats import median_abs_deviation

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




def _grid() -> np.ndarray:
    rr, cc = np.mgrid[0:31, 0:41]
    return np.column_stack([cc.ravel(), rr.ravel()]) * 0.05  # 2.0 m × 1.5 m


@pytest.mark.parametrize("slope", [(2.0, -1.0), (0.0, 0.0)], ids=["plane", "uniform"])
def test_a_noise_free_field_under_defects_is_fitted_exactly(slope: tuple[float, float]) -> None:
    # a field with no noise and a block of defects 3 dB above it: the sound points' residuals are rounding
    # only, so the robust scale sits on its floor and only the sound points carry weight — the fit is the
    # field itself and the sound points' scatter is zero (a uniform field once lost every point: level 0 dB)
    xy = _grid()
    truth_db = -80.0 + slope[0] * xy[:, 0] + slope[1] * xy[:, 1]
    defect = (np.abs(xy[:, 0] - 1.4) < 0.3) & (np.abs(xy[:, 1] - 0.7) < 0.3)
    energy = 10 ** ((truth_db + 3.0 * defect) / 10)
    fit = fit_field(xy, energy, np.ones(len(xy), bool))
    assert fit is not None and 0.05 < defect.mean() < 0.2
    np.testing.assert_allclose(fit.level_db, truth_db, rtol=0, atol=1e-9)
    assert fit.span_db == pytest.approx(np.ptp(truth_db), abs=1e-9) and fit.scatter_db < 1e-9


def _defects_over_a_noisy_field() -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(11)
    xy = _grid()
    truth_db = -80.0 + 2.0 * (xy[:, 0] - 1.0) ** 2 - 1.5 * xy[:, 1]
    lift = np.where((np.abs(xy[:, 0] - 1.5) < 0.25) & (np.abs(xy[:, 1] - 0.8) < 0.3), 12.0, 0.0)
    lift[rng.choice(len(xy), 40, replace=False)] += 6.0  # residuals between c·s and 2·c·s (s ≈ 0.9 dB)
    # a band energy sums ~25 bins of noisy power: gamma-distributed (shape 25), skewed in dB (about 0.9 dB)
    return xy, 10 ** ((truth_db + lift) / 10) * rng.gamma(25.0, 1 / 25.0, len(xy))


def test_the_fit_solves_the_bisquare_estimating_equations() -> None:
    # An M-estimate with Tukey's bisquare solves Σ w(rᵢ/(c·s))·rᵢ·xᵢ = 0 over the design's columns, with
    # w(u) = (1 − u²)² for |u| < 1 else 0, c = 4.685 and s = 1.4826·MAD of the kept residuals (Huber,
    # Robust Statistics, 1981, ch. 7; Holland & Welsch 1977 — from memory).  Checked on the returned fit
    # with an independent basis (raw x, y powers: the same quadratic space), to the fit's 1e-6 stopping rule;
    # the noise is skewed, so the inliers' median residual is not zero and the scale's centring shows.
    xy, energy = _defects_over_a_noisy_field()
    fit = fit_field(xy, energy, np.ones(len(xy), bool))
    r = 10 * np.log10(energy) - fit.level_db
    kept = np.ones(len(r), bool)
    for _ in range(20):  # the scale's own fixed point: s from the kept residuals, kept from s
        s = median_abs_deviation(r[kept], scale="normal")  # scipy: MAD × 1.4826
        now = np.abs(r) < 4.685 * s
        if (now == kept).all():
            break
        kept = now
    u = r / (4.685 * s)
    w = np.where(np.abs(u) < 1, (1 - u * u) ** 2, 0.0)
    x, y = xy.T
    design = np.column_stack([np.ones_like(x), x, y, x * x, x * y, y * y])
    balance = design.T @ (w * r)
    assert np.abs(balance).max() < 1e-4 * (np.abs(design).T @ np.abs(w * r)).max()
    assert (w == 0).sum() > 120  # the defects are out of the fit ...
    assert fit.scatter_db == pytest.approx(median_abs_deviation(r[w > 0], scale="normal"), rel=1e-5)  # ... and the scatter


def test_invalid_and_empty_points_stay_out_of_the_fit() -> None:
    xy, energy = _defects_over_a_noisy_field()
    ok = np.ones(len(xy), bool)
    ok[::7] = False
    energy[::7] *= 1e3  # strong but invalid: must change nothing
    energy[3] = 0.0  # valid but empty: log10(0) would poison the fit
    fit = fit_field(xy, energy, ok)
    clean = fit_field(xy[ok & (energy > 0)], energy[ok & (energy > 0)], np.ones(int((ok & (energy > 0)).sum()), bool))
    assert np.isnan(fit.level_db[~ok]).all() and np.isnan(fit.level_db[3])
    np.testing.assert_allclose(fit.level_db[ok & (energy > 0)], clean.level_db, rtol=0, atol=1e-12)
    assert fit.scatter_db == clean.scatter_db


def test_thirty_valid_points_are_enough_twenty_nine_are_not() -> None:
    xy = _grid()[:30]
    energy = 10 ** ((-80.0 + xy[:, 0]) / 10)
    assert fit_field(xy, energy, np.ones(30, bool)) is not None
    assert fit_field(xy[:29], energy[:29], np.ones(29, bool)) is None


@pytest.mark.parametrize("origin", [(0.0, 0.0), (-1.0, -0.75), (512_300.0, 5_401_700.0)],
                         ids=["corner", "centred", "map-grid"])
def test_the_fit_does_not_depend_on_where_the_origin_lies(origin: tuple[float, float]) -> None:
    # a scan may be given in its own frame (origin at a corner or at the head's axis) or in projected map
    # coordinates (hundreds of km from the origin): the fitted field is the same function of position
    xy, energy = _defects_over_a_noisy_field()
    ok = np.ones(len(xy), bool)
    here = fit_field(xy, energy, ok)
    moved = fit_field(xy + np.array(origin), energy, ok)
    np.testing.assert_allclose(moved.level_db, here.level_db, rtol=0, atol=1e-6)
