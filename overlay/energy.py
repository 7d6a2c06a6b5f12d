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

from .errors import SignalError

REFERENCES = ("percentile", "minimum", "median", "region")
MIN_REGION_POINTS = 3
DEFAULT_PERCENTILE = 10.0


@dataclass(frozen=True)
class Reference:
    """The reference energy used for a scan and how it was chosen."""

    method: str
    energy: float
    percentile: float | None = None
    n_points: int = 0

    def describe(self) -> str:
        if self.method == "percentile":
            how = f"{self.percentile:g}th percentile"
        else:
            how = {"minimum": "minimum", "median": "median", "region": "median of the healthy region"}[self.method]
        return f"{how} of {self.n_points} valid points: {self.energy:.4g} (m/s)^2"


def reference_energy(
    energy: np.ndarray,
    valid: np.ndarray,
    method: str = "percentile",
    percentile: float = DEFAULT_PERCENTILE,
    region: np.ndarray | None = None,
    source: str | None = None,
) -> Reference:
    """Pick the healthy reference energy from the valid points of one scan.

    ``region`` (method "region"): a boolean mask of the points inside the
    healthy region; their median is the reference.
    """
    if method not in REFERENCES:
        raise SignalError(f"unknown reference method {method!r}; choose from {', '.join(REFERENCES)}", source=source)
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


def ver_db(energy: np.ndarray, reference: float) -> np.ndarray:
    """10·log10(E/E_ref); zero energy gives -inf, NaN stays NaN."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return 10.0 * np.log10(np.asarray(energy, dtype=np.float64) / reference)
