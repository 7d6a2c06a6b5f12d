"""Linear referencing: station and offset along an alignment, as tunnels and bridges locate defects.

Station = start station + distance along the alignment polyline to the foot of
the perpendicular; offset = signed distance from it, positive to the left of
the direction of increasing station.  Curves are given as densified polylines.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import shapely
from shapely.geometry import LineString


@dataclass(frozen=True)
class Alignment:
    line: LineString
    start_station_m: float = 0.0

    @classmethod
    def from_points(cls, points: list[tuple[float, float]], start_station_m: float = 0.0) -> "Alignment":
        return cls(LineString(points), start_station_m)

    def station_offset(self, xy: np.ndarray, unit_m: float = 1.0) -> tuple[np.ndarray, np.ndarray]:
        """Station and offset (m) of each point ``xy`` (in the alignment's frame and unit)."""
        xy = np.atleast_2d(np.asarray(xy, dtype=np.float64))
        pts = shapely.points(xy)
        along = shapely.line_locate_point(self.line, pts)
        foot = shapely.get_coordinates(shapely.line_interpolate_point(self.line, along))
        ahead = shapely.get_coordinates(shapely.line_interpolate_point(self.line, np.minimum(along + 1e-6 * self.line.length, self.line.length)))
        behind = shapely.get_coordinates(shapely.line_interpolate_point(self.line, np.maximum(along - 1e-6 * self.line.length, 0.0)))
        tangent = ahead - behind
        d = xy - foot
        side = np.sign(tangent[:, 0] * d[:, 1] - tangent[:, 1] * d[:, 0])
        offset = side * np.hypot(d[:, 0], d[:, 1])
        return self.start_station_m + along * unit_m, offset * unit_m

    def station_range(self, geom: object, unit_m: float = 1.0) -> tuple[float, float]:
        """Smallest and largest station of a geometry's vertices."""
        st, _ = self.station_offset(shapely.get_coordinates(geom), unit_m)
        return float(st.min()), float(st.max())
