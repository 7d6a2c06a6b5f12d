"""Spectra stage against scipy.signal (reference library), Parseval and window theory."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.fft
import scipy.signal
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from overlay.signal.gate import Gate
from overlay.signal.spectra import (
    given_spectra,
    hann,
    parabolic_peak,
    records_spectra,
)

FS = 51200.0


def test_white_noise_level_matches_welch() -> None:
    # scipy.signal.welch (Hann, 50 % overlap) as reference: one-sided density of white noise is 2σ²/fs
    sigma = 0.5
    x = np.random.default_rng(5).normal(0, sigma, 2**16)
    f_welch, p_welch = scipy.signal.welch(x, FS, nperseg=1024)
    sp = records_spectra(x.reshape(64, 1024).astype(np.float32), _gate(1024), (400.0, 8000.0), keep_psd=True)
    in_band = (f_welch >= 400.0) & (f_welch <= 8000.0)
    assert np.mean(sp.band_psd) == pytest.approx(np.mean(p_welch[in_band]), rel=0.02)
    assert np.mean(sp.band_psd) == pytest.approx(2 * sigma**2 / FS, rel=0.02)


def _gate(n: int) -> Gate:
    return Gate(0, n, FS, "test")


def test_parseval_sine_in_band() -> None:
    # Parseval: a sine of amplitude A carries A²/2 mean square; A = 2 → 2.000 (1e-3) (docs/references.md, Spectra)
    n = 4096
    t = np.arange(n) / FS
    x = (2.0 * np.sin(2 * np.pi * 2000.0 * t)).astype(np.float32)[None, :]
    sp = records_spectra(x, _gate(n), (400.0, 8000.0))
    assert sp.energy[0] == pytest.approx(2.0, rel=1e-3)


def test_parseval_white_noise_full_band() -> None:
    # white noise σ = 0.5 integrates to σ² = 0.25 over 0..fs/2 (2 % with a fixed seed) (docs/references.md)
    x = np.random.default_rng(6).normal(0, 0.5, (64, 4096)).astype(np.float32)
    sp = records_spectra(x, _gate(4096), (0.0, FS / 2))
    assert np.mean(sp.energy) == pytest.approx(0.25, rel=0.02)


def test_hann_equivalent_noise_bandwidth() -> None:
    # window theory: ENBW = N·Σw²/(Σw)² = 1.500 bins for Hann (Harris, Proc. IEEE 66(1), 1978, Table 1)
    w = hann(4096)
    assert len(w) * np.sum(w**2) / np.sum(w) ** 2 == pytest.approx(1.5, abs=1e-3)


def test_velocity_unit_scales_energy_by_square() -> None:
    # 1 mm/s = 1e-3 m/s → energy by 1e-6 (hand-worked)
    x = np.random.default_rng(7).normal(0, 1.0, (3, 2048)).astype(np.float32)
    a = records_spectra(x, _gate(2048), (400.0, 8000.0), velocity_scale=1.0)
    b = records_spectra(x, _gate(2048), (400.0, 8000.0), velocity_scale=1e-3)
    np.testing.assert_allclose(b.energy, a.energy * 1e-6, rtol=1e-6)


def test_peak_of_sine_between_bins() -> None:
    # a sine of 2013.7 Hz lies between bins of 12.5 Hz spacing; the log-parabola finds it within 0.1 bin
    n = 4096
    t = np.arange(n) / FS
    x = np.sin(2 * np.pi * 2013.7 * t).astype(np.float32)[None, :]
    sp = records_spectra(x, _gate(n), (400.0, 8000.0))
    assert abs(sp.peak_hz[0] - 2013.7) < 0.1 * FS / n


def test_parabolic_peak_on_exact_parabola() -> None:
    f = np.array([100.0, 110.0, 120.0, 130.0, 140.0])
    logp = -((f - 123.4) ** 2) / 50.0
    assert parabolic_peak(f, np.exp(logp)[None, :])[0] == pytest.approx(123.4, abs=1e-9)


def test_shots_are_averaged_as_power() -> None:
    # two shots of opposite sign cancel as waveforms but not as power
    n = 2048
    t = np.arange(n) / FS
    s = np.sin(2 * np.pi * 1500.0 * t)
    x = np.stack([s, -s])[None, :, :].astype(np.float32)
    sp = records_spectra(x, _gate(n), (400.0, 8000.0))
    assert sp.energy[0] == pytest.approx(0.5, rel=2e-3)


def test_nan_anywhere_makes_point_invalid_others_unchanged() -> None:
    x = np.random.default_rng(8).normal(0, 1.0, (4, 2048)).astype(np.float32)
    ref = records_spectra(x, Gate(100, 1100, FS, "t"), (400.0, 8000.0))
    x[2, 1500] = np.nan  # outside the gate, still a bad record
    x[3, 200] = np.inf
    sp = records_spectra(x, Gate(100, 1100, FS, "t"), (400.0, 8000.0))
    assert sp.finite.tolist() == [True, True, False, False]
    assert np.isnan(sp.energy[2:]).all()
    np.testing.assert_array_equal(sp.energy[:2], ref.energy[:2])


def test_chunked_equals_unchunked() -> None:
    x = np.random.default_rng(9).normal(0, 1.0, (37, 1500)).astype(np.float32)
    g = Gate(100, 1400, FS, "t")
    whole = records_spectra(x, g, (400.0, 8000.0), chunk=1000)
    parts = records_spectra(x, g, (400.0, 8000.0), chunk=5)
    np.testing.assert_allclose(parts.energy, whole.energy, rtol=1e-6)
    np.testing.assert_array_equal(parts.peak_hz, whole.peak_hz)
    assert whole.band_psd is None  # the band rows are kept only when asked (they cost memory)


def test_given_spectra_integrates_band_and_finds_peak() -> None:
    # a flat PSD of 1e-6 (m/s)²/Hz over 400..8000 Hz integrates to 7.6e-3 (m/s)² (hand-worked)
    f = np.linspace(0, 10000, 1001)
    psd = np.full((2, len(f)), 1e-6)
    psd[1, 300] = 1e-3  # a peak at 3000 Hz
    sp = given_spectra(psd, f, (400.0, 8000.0))
    assert sp.energy[0] == pytest.approx(7.6e-3, rel=1e-9)
    assert sp.peak_hz[1] == pytest.approx(3000.0, abs=5.0)


@pytest.mark.parametrize("zeta", [0.01, 0.02, 0.05])
def test_peak_of_damped_resonance_within_0p1_percent(zeta: float) -> None:
    # a damped resonance x = e^(−ζω₀t)·sin(ω_d t) over a 2048-sample gate (40 ms at 51.2 kHz, 25 Hz bins):
    # the peak lies at the damped frequency f₀·sqrt(1 − ζ²); resonances at least 5 bins from the band edges
    n = 2048
    t = np.arange(n) / FS
    worst = 0.0
    for f0 in np.linspace(400.0 + 5 * FS / n, 8000.0 - 5 * FS / n, 25):
        fd = f0 * np.sqrt(1 - zeta**2)
        x = (np.exp(-zeta * 2 * np.pi * f0 * t) * np.sin(2 * np.pi * fd * t)).astype(np.float32)[None, :]
        sp = records_spectra(x, _gate(n), (400.0, 8000.0))
        worst = max(worst, abs(sp.peak_hz[0] - fd) / fd)
    assert worst < 1e-3


def test_threads_do_not_change_results() -> None:
    x = np.random.default_rng(10).normal(0, 1.0, (1500, 1024)).astype(np.float32)
    g = Gate(0, 1024, FS, "t")
    one = records_spectra(x, g, (400.0, 8000.0), chunk=100, threads=1)
    two = records_spectra(x, g, (400.0, 8000.0), chunk=100, threads=2)
    for a, b in ((one.energy, two.energy), (one.peak_hz, two.peak_hz), (one.snr_db, two.snr_db)):
        np.testing.assert_array_equal(a, b)


def test_memory_mapped_records_give_the_same_result(tmp_path) -> None:
    x = np.random.default_rng(11).normal(0, 1.0, (700, 1024)).astype(np.float32)
    np.save(tmp_path / "r.npy", x)
    mm = np.load(tmp_path / "r.npy", mmap_mode="r")
    g = Gate(100, 900, FS, "t")
    np.testing.assert_array_equal(records_spectra(mm, g, (400.0, 8000.0), chunk=64).energy,
                                  records_spectra(x, g, (400.0, 8000.0), chunk=64).energy)


def test_kept_band_psd_integrates_to_the_energy() -> None:
    x = np.random.default_rng(12).normal(0, 1.0, (5, 2048)).astype(np.float32)
    sp = records_spectra(x, _gate(2048), (400.0, 8000.0), keep_psd=True)
    assert sp.band_psd.shape == (5, len(sp.band_freqs))
    np.testing.assert_allclose(sp.band_psd.sum(axis=1) * FS / 2048, sp.energy, rtol=1e-5)


@pytest.mark.parametrize("n, band", [(1000, (400.0, 8000.0)), (777, (0.0, FS / 2)), (1024, (0.0, FS / 2))])
def test_stage_band_psd_equals_scipy_periodogram(n: int, band: tuple[float, float]) -> None:
    # reference library: scipy.signal.periodogram (Hann, density, constant detrend) on the band bins —
    # also at DC and Nyquist, where the frequency-domain window uses the spectrum's symmetry
    x = (np.random.default_rng(13).normal(0, 1.0, (6, n)) + 0.3).astype(np.float64)
    f_ref, p_ref = scipy.signal.periodogram(x, FS, window="hann", scaling="density")
    sp = records_spectra(x.astype(np.float32), _gate(n), band, keep_psd=True)
    sel = (f_ref >= band[0]) & (f_ref <= band[1])
    np.testing.assert_allclose(sp.band_freqs, f_ref[sel])
    np.testing.assert_allclose(sp.band_psd, p_ref[:, sel], rtol=2e-4, atol=1e-7 * p_ref.max())


def test_snr_of_sine_in_white_noise_worked_value() -> None:
    # Worked value from window theory and the periodogram's distribution:
    # a bin-centred sine of amplitude A under a Hann window (coherent gain 0.50, ENBW 1.50 bins —
    # Harris, Proc. IEEE 66(1), 1978, Table 1) peaks at the one-sided density A²·N/(3·fs);
    # white noise of variance σ² has the mean density 2σ²/fs and each periodogram ordinate is
    # exponentially distributed (χ² with 2 degrees of freedom; Bendat & Piersol, Random Data — from
    # memory), so the in-band median is ln 2 times the mean.  SNR = A²·N / (6·ln 2·σ²):
    # N = 4096, A = 1, σ = 1 → 984.9 → 29.93 dB.
    n, amp, sigma = 4096, 1.0, 1.0
    t = np.arange(n) / FS
    k = 200  # 2500 Hz, bin-centred at 12.5 Hz spacing, inside 400–8000 Hz
    rng = np.random.default_rng(21)
    x = (amp * np.sin(2 * np.pi * k * FS / n * t) + rng.normal(0, sigma, (64, n))).astype(np.float32)
    sp = records_spectra(x, _gate(n), (400.0, 8000.0))
    expected = 10 * np.log10(amp**2 * n / (6 * np.log(2) * sigma**2))
    assert expected == pytest.approx(29.93, abs=0.01)
    assert np.mean(sp.snr_db) == pytest.approx(expected, abs=0.3)


@pytest.mark.parametrize("n, band", [(1024, (0.0, FS / 2)), (777, (0.0, FS / 2)), (1000, (400.0, 8000.0))])
def test_shots_and_float64_records_match_scipy_periodogram(n: int, band: tuple[float, float]) -> None:
    # reference library: scipy.signal.periodogram per shot, shots averaged as power; float64 input
    # gives the float32 result; the window applied to the band bins holds at DC and Nyquist too
    x = np.random.default_rng(22).normal(0.2, 1.0, (3, 2, n))
    _, p_ref = scipy.signal.periodogram(x, FS, window="hann", scaling="density")
    f_ref = scipy.fft.rfftfreq(n, 1 / FS)
    sel = (f_ref >= band[0]) & (f_ref <= band[1])
    sp = records_spectra(x, _gate(n), band, keep_psd=True)
    np.testing.assert_allclose(sp.band_psd, p_ref.mean(axis=1)[:, sel], rtol=2e-4, atol=1e-7 * p_ref.max())
    sp32 = records_spectra(x.astype(np.float32), _gate(n), band, keep_psd=True)
    np.testing.assert_allclose(sp.band_psd, sp32.band_psd, rtol=1e-6)


@pytest.mark.parametrize("where", [0, 99, 100, 600, 1099, 1100, 2047])
def test_one_bad_sample_anywhere_is_caught(where: int) -> None:
    # the finiteness check is one sum over the whole record: a NaN or inf at the first, last, gate-edge
    # or mid-gate sample must each be caught (scan-bundle.md: NaN or inf in a point's data → invalid)
    for bad in (np.nan, np.inf, -np.inf):
        x = np.random.default_rng(23).normal(0, 1.0, (3, 2048)).astype(np.float32)
        x[1, where] = bad
        sp = records_spectra(x, Gate(100, 1100, FS, "t"), (400.0, 8000.0))
        assert sp.finite.tolist() == [True, False, True], (where, bad)


def test_progress_counts_every_point_once() -> None:
    # the progress callback gets each chunk's size once, whatever the threads
    x = np.random.default_rng(24).normal(0, 1.0, (1234, 512)).astype(np.float32)
    for threads in (1, 2):
        seen: list[int] = []
        records_spectra(x, _gate(512), (400.0, 8000.0), chunk=100, threads=threads, progress=seen.append)
        assert sum(seen) == 1234 and len(seen) == 13


@settings(max_examples=60, deadline=None)
@given(n=st.integers(8, 300), lo=st.floats(0.0, 1.0), width=st.floats(0.0, 1.0), offset=st.floats(-2.0, 2.0))
def test_band_psd_equals_scipy_periodogram_for_any_length_and_band(n: int, lo: float, width: float, offset: float) -> None:
    # reference library: scipy.signal.periodogram (Hann, density, constant detrend) — any gate length,
    # odd or even, any band from DC to Nyquist, records with a mean; the band bins of the stage agree
    nyq = FS / 2
    band = (lo * nyq, min(nyq, lo * nyq + width * nyq))
    f_ref = scipy.fft.rfftfreq(n, 1 / FS)
    sel = (f_ref >= band[0]) & (f_ref <= band[1])
    assume(sel.sum() >= 3)  # fewer bins are refused (next test)
    x = np.random.default_rng(n).normal(offset, 1.0, (2, n))
    _, p_ref = scipy.signal.periodogram(x, FS, window="hann", scaling="density")
    sp = records_spectra(x.astype(np.float32), _gate(n), band, keep_psd=True)
    np.testing.assert_allclose(sp.band_psd, p_ref[:, sel], rtol=1e-3, atol=1e-6 * p_ref.max())


def test_a_band_narrower_than_three_bins_is_refused() -> None:
    # a peak (a parabola through three bins) and a noise floor need three bins; 400-410 Hz at a
    # resolution of 100 Hz (512 samples at 51.2 kHz) holds one (the bin at 400 Hz) — a clear error
    from overlay.errors import SignalError

    x = np.random.default_rng(5).normal(0, 1.0, (4, 512)).astype(np.float32)
    with pytest.raises(SignalError, match="holds 1 frequency bin.*at least 3") as info:
        records_spectra(x, _gate(512), (400.0, 410.0))
    assert info.value.exit_code == 3


@pytest.mark.parametrize("width", [1, 2, 3, 4, 7, 8, 64, 65])
def test_noise_floor_median_equals_numpy_median_for_odd_and_even_widths(width: int) -> None:
    # the SNR's noise floor uses a partition-based median; numpy.median is the reference, ties included
    from overlay.signal.spectra import _median

    rng = np.random.default_rng(width)
    p = rng.exponential(1.0, (5, width))
    p[0] = np.round(p[0], 1)  # ties
    np.testing.assert_allclose(_median(p), np.median(p, axis=-1), rtol=0, atol=0)


def test_a_record_whose_power_overflows_float32_is_invalid_not_infinite() -> None:
    # IEEE 754 single precision: the largest finite float32 is (2 − 2⁻²³)·2¹²⁷ ≈ 3.4028235e38.  A record
    # of 1e19 m/s is finite as float32, but its power (~1e38 per bin and more in the band sum) is not:
    # that point must be marked invalid, never carry an inf energy into the reference
    assert np.finfo(np.float32).max == pytest.approx(3.4028235e38, rel=1e-7)
    rng = np.random.default_rng(3)
    x = rng.normal(0, 1e-3, (3, 512)).astype(np.float32)
    x[1] = rng.normal(0, 1e19, 512).astype(np.float32)
    assert np.isfinite(x).all()
    sp = records_spectra(x, _gate(512), (400.0, 8000.0))
    assert sp.finite.tolist() == [True, False, True]
    assert np.isnan(sp.energy[1]) and np.isfinite(sp.energy[[0, 2]]).all()
    x[1] = rng.normal(0, 1e12, 512).astype(np.float32)  # large but representable: a valid point
    assert records_spectra(x, _gate(512), (400.0, 8000.0)).finite.all()


def test_given_spectra_on_an_uneven_axis_with_bad_rows_chunks_and_kept_rows() -> None:
    # a PSD growing linearly with frequency on an uneven axis: the band energy is the trapezoid integral
    # (numpy.trapezoid as the reference; exact for a linear density), in (m/s)² after a mm/s → m/s scale;
    # rows with a NaN or a negative density are invalid and give NaN; chunks of 3 give what one chunk gives;
    # the kept band rows are the scaled densities (NaN where invalid)
    trapezoid = getattr(np, "trapezoid", None) or np.trapz
    f = np.array([0.0, 150.0, 400.0, 430.0, 700.0, 1250.0, 3000.0, 3100.0, 5200.0, 8000.0, 9000.0])
    band = (400.0, 8000.0)
    inside = (f >= 400.0) & (f <= 8000.0)
    rows = np.array([1e-3 * f, 2e-3 * f + 1.0, 1e-3 * f, 1e-3 * f, 5e-4 * f, 3e-3 * f + 2.0, 1e-3 * f])
    rows[2, 4] = np.nan
    rows[3, 6] = -1.0
    whole = given_spectra(rows, f, band, velocity_scale=1e-3, keep_psd=True)
    parts = given_spectra(rows, f, band, velocity_scale=1e-3, chunk=3, keep_psd=True)
    for sp in (whole, parts):
        good = [0, 1, 4, 5, 6]
        for k in good:
            expected = trapezoid(rows[k, inside] * 1e-6, f[inside])
            assert sp.energy[k] == pytest.approx(expected, rel=1e-12)
            assert sp.peak_hz[k] == pytest.approx(8000.0)  # a rising density peaks at the band's top bin
        assert np.isnan(sp.energy[[2, 3]]).all() and np.isnan(sp.peak_hz[[2, 3]]).all()
        assert np.isnan(sp.snr_db[[2, 3]]).all() and np.isfinite(sp.snr_db[good]).all()
        assert list(sp.finite) == [True, True, False, False, True, True, True]
        np.testing.assert_allclose(sp.band_psd[good], (rows[good][:, inside] * 1e-6).astype(np.float32), rtol=1e-6)
        assert np.isnan(sp.band_psd[[2, 3]]).all()
    assert given_spectra(rows, f, band).band_psd is None  # kept only when asked


def test_given_spectra_snr_and_the_smallest_band() -> None:
    # SNR: a flat density of 1 with one bin at 100: 10·log10(100 / 1) = 20 dB (the floor, the median of every
    # second bin, stays 1); the smallest band allowed, three bins, integrates as two trapezoids: 900
    f = np.arange(0.0, 1000.0, 10.0)
    p = np.ones((1, len(f)))
    p[0, 50] = 100.0
    assert given_spectra(p, f, (100.0, 900.0)).snr_db[0] == pytest.approx(20.0, abs=1e-9)
    # the floor is the median of every second band bin (docs/energy-ratio.md): densities alternating 1 and 4
    # from the band's first bin give a floor of 1 (every third bin would mix in the 4s)
    alt = np.where(np.arange(len(f)) % 2 == 0, 1.0, 4.0)[None, :]
    alt[0, 50] = 100.0
    assert given_spectra(alt, f, (100.0, 900.0)).snr_db[0] == pytest.approx(20.0, abs=1e-9)
    # a density of exactly zero somewhere is a valid row (only NaN, inf and negative values are not)
    zero = np.ones((1, len(f)))
    zero[0, 30] = 0.0
    sp = given_spectra(zero, f, (100.0, 900.0))
    assert sp.finite.dtype == bool and bool(sp.finite[0]) and np.isfinite(sp.energy[0])
    three = given_spectra(np.array([[1.0, 2.0, 4.0, 8.0, 16.0]]), np.array([0.0, 100.0, 200.0, 300.0, 400.0]),
                          (100.0, 300.0))
    assert three.energy[0] == pytest.approx(100.0 * (2.0 + 4.0) / 2 + 100.0 * (4.0 + 8.0) / 2, rel=1e-12)


@pytest.mark.parametrize("n", [1, 2, 3, 8, 4096])
def test_hann_is_scipy_periodic_hann(n: int) -> None:
    # the periodic (DFT-even) Hann window, scipy.signal.windows.hann(n, sym=False) as the reference; n = 1 is 1
    from scipy.signal import windows

    np.testing.assert_allclose(hann(n), windows.hann(n, sym=False), rtol=0, atol=1e-15)


def test_a_frequency_axis_of_one_bin_is_refused_as_a_band_error() -> None:
    from overlay.errors import SignalError
    from overlay.signal.spectra import band_slice

    with pytest.raises(SignalError, match="holds 1 frequency bin"):
        band_slice(np.array([500.0]), (400.0, 800.0))
