"""Per-point spectra: PSD, band energy, peak frequency and in-band SNR.

The PSD is the Hann-windowed one-sided periodogram in density scaling, the
same estimate as ``scipy.signal.periodogram(x, fs, window="hann")``; its
integral over a band is the mean-square velocity in that band (Parseval).
Records are read from the memory map a chunk of points at a time, in float32,
with one batched FFT per chunk and no per-point Python loop.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from typing import Callable

import numpy as np
import scipy.fft
import scipy.signal

from .gate import Gate

DEFAULT_CHUNK = 2048


@dataclass
class PointSpectra:
    """What the spectra stage gives per point (arrays of length n_points)."""

    energy: np.ndarray  # mean-square velocity in the band, (m/s)^2
    peak_hz: np.ndarray
    snr_db: np.ndarray
    finite: np.ndarray  # False where the record held NaN or inf
    band_freqs: np.ndarray | None = None  # Hz, the bins inside the band
    band_psd: np.ndarray | None = None  # (n_points, n_band) (m/s)^2/Hz, when kept


def hann(n: int) -> np.ndarray:
    """The periodic Hann window scipy uses for spectral estimates."""
    return scipy.signal.get_window("hann", n).astype(np.float64)


def periodogram(x: np.ndarray, fs: float) -> tuple[np.ndarray, np.ndarray]:
    """One-sided Hann periodogram density of the last axis, mean removed.

    Same convention as ``scipy.signal.periodogram(x, fs, window="hann")``.
    """
    x = np.asarray(x)
    n = x.shape[-1]
    w = hann(n).astype(x.dtype if x.dtype == np.float32 else np.float64)
    spec = _power(x, w)
    spec *= _density_scale(w, fs, n)
    return scipy.fft.rfftfreq(n, 1.0 / fs), spec


def _power(x: np.ndarray, w: np.ndarray) -> np.ndarray:
    """|FFT|^2 of the windowed, mean-removed last axis, one-sided doubling applied."""
    n = x.shape[-1]
    xw = (x - x.mean(axis=-1, keepdims=True)) * w
    spec = scipy.fft.rfft(xw, axis=-1, workers=os.cpu_count() or 1)
    p = spec.real**2 + spec.imag**2
    p[..., 1 : (n + 1) // 2] *= 2.0  # DC and (for even n) Nyquist are not doubled
    return p


def _density_scale(w: np.ndarray, fs: float, n: int) -> float:
    return 1.0 / (fs * float(np.sum(w.astype(np.float64) ** 2)))


def band_slice(freqs: np.ndarray, band_hz: tuple[float, float]) -> slice:
    """Bins whose centre lies inside the closed band."""
    lo = int(np.searchsorted(freqs, band_hz[0], side="left"))
    hi = int(np.searchsorted(freqs, band_hz[1], side="right"))
    return slice(lo, hi)


def parabolic_peak(freqs: np.ndarray, power: np.ndarray) -> np.ndarray:
    """Sub-bin peak frequency of each row: parabola through the log power of the top bin and its neighbours.

    Log power makes the Hann main lobe close to a parabola.  A peak on the
    first or last bin is returned unrefined.  Works for uneven bin spacing.
    """
    power = np.asarray(power, dtype=np.float64)
    k = np.argmax(power, axis=-1)
    m = power.shape[-1]
    f = freqs[k].astype(np.float64)
    inner = (k > 0) & (k < m - 1)
    if m < 3 or not inner.any():
        return f
    rows = np.nonzero(inner)[0]
    kk = k[rows]
    with np.errstate(divide="ignore"):
        y = np.log(np.maximum(power[rows[:, None], np.stack([kk - 1, kk, kk + 1], axis=1)], 1e-300))
    x0, x1, x2 = freqs[kk - 1], freqs[kk], freqs[kk + 1]
    d1 = (y[:, 1] - y[:, 0]) / (x1 - x0)
    d2 = (y[:, 2] - y[:, 1]) / (x2 - x1)
    curv = (d2 - d1) / (x2 - x0)  # half the second derivative
    ok = curv < 0
    vertex = 0.5 * (x0 + x1) - d1 / (2.0 * np.where(ok, curv, -1.0))
    f[rows] = np.where(ok, np.clip(vertex, x0, x2), x1)
    return f


def band_metrics(
    freqs: np.ndarray, psd_band: np.ndarray, df: float | np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Band energy (sum of PSD·df), peak frequency and SNR (peak over median, dB) per row."""
    energy = np.sum(psd_band * df, axis=-1, dtype=np.float64)
    peak = parabolic_peak(freqs, psd_band)
    with np.errstate(divide="ignore", invalid="ignore"):
        snr = 10.0 * np.log10(np.max(psd_band, axis=-1) / np.median(psd_band, axis=-1))
    return energy, peak, snr


