"""Reference choices and VER in dB."""

from __future__ import annotations

import numpy as np
import pytest

from overlay.errors import SignalError
from overlay.signal import energy as energy_module
from overlay.signal.energy import reference_energy, ver_db
from overlay.signal.field import fit_field


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


# --- every reference choice on numbers (numpy as the reference library) ------------------------------

def _field(span_db: float, seed: int = 3) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Sound concrete under a plane field of ``span_db`` over a 2 m × 1.6 m scan, 0.3 dB scatter."""
    rng = np.random.default_rng(seed)
    rr, cc = np.mgrid[0:41, 0:51]
    xy = np.column_stack([cc.ravel(), rr.ravel()]) * 0.04
    field_db = span_db * (xy[:, 0] / 2.0)  # rises by span_db from left to right
    energy = 1e-8 * 10 ** ((field_db + rng.normal(0, 0.3, len(xy))) / 10)
    return xy, energy, field_db


def test_auto_keeps_the_percentile_on_a_uniform_field() -> None:
    xy, e, _ = _field(0.0)
    valid = np.ones(len(e), bool)
    valid[5] = False
    e[5] = 1e-3  # an invalid point: not part of any statistic
    ref = reference_energy(e, valid, "auto", 10.0, xy_m=xy)
    assert ref.method == "percentile" and ref.auto and ref.level_db is None
    assert ref.energy == pytest.approx(np.percentile(e[valid], 10.0), rel=1e-12)
    assert ref.n_points == int(valid.sum()) and ref.field_span_db < 1.0
    assert "within the 1 dB a scan-wide reference stands" in ref.describe()
    assert f"{valid.sum()} valid points" in ref.describe()


def test_auto_measures_against_the_local_field_when_it_varies() -> None:
    xy, e, field_db = _field(4.0)
    valid = np.ones(len(e), bool)
    ref = reference_energy(e, valid, "auto", 10.0, xy_m=xy)
    assert ref.method == "trend" and ref.auto and ref.percentile == 10.0 and ref.n_points == len(e)
    assert ref.field_span_db == pytest.approx(4.0, abs=0.3)
    # the reference follows the field: against it the sound points read about 0 dB everywhere, the
    # left and the right half alike (a scan-wide reference would put them 4 dB apart)
    v = ver_db(e, ref.at_points())
    left, right = v[xy[:, 0] < 0.5], v[xy[:, 0] > 1.5]
    assert abs(np.median(left) - np.median(right)) < 0.3 and abs(np.percentile(v, 10.0)) < 0.05
    assert ref.energy == pytest.approx(float(10 ** (np.median(ref.level_db) / 10)), rel=1e-12)
    assert "chosen automatically: the field spans more than 1 dB" in ref.describe()
    trend = reference_energy(e, valid, "trend", 10.0, xy_m=xy)
    assert trend.method == "trend" and not trend.auto
    np.testing.assert_allclose(trend.level_db, ref.level_db)
    assert "chosen automatically" not in trend.describe()


def test_trend_needs_coordinates() -> None:
    with pytest.raises(SignalError, match="needs at least 30 valid points with coordinates"):
        reference_energy(np.ones(50), np.ones(50, bool), "trend")


def test_region_counts_only_its_valid_points() -> None:
    e = np.arange(1.0, 11.0)
    valid = np.ones(10, bool)
    valid[0] = False  # inside the region but invalid
    region = np.arange(10) < 4  # points 0..3
    ref = reference_energy(e, valid, "region", region=region)
    assert ref.energy == pytest.approx(np.median(e[1:4])) and ref.n_points == 3  # exactly the minimum count
    assert "median of the healthy region" in ref.describe()


def test_percentile_bounds_and_a_fractional_percentile() -> None:
    e = np.linspace(1.0, 2.0, 101)
    ok = np.ones(101, bool)
    assert reference_energy(e, ok, "percentile", 0.5).energy == pytest.approx(np.percentile(e, 0.5), rel=1e-12)
    assert reference_energy(e, ok, "percentile", 0.0).energy == pytest.approx(1.0)
    assert reference_energy(e, ok, "percentile", 100.0).energy == pytest.approx(2.0)
    for bad in (-0.1, 100.1):
        with pytest.raises(SignalError, match="must lie in 0..100"):
            reference_energy(e, ok, "percentile", bad)
    assert reference_energy(e, ok, "minimum").describe().startswith("minimum of 101 valid points")


def test_ver_of_zero_and_missing_energy() -> None:
    out = ver_db(np.array([0.0, np.nan, 10.0]), 10.0)
    assert out[0] == -np.inf and np.isnan(out[1]) and out[2] == 0.0
    np.testing.assert_allclose(ver_db(np.array([2.0, 8.0]), np.array([1.0, 2.0])), [3.0103, 6.0206], atol=1e-4)


# --- what the mutation run found untested (benchmarks/mutation-report.md) ----------------------------

def test_each_reference_describes_itself_in_full() -> None:
    # the sentence goes into every report as the run's provenance: checked word for word
    e = np.arange(1.0, 11.0)
    ok = np.ones(10, bool)
    assert reference_energy(e, ok, "minimum").describe() == "minimum of 10 valid points: 1 (m/s)^2"
    assert reference_energy(e, ok, "median").describe() == "median of 10 valid points: 5.5 (m/s)^2"
    assert (reference_energy(e, ok, "region", region=np.arange(10) < 5).describe()
            == "median of the healthy region of 5 valid points: 3 (m/s)^2")
    assert reference_energy(e, ok, "percentile", 50.0).describe() == "50th percentile of 10 valid points: 5.5 (m/s)^2"
    assert reference_energy(e, ok, "minimum").percentile is None  # only a percentile carries one
    xy, flat, _ = _field(0.0)
    auto = reference_energy(flat, np.ones(len(flat), bool), "auto", 10.0, xy_m=xy)
    assert auto.describe() == (f"10th percentile of {len(flat)} valid points: {auto.energy:.4g} (m/s)^2; sound field "
                               f"spans {auto.field_span_db:.1f} dB (scatter {auto.field_scatter_db:.1f} dB), within "
                               "the 1 dB a scan-wide reference stands")
    xy, varied, _ = _field(4.0)
    trend = reference_energy(varied, np.ones(len(varied), bool), "trend", 10.0, xy_m=xy)
    assert trend.describe() == (f"local sound-concrete field (a robust quadratic fit), 10th percentile of {len(varied)} "
                                f"valid points against it, median {trend.energy:.4g} (m/s)^2; sound field spans "
                                f"{trend.field_span_db:.1f} dB (scatter {trend.field_scatter_db:.1f} dB)")


def test_auto_falling_back_keeps_the_asked_percentile_and_the_fitted_field() -> None:
    xy, e, _ = _field(0.0)
    ok = np.ones(len(e), bool)
    fit = fit_field(xy, e, ok)
    ref = reference_energy(e, ok, "auto", 25.0, xy_m=xy)
    assert ref.method == "percentile" and ref.percentile == 25.0
    assert ref.energy == pytest.approx(np.percentile(e, 25.0), rel=1e-12)  # numpy as the reference
    assert ref.field_span_db == fit.span_db and ref.field_scatter_db == fit.scatter_db


def test_a_field_spanning_exactly_the_threshold_keeps_the_scan_wide_reference(monkeypatch: pytest.MonkeyPatch) -> None:
    # "more than AUTO_SPAN_DB" is strict: set the threshold to this field's own fitted span
    xy, e, _ = _field(4.0)
    ok = np.ones(len(e), bool)
    monkeypatch.setattr(energy_module, "AUTO_SPAN_DB", fit_field(xy, e, ok).span_db)
    assert reference_energy(e, ok, "auto", 10.0, xy_m=xy).method == "percentile"


def test_trend_leaves_out_invalid_and_zero_energy_points() -> None:
    # residuals against the fitted field, numpy's percentile as the reference; an invalid point of high
    # energy and a valid point of zero energy (log10(0) = -inf) must both stay out of the statistics
    xy, e, _ = _field(4.0)
    ok = np.ones(len(e), bool)
    e[7], ok[7] = 1e-3, False
    e[9] = 0.0
    ref = reference_energy(e, ok, "trend", 10.0, xy_m=xy)
    fit = fit_field(xy, e, ok)
    use = ok & (e > 0)
    expect = fit.level_db + np.percentile(10 * np.log10(e[use]) - fit.level_db[use], 10.0)
    assert ref.n_points == len(e) - 2
    np.testing.assert_allclose(ref.level_db[use], expect[use], rtol=0, atol=1e-12)
    assert ref.energy == pytest.approx(10 ** (np.median(expect[use]) / 10), rel=1e-12)


def test_a_reference_error_names_its_scan() -> None:
    # the one-line error reads "file: field: problem" (errors.py); the scan's file must be in it, on the
    # trend's path and on the scan-wide fallback of "auto" alike
    xy, e, _ = _field(0.0)
    with pytest.raises(SignalError, match=r"^scan-7\.csv: reference: .*needs at least 30") as caught:
        reference_energy(e[:20], np.ones(20, bool), "trend", xy_m=xy[:20], source="scan-7.csv")
    assert caught.value.source == "scan-7.csv"
    with pytest.raises(SignalError, match=r"^scan-7\.csv: reference: no valid point"):
        reference_energy(e, np.zeros(len(e), bool), "auto", xy_m=xy, source="scan-7.csv")
