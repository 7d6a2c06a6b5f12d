"""The units the tool reads, once: lengths (drawings, scan coordinates) and velocities (records, spectra)."""

from __future__ import annotations

LENGTH_TO_M = {"m": 1.0, "mm": 1e-3}  # metres per unit
VELOCITY_TO_MPS = {"m/s": 1.0, "mm/s": 1e-3}  # metres per second per unit
