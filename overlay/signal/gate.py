"""The time window of each record that holds the surface response and nothing else.

Before the sound reaches the surface there is only noise; once the echo from
the surface reaches the vibrometer head, the head itself is shaken by sound and
the record no longer shows the surface alone.  The window between the two is
what the spectra stage may use.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

from overlay.errors import SignalError

if TYPE_CHECKING:
    from overlay.io.bundle import Scan

MIN_PERIODS = 3.0


def speed_of_sound(air_temperature_c: float) -> float:
    """Speed of sound in dry air, m/s: c = 331.3·sqrt(1 + T/273.15)."""
    return 331.3 * math.sqrt(1.0 + air_temperature_c / 273.15)


@dataclass(frozen=True)
class Gate:
    """A window in samples ``[start, stop)`` and how it was chosen."""

    start: int
    stop: int
    sample_rate_hz: float
    how: str

    @property
    def n(self) -> int:
        return self.stop - self.start

    @property
    def start_s(self) -> float:
        return self.start / self.sample_rate_hz

    @property
    def stop_s(self) -> float:
        return self.stop / self.sample_rate_hz

    @property
    def resolution_hz(self) -> float:
        """Frequency resolution the window allows, 1/T."""
        return self.sample_rate_hz / self.n

    def describe(self) -> str:
        return (
            f"{self.start_s * 1e3:.2f}-{self.stop_s * 1e3:.2f} ms ({self.n} samples, "
            f"resolution {self.resolution_hz:.1f} Hz, {self.how})"
        )


def window_from_geometry(
    trigger_s: float, source_distance_m: float, head_distance_m: float, air_temperature_c: float
) -> tuple[float, float]:
    """Seconds after the first sample: (sound reaches the surface, its echo reaches the head)."""
    c = speed_of_sound(air_temperature_c)
    arrive = trigger_s + source_distance_m / c
    return arrive, arrive + head_distance_m / c


def make_gate(
    window_s: tuple[float, float],
    sample_rate_hz: float,
    n_samples: int,
    band_low_hz: float,
    how: str,
    source: str | None = None,
) -> Gate:
    """Turn a window in seconds into whole samples inside it, refusing unusable windows."""
    t0, t1 = window_s
    start = max(0, math.ceil(t0 * sample_rate_hz - 1e-9))
    stop = math.floor(t1 * sample_rate_hz + 1e-9)
    field = "gate"
    if stop <= start:
        raise SignalError(f"empty window {t0 * 1e3:.3f}-{t1 * 1e3:.3f} ms ({how})", source=source, field=field)
    if stop > n_samples:
        raise SignalError(
            f"window {t0 * 1e3:.3f}-{t1 * 1e3:.3f} ms ({how}) runs past the record end at "
            f"{n_samples / sample_rate_hz * 1e3:.3f} ms",
            source=source,
            field=field,
        )
    gate = Gate(start, stop, sample_rate_hz, how)
    if band_low_hz > 0:
        needed = MIN_PERIODS / band_low_hz
        if gate.n / sample_rate_hz < needed:
            raise SignalError(
                f"window of {gate.n / sample_rate_hz * 1e3:.3f} ms ({how}) holds fewer than "
                f"{MIN_PERIODS:g} periods of the band's lowest frequency {band_low_hz:g} Hz "
                f"(needs {needed * 1e3:.3f} ms)",
                source=source,
                field=field,
            )
    return gate


def choose_gate(scan: "Scan") -> Gate:
    """The explicit gate if the bundle gives one, else the window derived from the geometry."""
    assert scan.records is not None and scan.sample_rate_hz is not None and scan.band_hz is not None
    src = str(scan.path / "scan.toml")
    if scan.gate_s is not None:
        window, how = scan.gate_s, "explicit gate_s"
    else:
        g = scan.geometry
        if g.source_distance_m is None or g.head_distance_m is None:
            raise SignalError(
                "no gate: give [records].gate_s or [geometry].source_distance_m and head_distance_m", source=src, field="gate"
            )
        window = window_from_geometry(scan.trigger_s, g.source_distance_m, g.head_distance_m, g.air_temperature_c)
        how = f"from geometry at {g.air_temperature_c:g} °C"
    return make_gate(window, scan.sample_rate_hz, int(scan.records.shape[-1]), scan.band_hz[0], how, source=src)
