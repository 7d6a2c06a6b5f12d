"""Gate times against the speed-of-sound formula and hand-worked geometry."""

from __future__ import annotations

import pytest

from overlay.errors import SignalError
from overlay.signal.gate import make_gate, speed_of_sound, window_from_geometry


def test_speed_of_sound_formula() -> None:
    # c = 331.3·sqrt(1 + T/273.15) m/s (docs/references.md, Air; recomputed formula): 331.3 at 0 °C, 343.21 at 20 °C
    assert speed_of_sound(0.0) == pytest.approx(331.3, abs=1e-9)
    assert speed_of_sound(20.0) == pytest.approx(343.21, abs=0.01)
    # handbook values spread about ±0.7 m/s around 343.2 at 20 °C (docs/references.md)
    assert abs(speed_of_sound(20.0) - 343.2) < 0.7


def test_window_from_geometry_hand_worked() -> None:
    # Hand-worked: T = 20 °C → c = 331.3·sqrt(1.07322) = 343.2146 m/s.  Trigger 2 ms, source 5.0 m, head 5.2 m:
    # sound at the surface 2 ms + 5.0/343.2146 = 16.5681 ms; echo at the head + 5.2/343.2146 = 31.7190 ms.
    t0, t1 = window_from_geometry(0.002, 5.0, 5.2, 20.0)
    assert t0 == pytest.approx(0.0165681, abs=1e-7)
    assert t1 == pytest.approx(0.0317190, abs=1e-7)


def test_gate_in_samples_and_resolution() -> None:
    # 51.2 kHz: 16.5681 ms = sample 848.29 → first whole sample 849; 31.7190 ms = 1624.01 → stop 1624
    g = make_gate((0.0165681, 0.0317190), 51200.0, 2048, 400.0, "test")
    assert (g.start, g.stop) == (849, 1624)
    assert g.resolution_hz == pytest.approx(51200.0 / 775)


def test_gate_refusals_say_which_and_the_numbers() -> None:
    with pytest.raises(SignalError, match="empty window"):
        make_gate((0.010, 0.010), 51200.0, 2048, 400.0, "test")
    with pytest.raises(SignalError, match="runs past the record end at 40.000 ms"):
        make_gate((0.010, 0.045), 51200.0, 2048, 400.0, "test")
    # three periods of 400 Hz need 7.5 ms; a 5 ms window is refused
    with pytest.raises(SignalError, match=r"fewer than 3 periods .* 400 Hz \(needs 7.500 ms\)"):
        make_gate((0.010, 0.015), 51200.0, 2048, 400.0, "test")
