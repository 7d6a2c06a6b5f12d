"""Least-squares fits of plane transforms from control points, with proof of fit.

Every fit reports per-point residuals, RMS, the largest residual and the
leave-one-out error of every point (fit without it, predict it): a target
whose leave-one-out error is much larger than its residual is the one that
holds the fit up.  Point sets that do not determine the model (too few, coincident, collinear for
affine and projective, all but one on a line for projective) are refused with the names of the points.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from itertools import combinations
from typing import Sequence

import numpy as np

from overlay.errors import RegistrationError, RegistrationWarning
from overlay.geometry.transforms import Affine, Projective, Similarity, Transform

MIN_POINTS = {"similarity": 2, "affine": 3, "projective": 4}
MODELS = tuple(MIN_POINTS)
COLLINEAR = 1e-3  # smallest / largest singular value of the centred points


@dataclass(frozen=True)
class Fit:
    """A fitted transform with what it costs."""

    transform: Transform
    model: str
    names: tuple[str, ...]
    residuals: np.ndarray  # (n, 2) target − fitted, target units
    leave_one_out: np.ndarray  # (n,) leave-one-out error, NaN where too few points remain

    @property
    def errors(self) -> np.ndarray:
        return np.hypot(self.residuals[:, 0], self.residuals[:, 1])

    @property
    def rms(self) -> float:
        return float(np.sqrt(np.mean(self.errors**2))) if len(self.names) else 0.0

    @property
    def worst(self) -> tuple[str, float]:
        k = int(np.argmax(self.errors))
        return self.names[k], float(self.errors[k])

    def report(self, unit: str) -> list[str]:
        params = ", ".join(f"{k} {v:.9g}" for k, v in self.transform.params().items())
        name, worst = self.worst
        lines = [f"model {self.model}, {len(self.names)} points, RMS {self.rms:.4f} {unit}, largest {worst:.4f} ({name})",
                 f"  raw parameters (drawing units per working unit): {params}"]
        for n, (dx, dy), e, lo in zip(self.names, self.residuals, self.errors, self.leave_one_out):
            lo_s = f"{lo:.4f}" if np.isfinite(lo) else "  n/a "
            lines.append(f"  {n:<12} dx {dx:+.4f}  dy {dy:+.4f}  |r| {e:.4f}  leave-one-out {lo_s} {unit}")
        return lines


def _solve(model: str, src: np.ndarray, dst: np.ndarray) -> Transform:
    if model == "similarity":
        return _similarity(src, dst)
    if model == "affine":
        return _affine(src, dst)
    return _projective(src, dst)


def _similarity(src: np.ndarray, dst: np.ndarray) -> Similarity:
    # centre both sets so the normal equations are well conditioned at map-size coordinates
    cs, cd = src.mean(axis=0), dst.mean(axis=0)
    s, d = src - cs, dst - cd
    denom = float(np.sum(s**2))
    a = float(np.sum(s[:, 0] * d[:, 0] + s[:, 1] * d[:, 1]) / denom)
    b = float(np.sum(s[:, 0] * d[:, 1] - s[:, 1] * d[:, 0]) / denom)
    return Similarity(a, b, float(cd[0] - (a * cs[0] - b * cs[1])), float(cd[1] - (b * cs[0] + a * cs[1])))


def _affine(src: np.ndarray, dst: np.ndarray) -> Affine:
    cs, cd = src.mean(axis=0), dst.mean(axis=0)
    design = np.column_stack([np.ones(len(src)), src - cs])
    coef, *_ = np.linalg.lstsq(design, dst - cd, rcond=None)
    (ax0, bx0), (a1, b1), (a2, b2) = coef
    a0 = cd[0] + ax0 - a1 * cs[0] - a2 * cs[1]
    b0 = cd[1] + bx0 - b1 * cs[0] - b2 * cs[1]
    return Affine(float(a0), float(a1), float(a2), float(b0), float(b1), float(b2))


def _normaliser(p: np.ndarray) -> np.ndarray:
    """Hartley normalisation: centroid to 0, mean distance sqrt(2)."""
    c = p.mean(axis=0)
    d = np.mean(np.hypot(*(p - c).T)) or 1.0
    k = math.sqrt(2) / d
    return np.array([[k, 0, -k * c[0]], [0, k, -k * c[1]], [0, 0, 1.0]])


def _projective(src: np.ndarray, dst: np.ndarray) -> Projective:
    """Normalised DLT, then (more than 4 points) refined on the target-frame residuals."""
    ts, td = _normaliser(src), _normaliser(dst)
    s = (np.column_stack([src, np.ones(len(src))]) @ ts.T)[:, :2]
    d = (np.column_stack([dst, np.ones(len(dst))]) @ td.T)[:, :2]
    rows = []
    for (x, y), (u, v) in zip(s, d):
        rows.append([x, y, 1, 0, 0, 0, -u * x, -u * y, -u])
        rows.append([0, 0, 0, x, y, 1, -v * x, -v * y, -v])
    a = np.array(rows)
    _, sv, vt = np.linalg.svd(a)
    hn = vt[-1].reshape(3, 3)
    hm = np.linalg.inv(td) @ hn @ ts
    hm = hm / hm[2, 2]
    t = Projective(tuple(float(v) for v in hm.ravel()[:8]))
    if len(src) > 4:
        import scipy.optimize  # here, not at import: a run without such a fit need not load it

        res = scipy.optimize.least_squares(
            lambda h: (Projective(tuple(h)).apply(src) - dst).ravel(), np.array(t.h), method="lm", xtol=1e-15, ftol=1e-15
        )
        t = Projective(tuple(float(v) for v in res.x))
    return t


def check_points(model: str, src: np.ndarray, names: Sequence[str], what: str) -> None:
    """Refuse point sets the model cannot be fitted from, naming the points."""
    n = len(src)
    need = MIN_POINTS[model]
    label = ", ".join(names) or "none"
    if n < need:
        raise RegistrationError(f"{model} fit needs at least {need} {what}, got {n} ({label})", field=what)
    span = float(np.ptp(src, axis=0).max())  # n >= 2 here
    for i, j in combinations(range(n), 2):
        if np.hypot(*(src[i] - src[j])) <= 1e-9 * max(span, 1.0):
            raise RegistrationError(f"{what} {names[i]} and {names[j]} coincide; a fit needs distinct points", field=what)
    if model == "similarity":
        return
    sv = np.linalg.svd(src - src.mean(axis=0), compute_uv=False)
    if sv[-1] <= COLLINEAR * sv[0]:
        raise RegistrationError(f"{what} {label} are (nearly) collinear; an {model} fit needs them spread in two directions",
                                field=what)
    if model == "projective":
        on_line = _all_but_one_on_a_line(src)
        if on_line is not None:
            raise RegistrationError(
                f"{what} {', '.join(names[k] for k in on_line)} are collinear; a projective fit needs 4 {what} of "
                "which no three are on a line", field=what)


def _all_but_one_on_a_line(src: np.ndarray) -> list[int] | None:
    """Indices of the points on a line holding all but at most one of them, or None.  Then no four of
    them are in general position, and a homography is not determined: the fit would reach zero
    residuals with any of many transforms (measured: a point 1.2 m off at RMS 5e-16)."""
    n = len(src)
    for i, j in combinations(range(n), 2):
        d = src[j] - src[i]
        length = float(np.hypot(*d))
        off = np.abs(d[0] * (src[:, 1] - src[i, 1]) - d[1] * (src[:, 0] - src[i, 0])) / length
        on = np.nonzero(off <= COLLINEAR * length)[0]
        if len(on) >= n - 1:
            return [int(k) for k in on]
    return None


def fit_points(model: str, src: np.ndarray, dst: np.ndarray, names: Sequence[str], *, what: str = "targets") -> Fit:
    """Fit ``model`` taking ``src`` onto ``dst`` (each (n, 2)) with residuals and leave-one-out errors."""
    if model not in MODELS:
        raise RegistrationError(f"unknown model {model!r}; choose from {', '.join(MODELS)}", field="model")
    src = np.asarray(src, dtype=np.float64)
    dst = np.asarray(dst, dtype=np.float64)
    check_points(model, src, list(names), what)
    t = _solve(model, src, dst)
    resid = dst - t.apply(src)
    if not np.isfinite(resid).all():
        raise RegistrationError(f"{model} fit of {what} {', '.join(names)} is singular", field=what)
    loo = np.full(len(src), np.nan)
    if len(src) > MIN_POINTS[model]:
        for k in range(len(src)):
            keep = np.arange(len(src)) != k
            try:
                check_points(model, src[keep], [n for i, n in enumerate(names) if i != k], what)
            except RegistrationError:
                continue
            tk = _solve(model, src[keep], dst[keep])
            loo[k] = float(np.hypot(*(dst[k] - tk.apply(src[k][None, :])[0])))
    return Fit(t, model, tuple(names), resid, loo)


def check_fit(fit: Fit, tolerance: float, unit: str, *, accept: bool = False, source: str | None = None) -> bool:
    """Refuse a fit whose worst residual exceeds ``tolerance`` unless ``accept``; return whether it passed."""
    name, err = fit.worst
    if err <= tolerance:
        return True
    msg = f"{fit.model} fit misses {name} by {err:.4f} {unit} (tolerance {tolerance:g} {unit}, RMS {fit.rms:.4f})"
    if not accept:
        raise RegistrationError(msg + "; check the target coordinates or accept the misfit explicitly", source=source,
                                field="targets", details=fit.report(unit))
    warnings.warn(f"{source + ': ' if source else ''}{msg}; accepted by override", RegistrationWarning, stacklevel=2)
    return False
