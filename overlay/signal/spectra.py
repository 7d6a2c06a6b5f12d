"""Per-point spectra: PSD, band energy, peak frequency and in-band SNR.

The PSD is the Hann-windowed one-sided periodogram in density scaling, the
same estimate as ``scipy.signal.periodogram(x, fs, window="hann")`` on the band's bins; its
integral over a band is the mean-square velocity in that band (Parseval).
Records are read from the memory map a chunk of points at a time, in float32,
with one batched FFT per chunk and no per-point Python loop.
"""

from __future__ import annotations

import contextlib
import mmap
import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Callable, Iterable

import numpy as np
import scipy.fft

from overlay.errors import SignalError
from overlay.signal.gate import Gate

DEFAULT_THREADS: int | None = None  # None: one per core; campaign workers set 1
DEFAULT_CHUNK = 512  # points per chunk: small enough to stay in cache, measured fastest (docs/performance.md)


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
    """The periodic Hann window, 0.5 − 0.5·cos(2πk/n), as scipy.signal.get_window("hann", n) gives it
    for spectral estimates (written out: importing scipy.signal cost a third of a second per run)."""
    return 0.5 - 0.5 * np.cos(2.0 * np.pi * np.arange(n) / n) if n > 1 else np.ones(n)


def _density_scale(w: np.ndarray, fs: float) -> float:
    """One-sided density scale of a windowed periodogram: 1 / (fs · Σw²) (before the doubling)."""
    return 1.0 / (fs * float(np.sum(w.astype(np.float64) ** 2)))


MIN_BAND_BINS = 3  # a peak (parabola through three bins) and a noise floor need at least three


def band_slice(freqs: np.ndarray, band_hz: tuple[float, float]) -> slice:
    """Bins whose centre lies inside the closed band; a band holding fewer than three is refused."""
    lo = int(np.searchsorted(freqs, band_hz[0], side="left"))
    hi = int(np.searchsorted(freqs, band_hz[1], side="right"))
    if hi - lo < MIN_BAND_BINS:
        step = float(np.median(np.diff(freqs))) if len(freqs) > 1 else float("nan")
        raise SignalError(f"band {band_hz[0]:g}-{band_hz[1]:g} Hz holds {hi - lo} frequency bin(s) at a resolution of "
                          f"{step:.3g} Hz; at least {MIN_BAND_BINS} are needed — widen the band or lengthen the gate",
                          field="band.hz")
    return slice(lo, hi)


def parabolic_peak(freqs: np.ndarray, power: np.ndarray) -> np.ndarray:
    """Sub-bin peak frequency of each row: parabola through the log power of the top bin and its neighbours.

    Log power makes the Hann main lobe close to a parabola.  A peak on the
    first or last bin is returned unrefined.  Works for uneven bin spacing.
    """
    return _peak_and_max(freqs, np.asarray(power))[0]