def records_spectra(
    records: np.ndarray,
    gate: Gate,
    band_hz: tuple[float, float],
    velocity_scale: float = 1.0,
    *,
    chunk: int = DEFAULT_CHUNK,
    keep_psd: bool = False,
    progress: Callable[[int], None] | None = None,
) -> PointSpectra:
    """Spectra of gated records ``(points, samples)`` or ``(points, shots, samples)``.

    Shots are averaged as power.  A point whose gated data holds NaN or inf
    gets ``finite=False`` and NaN results; it does not stop the others.
    """
    n_points = records.shape[0]
    n = gate.n
    fs = gate.sample_rate_hz
    freqs = scipy.fft.rfftfreq(n, 1.0 / fs)
    sl = band_slice(freqs, band_hz)
    bfreqs = freqs[sl]
    w = hann(n).astype(np.float32)
    scale = _density_scale(w, fs, n) * velocity_scale**2
    df = fs / n
    energy = np.full(n_points, np.nan)
    peak = np.full(n_points, np.nan)
    snr = np.full(n_points, np.nan)
    finite = np.ones(n_points, dtype=bool)
    kept = np.full((n_points, len(bfreqs)), np.nan, dtype=np.float32) if keep_psd else None
    for i in range(0, n_points, chunk):
        j = min(i + chunk, n_points)
        rows = records[i:j]
        # NaN or inf anywhere in a point's record makes it invalid, not only inside the gate
        ok = np.isfinite(rows).reshape(j - i, -1).all(axis=1)
        block = np.asarray(rows[..., gate.start : gate.stop], dtype=np.float32)
        if not ok.all():
            block = block.copy()
            block[~ok] = 0.0
        p = _power(block, w)[..., sl]
        if p.ndim == 3:
            p = p.mean(axis=1)
        p *= np.float32(scale)
        e, pk, s = band_metrics(bfreqs, p, df)
        energy[i:j] = np.where(ok, e, np.nan)
        peak[i:j] = np.where(ok, pk, np.nan)
        snr[i:j] = np.where(ok, s, np.nan)
        finite[i:j] = ok
        if kept is not None:
            kept[i:j] = np.where(ok[:, None], p, np.nan)
        if progress is not None:
            progress(j - i)
    return PointSpectra(energy, peak, snr, finite, bfreqs, kept)


def given_spectra(
    spectra: np.ndarray,
    freqs: np.ndarray,
    band_hz: tuple[float, float],
    velocity_scale: float = 1.0,
    *,
    chunk: int = DEFAULT_CHUNK,
    keep_psd: bool = False,
) -> PointSpectra:
    """Band metrics from a ready one-sided PSD ``(points, freqs)`` on any increasing frequency axis.

    Bin widths are the trapezoid weights of the band's bins, so uneven
    spacing integrates correctly.
    """
    sl = band_slice(freqs, band_hz)
    bfreqs = freqs[sl]
    if len(bfreqs) < 2:
        df = np.ones(len(bfreqs))
    else:
        edges = np.concatenate([[bfreqs[0]], 0.5 * (bfreqs[1:] + bfreqs[:-1]), [bfreqs[-1]]])
        df = np.diff(edges)
    n_points = spectra.shape[0]
    out = PointSpectra(
        np.full(n_points, np.nan), np.full(n_points, np.nan), np.full(n_points, np.nan), np.ones(n_points, bool), bfreqs
    )
    kept = np.full((n_points, len(bfreqs)), np.nan, dtype=np.float32) if keep_psd else None
    for i in range(0, n_points, chunk):
        j = min(i + chunk, n_points)
        p = np.asarray(spectra[i:j, sl], dtype=np.float64) * velocity_scale**2
        ok = np.isfinite(p).all(axis=1) & (p >= 0).all(axis=1)
        p[~ok] = 0.0
        e, pk, s = band_metrics(bfreqs, p, df)
        out.energy[i:j] = np.where(ok, e, np.nan)
        out.peak_hz[i:j] = np.where(ok, pk, np.nan)
        out.snr_db[i:j] = np.where(ok, s, np.nan)
        out.finite[i:j] = ok
        if kept is not None:
            kept[i:j] = np.where(ok[:, None], p, np.nan)
    out.band_psd = kept
    return out
