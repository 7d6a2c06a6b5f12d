"""Scanner → drawing: the working frame of a scan, the fit model, and the beam's incidence.

* Surface scans (x, y on the surface): similarity by default (affine on request).
* Angle scans with ≥ 4 targets: a projective fit on the tangents of the mirror
  angles — exact for a plane seen from one point, whatever its tilt — and the
  incidence of every beam from the fitted plane pose.
* Angle scans with 2–3 targets: a pinhole model from the standoff (and an
  optional tilt of the surface) to surface metres, then a similarity.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from typing import Callable

import numpy as np

from overlay.errors import BundleWarning, RegistrationError
from overlay.geometry.fits import MIN_POINTS, Fit, check_fit, fit_points
from overlay.geometry.transforms import Projective, Transform
from overlay.io.bundle import Scan
from overlay.settings import ScanEntry, Site
from overlay.signal.incidence import cos_incidence_from_head
from overlay.units import LENGTH_TO_M


@dataclass
class TargetResult:
    name: str
    scanner: tuple[float, float]
    drawing: tuple[float, float]
    residual: tuple[float, float]
    leave_one_out: float


@dataclass
class Registration:
    """How a scan sits in the drawing: working frame, fit, its check, and the beam incidence."""

    frame: str  # "surface", "tangent" or "pinhole"
    working: Callable[[np.ndarray], np.ndarray]  # bundle scanner coordinates (m or deg) → working frame
    fit: Fit
    passed: bool
    targets: list[TargetResult]
    cos_incidence: np.ndarray | None
    incidence_how: str
    describe: str

    @property
    def to_drawing(self) -> Transform:
        return self.fit.transform


def tangents(angles_deg: np.ndarray) -> np.ndarray:
    """Mirror angles (ax, ay) in degrees → beam direction tangents (tan ax, tan ay)."""
    return np.tan(np.radians(np.asarray(angles_deg, dtype=np.float64)))


def _tilt_matrix(tilt_deg: tuple[float, float]) -> np.ndarray:
    tx, ty = (math.radians(t) for t in tilt_deg)
    rx = np.array([[1, 0, 0], [0, math.cos(tx), -math.sin(tx)], [0, math.sin(tx), math.cos(tx)]])
    ry = np.array([[math.cos(ty), 0, math.sin(ty)], [0, 1, 0], [-math.sin(ty), 0, math.cos(ty)]])
    return rx @ ry


def pinhole_to_surface(angles_deg: np.ndarray, standoff_m: float, tilt_deg: tuple[float, float] = (0.0, 0.0)
                       ) -> tuple[np.ndarray, np.ndarray]:
    """Surface metres and cos θ of each beam: rays (tan ax, tan ay, 1) from the head onto a plane
    at ``standoff_m`` along the boresight whose normal is tilted by ``tilt_deg`` (about x, then y)."""
    t = tangents(angles_deg)
    d = np.column_stack([t[..., 0].ravel(), t[..., 1].ravel(), np.ones(t[..., 0].size)])
    r = _tilt_matrix(tilt_deg)
    n, e1, e2 = r @ [0, 0, 1.0], r @ [1.0, 0, 0], r @ [0, 1.0, 0]
    p0 = np.array([0, 0, standoff_m])
    s = (p0 @ n) / (d @ n)
    hit = d * s[:, None] - p0
    xy = np.column_stack([hit @ e1, hit @ e2]).reshape(t.shape)
    cos = (np.abs(d @ n) / np.linalg.norm(d, axis=1)).reshape(t.shape[:-1])
    return xy, cos


def cos_incidence_from_homography(h: Projective, tangent_xy: np.ndarray, drawing_unit_m: float) -> np.ndarray:
    """cos θ of each beam from a tangent → drawing homography (pinhole of focal length 1).

    The inverse homography, from plane metres to image, is proportional to
    [r1 r2 t] of the plane's pose; r1 × r2 is the plane normal in the head's frame.
    """
    g = np.diag([drawing_unit_m, drawing_unit_m, 1.0]) @ h.matrix
    m = np.linalg.inv(g)
    lam = 2.0 / (np.linalg.norm(m[:, 0]) + np.linalg.norm(m[:, 1]))
    n = np.cross(lam * m[:, 0], lam * m[:, 1])
    n /= np.linalg.norm(n)
    d = np.column_stack([tangent_xy[:, 0], tangent_xy[:, 1], np.ones(len(tangent_xy))])
    return np.abs(d @ n) / np.linalg.norm(d, axis=1)


def choose_model(scan: Scan, entry: ScanEntry, site: Site, n_targets: int) -> tuple[str, str]:
    """(model, working frame): the site file's or scan's choice, else by scan kind and target count."""
    asked = entry.model or site.registration.model
    if scan.kind == "surface":
        model = "similarity" if asked == "auto" else asked
        return model, "surface"
    if asked == "auto":
        return ("projective", "tangent") if n_targets >= MIN_POINTS["projective"] else ("similarity", "pinhole")
    return asked, ("tangent" if asked == "projective" else "pinhole")


def _control(scan: Scan, site: Site, src: str) -> tuple[list[str], list[tuple[float, float]], list[tuple[float, float]]]:
    names, seen, drawing = [], [], []
    for t in scan.targets:
        d = site.control_points.get(t.name, t.drawing)
        if d is None:
            warnings.warn(f"{src}: target {t.name} has no drawing coordinates; not used", BundleWarning, stacklevel=3)
            continue
        if t.name in site.control_points and t.drawing is not None:
            gap = float(np.hypot(*np.subtract(site.control_points[t.name], t.drawing)))
            if gap > site.registration.tolerance_m / LENGTH_TO_M[site.drawing_unit]:
                warnings.warn(f"{src}: target {t.name}: site file and bundle differ by {gap:.4f}; using the site file",
                              BundleWarning, stacklevel=3)
        names.append(t.name)
        seen.append(t.scanner)
        drawing.append(d)
    return names, seen, drawing


def register(scan: Scan, entry: ScanEntry, site: Site) -> Registration:
    """Fit the scan into the drawing frame and check the fit against the site tolerance."""
    src = str(scan.path)
    names, seen, drawing = _control(scan, site, src)
    model, frame = choose_model(scan, entry, site, len(names))
    u = LENGTH_TO_M[site.drawing_unit]
    if frame == "surface":
        working: Callable[[np.ndarray], np.ndarray] = lambda xy: np.asarray(xy, dtype=np.float64)  # noqa: E731
        describe = f"{model} on surface coordinates"
    elif frame == "tangent":
        working = tangents
        describe = "projective on mirror-angle tangents"
    else:
        standoff = scan.geometry.head_distance_m
        if standoff is None:
            raise RegistrationError(
                f"angle scan with {len(names)} target(s) needs [geometry].head_distance_m for the pinhole model "
                "(or at least 4 targets for a projective fit)", source=src, field="geometry.head_distance_m")
        tilt = entry.tilt_deg or (0.0, 0.0)
        working = lambda xy: pinhole_to_surface(xy, standoff, tilt)[0]  # noqa: E731
        describe = f"{model} after a pinhole projection (standoff {standoff:g} m, tilt {tilt[0]:g}/{tilt[1]:g} deg)"
    at = working(np.array(seen, dtype=np.float64).reshape(-1, 2))
    try:
        fit = fit_points(model, at, np.array(drawing).reshape(-1, 2), names)
    except RegistrationError as exc:
        raise RegistrationError(exc.problem, source=src, field="targets") from exc
    check_scale(fit, frame, scan, u, at, src)
    passed = check_fit(fit, site.registration.tolerance_m / u, site.drawing_unit, accept=site.registration.accept_misfit, source=src)
    targets = [TargetResult(n, (float(s[0]), float(s[1])), (float(d[0]), float(d[1])), (float(r[0]), float(r[1])), float(lo))
               for n, s, d, r, lo in zip(names, seen, drawing, fit.residuals.tolist(), fit.leave_one_out)]
    cos, how = _incidence(scan, entry, frame, fit, working, u)
    return Registration(frame, working, fit, passed, targets, cos, how, describe)


SCALE_SLACK = {"surface": 1.1, "pinhole": 1.1, "tangent": 5.0}  # allowed factor between fitted and declared scale


def check_scale(fit: Fit, frame: str, scan: Scan, drawing_unit_m: float, at: np.ndarray, source: str) -> None:
    """The fit's scale must match the declared units: a metre on the surface is 1/u drawing units.

    A drawing in millimetres declared as metres (or a bundle in mm declared as m) still fits
    perfectly — at a scale of 1000 — and would multiply every area by a million.  Angle scans
    on tangents scale with the standoff (checked loosely, when it is known).
    """
    per_m = fit.transform.local_scale(at) * drawing_unit_m  # drawing metres per working unit (m or tangent)
    expected = 1.0
    if frame == "tangent":
        if scan.geometry.head_distance_m is None:
            return
        expected = scan.geometry.head_distance_m
    ratio = per_m / expected
    slack = SCALE_SLACK[frame]
    if 1 / slack <= ratio <= slack:
        return
    unit = "m" if drawing_unit_m == 1.0 else "mm"
    if 300 < ratio < 3000:
        hint = "is the drawing in mm?" if unit == "m" else "are the scan's coordinates in mm ([coordinates] unit)?"
    elif 1 / 3000 < ratio < 1 / 300:
        hint = "is the drawing in m?" if unit == "mm" else "are the scan's coordinates in m ([coordinates] unit)?"
    else:
        hint = "check the targets' drawing coordinates and the units"
    raise RegistrationError(f"{fit.model} fit scales a metre of the surface to {per_m / drawing_unit_m:.6g} {unit} of "
                            f"the drawing, {ratio:.4g}x what the declared units say (drawing_unit {unit!r}): {hint}",
                            source=source, field="targets", details=fit.report(unit))


def _incidence(scan: Scan, entry: ScanEntry, frame: str, fit: Fit, working: Callable[[np.ndarray], np.ndarray],
               u: float) -> tuple[np.ndarray | None, str]:
    if frame == "tangent":
        assert isinstance(fit.transform, Projective)
        return cos_incidence_from_homography(fit.transform, working(scan.xy), u), "from the projective fit's plane pose"
    if frame == "pinhole":
        standoff = scan.geometry.head_distance_m
        assert standoff is not None
        return pinhole_to_surface(scan.xy, standoff, entry.tilt_deg or (0.0, 0.0))[1], "from mirror angles (pinhole)"
    standoff = scan.geometry.head_distance_m
    if entry.head_xy is not None and standoff is not None:
        head = (entry.head_xy[0] * scan.unit_scale, entry.head_xy[1] * scan.unit_scale)
        return cos_incidence_from_head(scan.xy, head, standoff), "from head position and standoff"
    return None, "not available (no angles, no head_xy with head_distance_m)"