def _peak_and_max(freqs: np.ndarray, power: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(sub-bin peak frequency, peak power) per row; only the three bins around each peak are touched."""
    flat = power.reshape(-1, power.shape[-1])
    k = np.argmax(flat, axis=-1)
    m = flat.shape[-1]
    top = flat[np.arange(len(k)), k].astype(np.float64)
    f = freqs[k].astype(np.float64)
    inner = (k > 0) & (k < m - 1)
    if m >= 3 and inner.any():
        rows = np.nonzero(inner)[0]
        kk = k[rows]
        y = np.log(np.maximum(flat[rows[:, None], np.stack([kk - 1, kk, kk + 1], axis=1)].astype(np.float64), 1e-300))
        x0, x1, x2 = freqs[kk - 1], freqs[kk], freqs[kk + 1]
        d1 = (y[:, 1] - y[:, 0]) / (x1 - x0)
        d2 = (y[:, 2] - y[:, 1]) / (x2 - x1)
        curv = (d2 - d1) / (x2 - x0)  # half the second derivative
        ok = curv < 0
        vertex = 0.5 * (x0 + x1) - d1 / (2.0 * np.where(ok, curv, -1.0))
        f[rows] = np.where(ok, np.clip(vertex, x0, x2), x1)
    shape = power.shape[:-1]
    return f.reshape(shape), top.reshape(shape)


def band_metrics(
    freqs: np.ndarray, psd_band: np.ndarray, df: float | np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Band energy (sum of PSD·df), peak frequency and SNR (peak over the noise floor, dB) per row.

    The noise floor is the median of every second band bin.  Adjacent bins of
    a Hann periodogram overlap (their powers correlate), so the other half adds
    little to the estimate while the median is the costliest step of the stage
    (measured, docs/performance.md); for white noise the expected value is the
    same, ln 2 times the mean density.
    """
    if np.ndim(df) == 0:
        energy = psd_band.sum(axis=-1, dtype=np.float64) * float(df)
    else:
        energy = psd_band.astype(np.float64) @ np.asarray(df, dtype=np.float64)
    peak, top = _peak_and_max(freqs, psd_band)
    with np.errstate(divide="ignore", invalid="ignore"):
        snr = 10.0 * np.log10(top / _median(psd_band[..., ::2]))
    return energy, peak, snr


def _median(p: np.ndarray) -> np.ndarray:
    """Median of each row by partition (three times faster than np.median on wide rows)."""
    m = p.shape[-1]
    k = m // 2
    part = np.partition(p, k if m % 2 else (k - 1, k), axis=-1)
    return part[..., k] if m % 2 else 0.5 * (part[..., k - 1] + part[..., k])


@dataclass(frozen=True)
class _Plan:
    """What every chunk of one call shares: gate, band bins and the window's spectrum."""

    start: int
    stop: int
    band: slice
    freqs: np.ndarray
    mean_bins: np.ndarray  # band-relative bins the record mean leaks into (Hann: only bins 0 and 1)
    window_band: np.ndarray  # twice the rfft of the window on those bins (as _hann_band), complex64
    factor: np.ndarray  # density scale × velocity scale² × ¼ (see _hann_band), doubled except DC/Nyquist
    df: float
    fft_workers: int


def _plan(gate: Gate, band_hz: tuple[float, float], velocity_scale: float, fft_workers: int) -> _Plan:
    n, fs = gate.n, gate.sample_rate_hz
    freqs = scipy.fft.rfftfreq(n, 1.0 / fs)
    sl = band_slice(freqs, band_hz)
    w = hann(n)
    k = np.arange(len(freqs))[sl]
    double = np.where((k == 0) | ((n % 2 == 0) & (k == n // 2)), 1.0, 2.0)
    # × ¼: _hann_band returns twice the windowed bins
    factor = (0.25 * double * _density_scale(w, fs) * velocity_scale**2).astype(np.float32)
    wb = scipy.fft.rfft(w)[sl]
    leak = np.nonzero(np.abs(wb) > 1e-9 * np.sum(w))[0]
    return _Plan(gate.start, gate.stop, sl, freqs[sl], leak,
                 (2.0 * wb[leak]).astype(np.complex64), factor, fs / n, fft_workers)


def _hann_band(x: np.ndarray, band: slice, n: int) -> np.ndarray:
    """Twice the band bins of FFT(w·x), from the plain FFT ``x`` of length ``n``; w the periodic Hann window.

    w = ½ − ½·cos(2πt/n) has the spectrum n·(½, −¼, −¼) on bins (0, ±1), so windowing
    is the three-tap sum ½·X[k] − ¼·(X[k−1] + X[k+1]) on the band's bins only; the
    factor ½ is left to the caller's power scale (one pass fewer).  The neighbours
    past either end of the one-sided spectrum come from its symmetry
    X[−k] = X[n−k] = conj(X[k]).
    """
    lo, hi, nb = band.start, band.stop, x.shape[-1]
    parts = []
    if lo == 0:
        parts.append(np.conj(x[..., 1:2]))
    parts.append(x[..., max(lo - 1, 0) : min(hi + 1, nb)])
    if hi == nb:
        parts.append(np.conj(x[..., nb - 2 : nb - 1] if n % 2 == 0 else x[..., nb - 1 : nb]))
    ext = parts[0] if len(parts) == 1 else np.concatenate(parts, axis=-1)
    out = np.add(ext[..., :-2], ext[..., 2:])
    out *= np.float32(-0.5)
    out += ext[..., 1:-1]
    return out


def _chunk(rows: np.ndarray, plan: _Plan, keep: bool = False) -> tuple[np.ndarray, ...]:
    """Band PSD and metrics of one chunk of rows ``(m, [shots,] samples)``.

    The FFT reads the gate straight from the rows (the memory map) and the
    window is applied to the band bins afterwards (``_hann_band``): no windowed
    copy of the records is made.  The mean is removed by linearity of the FFT,
    FFT(w·(x − x̄)) = FFT(w·x) − x̄·FFT(w), and the periodic Hann window's
    spectrum is zero beyond bin 1, so only a band reaching down to bin 1 needs
    the mean at all.  A record is finite when the plain sum of all its samples
    is: NaN or inf anywhere, inside the gate or not, makes that sum non-finite
    (the cheapest full pass, measured).
    """
    m = rows.shape[0]
    total = np.einsum("...i->...", rows)  # einsum's own vector loop: no BLAS threads to fight ours
    ok = np.isfinite(total).reshape(m, -1).all(axis=1)
    inside = rows[..., plan.start : plan.stop]
    if inside.dtype != np.float32:
        inside = inside.astype(np.float32)
    with np.errstate(invalid="ignore", over="ignore"):  # a bad record's NaN/inf is caught by ``ok``
        spec = _hann_band(scipy.fft.rfft(inside, axis=-1, workers=plan.fft_workers), plan.band, plan.stop - plan.start)
        if len(plan.mean_bins):
            mean = np.mean(inside, axis=-1, dtype=np.float32)[..., None]
            spec[..., plan.mean_bins] -= mean * plan.window_band
        p = np.abs(spec)
        np.square(p, out=p)
    if p.ndim == 3:
        p = p.mean(axis=1)
    if not ok.all():
        p[~ok] = 0.0
    p *= plan.factor
    kept = p if keep else None
    e, pk, snr = band_metrics(plan.freqs, p, plan.df)
    ok &= np.isfinite(e)  # a finite record whose power overflows float32
    nan = np.float64("nan")
    return ok, np.where(ok, e, nan), np.where(ok, pk, nan), np.where(ok, snr, nan), kept


def _release(records: np.ndarray, i: int, j: int) -> None:
    """Drop the pages of rows i..j from this process's memory (they stay in the OS file cache).

    Without it, a memory map touched end to end counts fully towards the
    resident size, so a 4 GB record file would look like 4 GB of memory.
    """
    base = getattr(records, "base", None)
    if not isinstance(records, np.memmap) or not isinstance(base, mmap.mmap) or not records.flags.c_contiguous:
        return
    row = records.strides[0]
    start = records.offset % mmap.ALLOCATIONGRANULARITY + i * row
    page = mmap.PAGESIZE
    lo = (start // page) * page
    hi = start + (j - i) * row
    with contextlib.suppress(OSError, ValueError):
        base.madvise(mmap.MADV_DONTNEED, lo, hi - lo)


def records_spectra(
    records: np.ndarray,
    gate: Gate,
    band_hz: tuple[float, float],
    velocity_scale: float = 1.0,
    *,
    chunk: int = DEFAULT_CHUNK,
    keep_psd: bool = False,
    threads: int | None = None,
    progress: Callable[[int], None] | None = None,
) -> PointSpectra:
    """Spectra of gated records ``(points, samples)`` or ``(points, shots, samples)``.

    Shots are averaged as power.  A point whose record holds NaN or inf
    anywhere gets ``finite=False`` and NaN results; it does not stop the
    others.  Chunks run on ``threads`` threads (default: one per core); numpy
    and the FFT release the GIL, and results do not depend on the count.
    """
    n_points = records.shape[0]
    threads = threads or DEFAULT_THREADS or os.cpu_count() or 1
    plan = _plan(gate, band_hz, velocity_scale, fft_workers=1 if threads > 1 else (os.cpu_count() or 1))
    energy = np.full(n_points, np.nan)
    peak = np.full(n_points, np.nan)
    snr = np.full(n_points, np.nan)
    finite = np.ones(n_points, dtype=bool)
    kept = np.full((n_points, len(plan.freqs)), np.nan, dtype=np.float32) if keep_psd else None

    def work(i: int) -> int:
        j = min(i + chunk, n_points)
        ok, e, pk, s, p = _chunk(records[i:j], plan, keep=kept is not None)
        finite[i:j], energy[i:j], peak[i:j], snr[i:j] = ok, e, pk, s
        if kept is not None:
            kept[i:j] = np.where(ok[:, None], p, np.nan)
        _release(records, i, j)
        return j - i

    starts = range(0, n_points, chunk)
    done: Iterable[int]
    if threads == 1 or len(starts) == 1:
        done = map(work, starts)
    else:
        pool = ThreadPoolExecutor(max_workers=threads)
        done = (f.result() for f in [pool.submit(work, i) for i in starts])
    try:
        for k in done:
            if progress is not None:
                progress(k)
    finally:
        if threads > 1 and len(starts) > 1:
            pool.shutdown(wait=True, cancel_futures=True)
    return PointSpectra(energy, peak, snr, finite, plan.freqs, kept)


def band_psd_rows(
    records: np.ndarray,
    gate: Gate,
    band_hz: tuple[float, float],
    velocity_scale: float,
    rows: np.ndarray,
    *,
    chunk: int = DEFAULT_CHUNK,
) -> tuple[np.ndarray, np.ndarray]:
    """Band frequencies and PSD of the chosen ``rows`` only (a zone's points), NaN where not finite."""
    plan = _plan(gate, band_hz, velocity_scale, fft_workers=os.cpu_count() or 1)
    rows = np.sort(np.asarray(rows, dtype=np.int64))
    out = np.full((len(rows), len(plan.freqs)), np.nan, dtype=np.float32)
    for k in range(0, len(rows), chunk):
        sel = rows[k : k + chunk]
        ok, *_, p = _chunk(np.asarray(records[sel]), plan, keep=True)
        out[k : k + len(sel)] = np.where(ok[:, None], p, np.nan)
    return plan.freqs, out


def given_psd_rows(
    spectra: np.ndarray, freqs: np.ndarray, band_hz: tuple[float, float], velocity_scale: float, rows: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Band frequencies and PSD of the chosen ``rows`` of a ready PSD payload."""
    sl = band_slice(freqs, band_hz)
    rows = np.sort(np.asarray(rows, dtype=np.int64))
    return freqs[sl], np.asarray(spectra[rows][:, sl], dtype=np.float64) * velocity_scale**2


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
    sl = band_slice(freqs, band_hz)  # at least MIN_BAND_BINS bins, or a SignalError
    bfreqs = freqs[sl]
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
