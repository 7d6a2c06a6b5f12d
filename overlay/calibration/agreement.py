"""How well the scans agree with hammer sounding: the statistics, as pure functions.

Sounding is the reference here, not the truth: it misses small and deep hollows and traces edges
generously.  Two views of the agreement:

* **by area** — at a VER level, the area where the scans say hollow (VER ≥ level) against the
  area the sounding marked hollow, within the area both looked at: both, either, only one;
  intersection over union and the share of the sounded hollow area the scans found;
* **by point** — at each sounding point with a verdict, the VER read off the scans: a 2 × 2
  table per level, sensitivity and specificity with Wilson score intervals, Cohen's kappa, and
  the ROC curve over every level with its area (AUC).

Sources of the formulas: Wilson score interval (E. B. Wilson, J. Am. Stat. Assoc. 22, 1927;
method 3 of R. G. Newcombe, Statistics in Medicine 17, 1998); Cohen's kappa (J. Cohen,
Educational and Psychological Measurement 20, 1960); Youden's J = sensitivity + specificity − 1
(W. J. Youden, Cancer 3, 1950); AUC as the probability that a hollow point reads a higher VER
than a sound one, ties counting half (the Mann-Whitney statistic).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np
import shapely
from shapely.geometry.base import BaseGeometry

Z95 = 1.959963984540054  # the two-sided 95 % normal quantile


@dataclass(frozen=True)
class AreaAgreement:
    level_db: float
    both_m2: float
    either_m2: float
    scan_only_m2: float
    sounding_only_m2: float

    @property
    def iou(self) -> float:
        """Intersection over union (NaN when neither says hollow)."""
        return self.both_m2 / self.either_m2 if self.either_m2 > 0 else float("nan")

    @property
    def found(self) -> float:
        """Share of the sounded hollow area the scans found (NaN without sounded hollow area)."""
        sounded = self.both_m2 + self.sounding_only_m2
        return self.both_m2 / sounded if sounded > 0 else float("nan")


def area_agreement(level_db: float, scan_hollow: BaseGeometry, sounded_hollow: BaseGeometry, looked_at: BaseGeometry,
                   area_per_unit: float = 1.0) -> AreaAgreement:
    """The areas (m²; ``area_per_unit`` m² per drawing unit²) of both, either and each alone, within ``looked_at``."""
    s = shapely.intersection(scan_hollow, looked_at)
    h = shapely.intersection(sounded_hollow, looked_at)
    both = shapely.intersection(s, h).area
    either = shapely.union(s, h).area
    return AreaAgreement(level_db, both * area_per_unit, either * area_per_unit, max(s.area - both, 0.0) * area_per_unit,
                         max(h.area - both, 0.0) * area_per_unit)


@dataclass(frozen=True)
class Counts:
    """A 2 × 2 table: the scan's call (VER ≥ level) against the sounding's verdict."""

    tp: int  # both hollow
    fp: int  # scan hollow, sounding sound
    fn: int  # scan sound, sounding hollow
    tn: int  # both sound

    @property
    def n(self) -> int:
        return self.tp + self.fp + self.fn + self.tn

    @property
    def sensitivity(self) -> float:
        return self.tp / (self.tp + self.fn) if self.tp + self.fn else float("nan")

    @property
    def specificity(self) -> float:
        return self.tn / (self.tn + self.fp) if self.tn + self.fp else float("nan")

    @property
    def youden(self) -> float:
        return self.sensitivity + self.specificity - 1.0

    @property
    def kappa(self) -> float:
        return cohen_kappa(self)


def counts_at(level_db: float, ver_db: np.ndarray, hollow: np.ndarray) -> Counts:
    """The 2 × 2 table at one level (points with a VER only)."""
    says = np.asarray(ver_db) >= level_db
    h = np.asarray(hollow, dtype=bool)
    return Counts(int((says & h).sum()), int((says & ~h).sum()), int((~says & h).sum()), int((~says & ~h).sum()))


def cohen_kappa(c: Counts) -> float:
    """Agreement beyond chance: (p_o − p_e) / (1 − p_e), from the table's margins (Cohen 1960)."""
    n = c.n
    if n == 0:
        return float("nan")
    po = (c.tp + c.tn) / n
    pe = ((c.tp + c.fp) * (c.tp + c.fn) + (c.fn + c.tn) * (c.fp + c.tn)) / (n * n)
    return (po - pe) / (1.0 - pe) if pe < 1.0 else float("nan")


