"""Plane transforms between frames, as frozen dataclasses (they pickle and rebuild in a worker).

* Similarity: x' = a·x − b·y + tx, y' = b·x + a·y + ty (rotation, uniform scale, shift).
* Affine (EPSG method 9624 form): x' = A0 + A1·x + A2·y, y' = B0 + B1·x + B2·y.
* Projective: x' = (h11·x + h12·y + h13)/(h31·x + h32·y + 1), y' likewise with h21..h23 —
  the exact model for a plane seen through a pinhole, e.g. mirror-angle tangents onto a wall.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import shapely


class _Plane:
    def apply(self, xy: np.ndarray) -> np.ndarray:  # pragma: no cover - overridden
        raise NotImplementedError

    def apply_geometry(self, geom: Any) -> Any:
        """The same transform on a shapely geometry (any type)."""
        return shapely.transform(geom, self.apply)

    def jacobian_det(self, xy: np.ndarray, h: float = 1e-6) -> np.ndarray:
        """Local area scale d(x', y')/d(x, y) at each point (numerically; exact for linear models)."""
        xy = np.atleast_2d(np.asarray(xy, dtype=np.float64))
        ex = self.apply(xy + [h, 0.0]) - self.apply(xy - [h, 0.0])
        ey = self.apply(xy + [0.0, h]) - self.apply(xy - [0.0, h])
        return (ex[:, 0] * ey[:, 1] - ex[:, 1] * ey[:, 0]) / (4 * h * h)

    def local_scale(self, xy: np.ndarray) -> float:
        """Length scale at the centre of ``xy``: sqrt of the area scale there."""
        c = np.mean(np.atleast_2d(xy), axis=0)
        return float(np.sqrt(abs(self.jacobian_det(c[None, :])[0])))


@dataclass(frozen=True)
class Similarity(_Plane):
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

    def inverse(self) -> "Similarity":
        """The transform back: x = (a·(x' − tx) + b·(y' − ty)) / (a² + b²), likewise y."""
        k = self.a * self.a + self.b * self.b
        a, b = self.a / k, -self.b / k
        return Similarity(a=a, b=b, tx=-(a * self.tx - b * self.ty), ty=-(b * self.tx + a * self.ty))

    def params(self) -> dict[str, float]:
        return {"a": self.a, "b": self.b, "tx": self.tx, "ty": self.ty, "scale": self.scale,
                "rotation_deg": self.rotation_deg}


@dataclass(frozen=True)
class Affine(_Plane):
    a0: float
    a1: float
    a2: float
    b0: float
    b1: float
    b2: float

    @property
    def scale(self) -> float:
        return math.sqrt(abs(self.a1 * self.b2 - self.a2 * self.b1))

    def apply(self, xy: np.ndarray) -> np.ndarray:
        xy = np.asarray(xy, dtype=np.float64)
        x, y = xy[..., 0], xy[..., 1]
        return np.stack([self.a0 + self.a1 * x + self.a2 * y, self.b0 + self.b1 * x + self.b2 * y], axis=-1)

    def params(self) -> dict[str, float]:
        return {"A0": self.a0, "A1": self.a1, "A2": self.a2, "B0": self.b0, "B1": self.b1, "B2": self.b2}


@dataclass(frozen=True)
class Projective(_Plane):
    h: tuple[float, ...]  # h11 h12 h13 h21 h22 h23 h31 h32 (h33 = 1)

    @property
    def matrix(self) -> np.ndarray:
        return np.array([*self.h, 1.0]).reshape(3, 3)

    def apply(self, xy: np.ndarray) -> np.ndarray:
        xy = np.asarray(xy, dtype=np.float64)
        hm = self.matrix
        x, y = xy[..., 0], xy[..., 1]
        w = hm[2, 0] * x + hm[2, 1] * y + hm[2, 2]
        return np.stack([(hm[0, 0] * x + hm[0, 1] * y + hm[0, 2]) / w, (hm[1, 0] * x + hm[1, 1] * y + hm[1, 2]) / w], axis=-1)

    def params(self) -> dict[str, float]:
        names = ("h11", "h12", "h13", "h21", "h22", "h23", "h31", "h32")
        return dict(zip(names, self.h))


Transform = Similarity | Affine | Projective
