"""Vibration energy ratio (VER): each point's band energy against a reference, in dB.

VER = 10·log10(E / E_ref).  The reference stands for healthy concrete.  The
published convention takes the scan's minimum; a single dropout or a point
shadowed from the source then sets the reference for the whole scan and lifts
every VER.  The default here is a low percentile of the valid energies, which
still sits in the healthy population (most of a scan is sound concrete) but
ignores the few lowest points.  See docs/energy-ratio.md.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from overlay.errors import SignalError
from overlay.signal.field import fit_field

REFERENCES = ("auto", "percentile", "trend", "minimum", "median", "region")
MIN_REGION_POINTS = 3
DEFAULT_PERCENTILE = 10.0
# Above this span of the fitted sound field, a scan-wide reference reads the field as VER: "auto" then
# measures against the local field.  Set from the validation set (docs/energy-ratio.md): in a beam
# spanning 1 / 2 / 4 dB a scan-wide reference grew a defect's 6 dB contour by +8 / +12 / +22 %, the
# local field by +5 % at every span; uniform fields fit spans of 0.1–0.5 dB and stay scan-wide.
AUTO_SPAN_DB = 1.0


@dataclass(frozen=True)
class Reference:
    """The reference energy used for a scan and how it was chosen.

    ``method`` "trend": the reference varies over the scan (``level_db`` per point, dB of (m/s)²);
    ``energy`` is then its median, for reports.  ``field_span_db`` and ``field_scatter_db`` describe
    the sound field wherever it was fitted (also when "auto" kept a scan-wide reference).
    """

    method: str
    energy: float
    percentile: float | None = None
    n_points: int = 0
    field_span_db: float = float("nan")
    field_scatter_db: float = float("nan")
    level_db: np.ndarray | None = None
    auto: bool = False

    def at_points(self) -> float | np.ndarray:
        """The reference energy each point is measured against."""
        return self.energy if self.level_db is None else 10.0 ** (self.level_db / 10.0)

    def describe(self) -> str:
        field = ""
        if self.field_span_db == self.field_span_db:
            field = f"; sound field spans {self.field_span_db:.1f} dB (scatter {self.field_scatter_db:.1f} dB)"
        if self.method == "trend":
            how = (f"local sound-concrete field (a robust quadratic fit), {self.percentile:g}th percentile of "
                   f"{self.n_points} valid points against it, median {self.energy:.4g} (m/s)^2")
            chosen = f" — chosen automatically: the field spans more than {AUTO_SPAN_DB:g} dB" if self.auto else ""
            return how + field + chosen
        if self.method == "percentile":
            how = f"{self.percentile:g}th percentile"
        else:
            how = {"minimum": "minimum", "median": "median", "region": "median of the healthy region"}[self.method]
        chosen = f", within the {AUTO_SPAN_DB:g} dB a scan-wide reference stands" if self.auto else ""
        return f"{how} of {self.n_points} valid points: {self.energy:.4g} (m/s)^2{field}{chosen}"


def reference_energy(
    energy: np.ndarray,
    valid: np.ndarray,
    method: str = "auto",
    percentile: float = DEFAULT_PERCENTILE,
    region: np.ndarray | None = None,
    source: str | None = None,
    xy_m: np.ndarray | None = None,
) -> Reference:
    """Pick the healthy reference energy from the valid points of one scan.

    ``region`` (method "region"): a boolean mask of the points inside the
    healthy region; their median is the reference.
    """
    if method not in REFERENCES:
        raise SignalError(f"unknown reference method {method!r}; choose from {', '.join(REFERENCES)}", source=source)
    if method in ("auto", "trend"):
        return _trend_or_percentile(energy, valid, method, percentile, xy_m, source)
    use = np.asarray(valid, dtype=bool) & np.isfinite(energy)
    if method == "region":
        if region is None:
            raise SignalError("reference 'region' needs a healthy_region for this scan", source=source, field="reference")
        use &= np.asarray(region, dtype=bool)
        if use.sum() < MIN_REGION_POINTS:
            raise SignalError(
                f"healthy region holds {int(use.sum())} valid point(s); at least {MIN_REGION_POINTS} are needed",
                source=source,
                field="healthy_region",
            )
    e = np.asarray(energy, dtype=np.float64)[use]
    if e.size == 0:
        raise SignalError("no valid point left to take a reference energy from", source=source, field="reference")
    pct = None
    if method == "minimum":
        ref = float(e.min())
    elif method == "percentile":
        if not 0 <= percentile <= 100:
            raise SignalError(f"reference percentile must lie in 0..100, got {percentile:g}", source=source)
        ref = float(np.percentile(e, percentile))
        pct = percentile
    else:  # median of the scan or of the region
        ref = float(np.median(e))
    if not ref > 0:
        raise SignalError(
            f"reference energy is {ref:g} ({method}); VER needs a positive reference "
            "(dead channels among the valid points? mark them valid=0)",
            source=source,
            field="reference",
        )
    return Reference(method, ref, pct, int(e.size))


def _trend_or_percentile(energy: np.ndarray, valid: np.ndarray, method: str, percentile: float,
                         xy_m: np.ndarray | None, source: str | None) -> Reference:
    """"trend": against the fitted local field; "auto": that when the field spans more than AUTO_SPAN_DB,
    else the scan-wide percentile (with the field's span recorded either way)."""
    valid = np.asarray(valid, dtype=bool)
    fit = fit_field(xy_m, np.asarray(energy, dtype=np.float64), valid) if xy_m is not None else None
    if fit is None and method == "trend":
        raise SignalError("reference 'trend' needs at least 30 valid points with coordinates", source=source,
                          field="reference")
    span = fit.span_db if fit is not None else float("nan")
    scatter = fit.scatter_db if fit is not None else float("nan")
    if method == "auto" and not span > AUTO_SPAN_DB:
        base = reference_energy(energy, valid, "percentile", percentile, source=source)
        return Reference("percentile", base.energy, base.percentile, base.n_points, span, scatter, auto=True)
    assert fit is not None
    use = valid & np.isfinite(fit.level_db) & np.isfinite(energy) & (np.asarray(energy) > 0)
    residual = 10.0 * np.log10(np.asarray(energy, dtype=np.float64)[use]) - fit.level_db[use]
    level = fit.level_db + float(np.percentile(residual, percentile))
    median = float(10.0 ** (np.nanmedian(level[use]) / 10.0))
    return Reference("trend", median, percentile, int(use.sum()), span, scatter, level, auto=method == "auto")


def ver_db(energy: np.ndarray, reference: float | np.ndarray) -> np.ndarray:
    """10·log10(E/E_ref); zero energy gives -inf, NaN stays NaN."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return 10.0 * np.log10(np.asarray(energy, dtype=np.float64) / reference)