def wilson(successes: int, n: int, z: float = Z95) -> tuple[float, float]:
    """Wilson score interval of a proportion (no continuity correction); (nan, nan) for n = 0."""
    if n <= 0:
        return float("nan"), float("nan")
    p = successes / n
    d = 1.0 + z * z / n
    centre = (p + z * z / (2 * n)) / d
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / d
    return max(0.0, centre - half), min(1.0, centre + half)


def roc(ver_db: np.ndarray, hollow: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(false-positive rate, true-positive rate, thresholds) at every distinct VER, highest first, starting
    at (0, 0) with threshold +inf — the curve as scikit-learn's roc_curve(drop_intermediate=False) draws it."""
    v = np.asarray(ver_db, dtype=np.float64)
    h = np.asarray(hollow, dtype=bool)
    order = np.argsort(-v, kind="mergesort")
    v, h = v[order], h[order]
    last = np.r_[np.nonzero(np.diff(v))[0], len(v) - 1]  # the last index of each run of equal values
    tps = np.cumsum(h)[last]
    fps = np.cumsum(~h)[last]
    pos, neg = int(h.sum()), int((~h).sum())
    tpr = np.r_[0.0, tps / pos] if pos else np.full(len(last) + 1, np.nan)
    fpr = np.r_[0.0, fps / neg] if neg else np.full(len(last) + 1, np.nan)
    return fpr, tpr, np.r_[np.inf, v[last]]


def auc(ver_db: np.ndarray, hollow: np.ndarray) -> float:
    """Area under the ROC curve (trapezoids between its points; NaN without both kinds of point)."""
    fpr, tpr, _ = roc(ver_db, hollow)
    if not (np.isfinite(fpr).all() and np.isfinite(tpr).all()):
        return float("nan")
    return float(np.sum(np.diff(fpr) * (tpr[1:] + tpr[:-1]) / 2.0))


def sweep(levels: Sequence[float], ver_db: np.ndarray, hollow: np.ndarray) -> list[Counts]:
    return [counts_at(level, ver_db, hollow) for level in levels]


def best_youden(levels: Sequence[float], tables: Sequence[Counts]) -> int | None:
    """Index of the level with the largest Youden's J (the lowest such level on a tie); None without both kinds."""
    j = np.array([t.youden for t in tables])
    if not np.isfinite(j).any():
        return None
    return int(min(np.flatnonzero(j == np.nanmax(j)), key=lambda k: levels[k]))


def reaching_sensitivity(levels: Sequence[float], tables: Sequence[Counts], target: float) -> int | None:
    """Index of the highest level whose sensitivity still reaches ``target`` (None if none does)."""
    ok = [k for k, t in enumerate(tables) if t.sensitivity >= target]
    return max(ok, key=lambda k: levels[k]) if ok else None


def reaching_specificity(levels: Sequence[float], tables: Sequence[Counts], target: float) -> int | None:
    """Index of the lowest level whose specificity reaches ``target`` (None if none does)."""
    ok = [k for k, t in enumerate(tables) if t.specificity >= target]
    return min(ok, key=lambda k: levels[k]) if ok else None


def bootstrap_level(levels: Sequence[float], ver_db: np.ndarray, hollow: np.ndarray, rounds: int = 500,
                    seed: int = 1) -> tuple[float, float]:
    """A 95 % interval (2.5 and 97.5 percentiles) of the Youden-optimal level over bootstrap resamples of
    the points (a fixed seed: the same interval on every run)."""
    rng = np.random.default_rng(seed)
    v, h = np.asarray(ver_db), np.asarray(hollow, dtype=bool)
    found = []
    for _ in range(rounds):
        k = rng.integers(0, len(v), len(v))
        best = best_youden(levels, sweep(levels, v[k], h[k]))
        if best is not None:
            found.append(levels[best])
    if not found:
        return float("nan"), float("nan")
    lo, hi = np.percentile(found, [2.5, 97.5])
    return float(lo), float(hi)

