"""Frames and the transforms between them: scanner → drawing → map.

Transforms are frozen dataclasses built by named factories (``from_targets``,
``from_placement``, ``from_monuments``) so they pickle and can be rebuilt in a
worker.  Every fit reports per-target residuals and RMS; the caller decides
against a tolerance.  CRS input of any usual form goes through ``to_crs``.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np
import pyproj
import shapely
from pyproj.exceptions import CRSError

from .errors import CRSCheckError, RegistrationError, RegistrationWarning

UNIT_TO_M = {"m": 1.0, "mm": 0.001}


@dataclass(frozen=True)
class Similarity:
    """x' = a·x − b·y + tx,  y' = b·x + a·y + ty  (rotation, uniform scale, shift)."""

    a: float
    b: float
    tx: float
    ty: float

    @property
    def scale(self) -> float:
        return math.hypot(self.a, self.b)

    @property
    def rotation_deg(self) -> float:
        """Counter-clockwise rotation of the source axes in the target frame."""
        return math.degrees(math.atan2(self.b, self.a))

    def apply(self, xy: np.ndarray) -> np.ndarray:
        xy = np.asarray(xy, dtype=np.float64)
        x, y = xy[..., 0], xy[..., 1]
        return np.stack([self.a * x - self.b * y + self.tx, self.b * x + self.a * y + self.ty], axis=-1)

    def apply_geometry(self, geom: Any) -> Any:
        """The same transform on a shapely geometry (any type)."""
        return shapely.transform(geom, self.apply)

    def then(self, other: "Similarity") -> "Similarity":
        """This transform followed by ``other``."""
        return Similarity(
            a=other.a * self.a - other.b * self.b,
            b=other.b * self.a + other.a * self.b,
            tx=other.a * self.tx - other.b * self.ty + other.tx,
            ty=other.b * self.tx + other.a * self.ty + other.ty,
        )

    def params(self) -> dict[str, float]:
        return {"a": self.a, "b": self.b, "tx": self.tx, "ty": self.ty, "scale": self.scale, "rotation_deg": self.rotation_deg}


@dataclass(frozen=True)
class Fit:
    """A fitted transform with what it costs: residuals per control point, RMS."""

    transform: Similarity
    model: str
    names: tuple[str, ...]
    residuals: np.ndarray  # (n, 2) target − fitted, target units

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
        lines = [f"model {self.model}, {len(self.names)} points, RMS {self.rms:.4f} {unit}"]
        for name, (dx, dy), e in zip(self.names, self.residuals, self.errors):
            lines.append(f"  {name:<12} dx {dx:+.4f}  dy {dy:+.4f}  |r| {e:.4f} {unit}")
        return lines


def fit_similarity(src: np.ndarray, dst: np.ndarray, names: Sequence[str], *, what: str = "targets") -> Fit:
    """Least-squares similarity taking ``src`` onto ``dst`` (each (n, 2)); needs two distinct points."""
    src = np.asarray(src, dtype=np.float64)
    dst = np.asarray(dst, dtype=np.float64)
    n = len(src)
    if n < 2:
        raise RegistrationError(
            f"similarity fit needs at least 2 {what}, got {n} ({', '.join(names) or 'none'})", field=what
        )
    # centre both sets so the normal equations are well conditioned at map-size coordinates
    cs, cd = src.mean(axis=0), dst.mean(axis=0)
    s, d = src - cs, dst - cd
    denom = float(np.sum(s**2))
    spread = math.sqrt(denom / n)
    if spread <= 1e-9 * max(1.0, float(np.abs(src).max())):
        raise RegistrationError(f"{what} {', '.join(names)} coincide; a fit needs distinct points", field=what)
    a = float(np.sum(s[:, 0] * d[:, 0] + s[:, 1] * d[:, 1]) / denom)
    b = float(np.sum(s[:, 0] * d[:, 1] - s[:, 1] * d[:, 0]) / denom)
    tx = float(cd[0] - (a * cs[0] - b * cs[1]))
    ty = float(cd[1] - (b * cs[0] + a * cs[1]))
    t = Similarity(a, b, tx, ty)
    return Fit(t, "similarity", tuple(names), dst - t.apply(src))


def check_fit(fit: Fit, tolerance: float, unit: str, *, accept: bool = False, source: str | None = None) -> bool:
    """Refuse a fit whose worst residual exceeds ``tolerance`` unless ``accept``; return whether it passed."""
    name, err = fit.worst
    if err <= tolerance:
        return True
    msg = f"{fit.model} fit misses {name} by {err:.4f} {unit} (tolerance {tolerance:g} {unit}, RMS {fit.rms:.4f})"
    if not accept:
        raise RegistrationError(msg + "; check the target coordinates or accept the misfit explicitly", source=source, field="targets")
    warnings.warn(f"{source + ': ' if source else ''}{msg}; accepted by override", RegistrationWarning, stacklevel=2)
    return False


def from_placement(origin: tuple[float, float], bearing_deg: float, scale: float, drawing_unit: str) -> Similarity:
    """Drawing → map from the map position of the drawing origin and the bearing of the drawing's +x axis.

    The bearing is measured clockwise from grid north; the drawing's +y axis
    is 90° counter-clockwise from +x (a right-handed drawing).
    """
    k = scale * UNIT_TO_M[drawing_unit]
    beta = math.radians(bearing_deg)
    return Similarity(a=k * math.sin(beta), b=k * math.cos(beta), tx=origin[0], ty=origin[1])


def to_crs(value: Any, *, source: str | None = None, field: str | None = "crs") -> pyproj.CRS:
    """One normaliser for every way of naming a CRS: EPSG int, "EPSG:n", WKT, PROJ JSON, pyproj.CRS."""
    try:
        return pyproj.CRS.from_user_input(value)
    except (CRSError, TypeError, ValueError) as exc:
        raise CRSCheckError(f"unknown or invalid CRS {value!r} ({exc})", source=source, field=field) from exc


def check_map_crs(crs: pyproj.CRS, site_xy: np.ndarray, *, source: str | None = None) -> None:
    """The map CRS must be projected, in metres, and (warning otherwise) cover the site."""
    label = crs.to_string()
    if not crs.is_projected:
        raise CRSCheckError(f"{label} is not a projected CRS; the map frame needs one in metres", source=source, field="map.crs")
    units = {ax.unit_name for ax in crs.axis_info}
    if not units <= {"metre", "meter", "m"}:
        raise CRSCheckError(f"{label} has axis units {', '.join(sorted(units))}; metres are required", source=source, field="map.crs")
    area = crs.area_of_use
    if area is None or len(site_xy) == 0:
        return
    to_geo = pyproj.Transformer.from_crs(crs, crs.geodetic_crs, always_xy=True)
    lon, lat = to_geo.transform(site_xy[:, 0], site_xy[:, 1])
    inside = (lon >= area.west) & (lon <= area.east) & (lat >= area.south) & (lat <= area.north)
    if not np.all(inside):
        warnings.warn(
            f"{source + ': ' if source else ''}site at lon {np.mean(lon):.5f}, lat {np.mean(lat):.5f} lies outside "
            f"the area of use of {label} ({area.name}: {area.west:g}..{area.east:g} E, {area.south:g}..{area.north:g} N)",
            RegistrationWarning,
            stacklevel=2,
        )


def transform_xy(xy: np.ndarray, src: Any, dst: Any) -> np.ndarray:
    """Coordinates from one CRS to another, x/y (easting/northing, lon/lat) order always."""
    t = pyproj.Transformer.from_crs(to_crs(src), to_crs(dst), always_xy=True)
    x, y = t.transform(np.asarray(xy)[..., 0], np.asarray(xy)[..., 1], errcheck=True)
    return np.stack([x, y], axis=-1)
