"""The energy stage inside a run: gate refusals, quality floors, references, incidence (exit codes of the README)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from overlay.cli.main import main
from overlay.io.site import read_site
from overlay.job import run_site

from .conftest import write_bundle, write_site

FS = 25600.0


def _gate_bundle(tmp_path: Path, gate: str) -> Path:
    folder = write_bundle(tmp_path / "S-1", fs=FS, n_samples=1024)
    toml = folder / "scan.toml"
    toml.write_text(toml.read_text().replace(f"gate_s = [0.0, {1024 / FS}]", f"gate_s = {gate}"))
    return write_site(tmp_path, ["S-1"])


@pytest.mark.parametrize(
    "gate, fragment",
    [
        ("[0.030, 0.050]", "runs past the record end at 40.000 ms"),  # 1024 samples at 25.6 kHz = 40 ms
        ("[0.010, 0.015]", "fewer than 3 periods of the band's lowest frequency 400 Hz (needs 7.500 ms)"),
        ("[0.01000, 0.01002]", "empty window"),
    ],
)
def test_unusable_gate_exit_3(tmp_path: Path, capsys: pytest.CaptureFixture, gate: str, fragment: str) -> None:
    site = _gate_bundle(tmp_path, gate)
    assert main(["run", str(site), "--out", str(tmp_path / "out")]) == 3
    err = capsys.readouterr().err
    assert fragment in err and "gate" in err
    assert not (tmp_path / "out").exists()


def test_no_gate_and_no_geometry_exit_3(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    folder = write_bundle(tmp_path / "S-1")
    toml = folder / "scan.toml"
    toml.write_text("\n".join(line for line in toml.read_text().splitlines() if not line.startswith("gate_s")))
    site = write_site(tmp_path, ["S-1"])
    assert main(["run", str(site), "--out", str(tmp_path / "out")]) == 3
    assert "no gate: give [records].gate_s or [geometry]" in capsys.readouterr().err


def test_zero_reference_energy_exit_3(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    write_bundle(tmp_path / "S-1", records=np.zeros((48, 1024), dtype=np.float32))
    site = write_site(tmp_path, ["S-1"])
    assert main(["run", str(site), "--out", str(tmp_path / "out")]) == 3
    assert "reference energy is 0" in capsys.readouterr().err


def _level_bundle(tmp_path: Path) -> Path:
    folder = write_bundle(tmp_path / "S-1")
    pts = folder / "points.csv"
    lines = pts.read_text().splitlines()
    lines = [lines[0] + ",signal_level"] + [ln + (",0.05" if k < 3 else ",0.9") for k, ln in enumerate(lines[1:])]
    pts.write_text("\n".join(lines) + "\n")
    return folder


def test_low_signal_points_are_invalid_with_reason(tmp_path: Path) -> None:
    _level_bundle(tmp_path)
    site = read_site(write_site(tmp_path, ["S-1"], extra="\n[quality]\nmin_signal_level = 0.2\n"))
    s = run_site(site).scans[0]
    assert s.valid.sum() == 45
    assert list(s.invalid_reason[:3]) == ["low signal"] * 3


def test_snr_floor_marks_flat_points(tmp_path: Path) -> None:
    rng = np.random.default_rng(0)
    rec = rng.normal(0, 1e-3, (48, 1024)).astype(np.float32)
    t = np.arange(1024) / FS
    rec[10:] += (0.05 * np.sin(2 * np.pi * 2000.0 * t)).astype(np.float32)  # a clear peak on most points
    write_bundle(tmp_path / "S-1", records=rec)
    site = read_site(write_site(tmp_path, ["S-1"], extra="\n[quality]\nmin_snr_db = 20.0\n"))
    s = run_site(site).scans[0]
    assert set(s.invalid_reason[:10]) == {"low SNR"} and s.valid[10:].all()
    assert np.nanmin(s.snr_db[10:]) > 20.0


def test_region_reference_from_the_site_file(tmp_path: Path) -> None:
    rng = np.random.default_rng(1)
    rec = rng.normal(0, 1e-3, (48, 1024)).astype(np.float32)
    rec[:8] *= 10.0  # the first grid row rings 20 dB louder
    write_bundle(tmp_path / "S-1", records=rec)
    # drawing frame = scanner + (10, 20): the healthy region covers rows 3..5 only
    extra = 'healthy_region = [[9.9, 20.25], [10.8, 20.25], [10.8, 20.6], [9.9, 20.6]]\n'
    text = write_site(tmp_path, ["S-1"], extra="\n[energy]\nreference = \"region\"\n").read_text()
    text = text.replace('bundle = "S-1"\n', 'bundle = "S-1"\n' + extra)
    (tmp_path / "site.toml").write_text(text)
    s = run_site(read_site(tmp_path / "site.toml")).scans[0]
    assert s.reference.method == "region" and s.reference.n_points == 24
    assert np.median(s.ver_db[8:]) == pytest.approx(0.0, abs=0.5)
    assert np.median(s.ver_db[:8]) == pytest.approx(20.0, abs=1.0)


def test_incidence_correction_applied_and_recorded(tmp_path: Path) -> None:
    folder = write_bundle(tmp_path / "S-1")
    toml = folder / "scan.toml"
    toml.write_text(toml.read_text() + "\n[geometry]\nhead_distance_m = 1.0\nsource_distance_m = 1.0\n")
    text = write_site(tmp_path, ["S-1"]).read_text().replace('bundle = "S-1"\n', 'bundle = "S-1"\nhead_xy = [0.0, 0.0]\n')
    (tmp_path / "site.toml").write_text(text)
    on = run_site(read_site(tmp_path / "site.toml")).scans[0]
    (tmp_path / "site.toml").write_text(text + "\n[energy]\nincidence_correction = false\n")
    off = run_site(read_site(tmp_path / "site.toml")).scans[0]
    assert on.incidence.startswith("applied") and off.incidence == "off"
    # the far corner (0.7, 0.5) m from the head at 1 m standoff: cos²θ = 1/(1 + 0.74); energy × 1.74
    k = 47
    assert on.energy[k] / off.energy[k] == pytest.approx(1.74, rel=1e-9)
    assert on.incidence_deg[k] == pytest.approx(np.degrees(np.arctan(np.hypot(0.7, 0.5))), abs=1e-9)
