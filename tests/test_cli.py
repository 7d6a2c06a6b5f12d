"""Command line: exit codes of the README, one-line errors, nothing written on failure."""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from overlay.cli.main import main

from .conftest import write_bundle, write_site


def _bump_bundle(folder: Path, **kw: object) -> Path:
    """A 21 × 21 bundle with ready VER: a bump of 20 dB in the middle."""
    rr, cc = np.mgrid[0:21, 0:21]
    r2 = ((cc - 10) * 0.05) ** 2 + ((rr - 10) * 0.05) ** 2
    ver = (20.0 - 200.0 * r2).ravel()
    return write_bundle(folder, n_rows=21, n_cols=21, spacing=0.05, payload="ver", ver=ver,
                        points_header="id,row,col,x,y,ver_db", **kw)


@pytest.fixture
def site(tmp_path: Path) -> Path:
    _bump_bundle(tmp_path / "S-1")
    return write_site(tmp_path, ["S-1"])


def _files(folder: Path) -> list[Path]:
    """Output files (the per-scan cache left aside)."""
    if not folder.exists():
        return []
    return sorted(p for p in folder.rglob("*") if p.is_file() and ".overlay-cache" not in p.parts)


def test_run_writes_outputs_and_refuses_to_overwrite(site: Path, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    out = tmp_path / "out"
    assert main(["run", str(site), "--out", str(out)]) == 0
    names = {p.name for p in _files(out)} - {"overlay-report.pdf"}  # the PDF comes where Chromium is installed
    assert names == {"overlay.dxf", "overlay.gpkg", "overlay-quantities.csv", "overlay-report.txt", "overlay-report.html",
                     "site-map.png", "element-EL-1.png", "scan-S-T1.png", "defect-S-T1.watch.01.png", "dxf-preview.png"}
    stamp = {p: p.read_bytes() for p in _files(out)}
    capsys.readouterr()
    assert main(["run", str(site), "--out", str(out)]) == 5
    err = capsys.readouterr().err.strip()
    assert err.startswith("overlay: error:") and "--overwrite" in err and len(err.splitlines()) == 1
    assert {p: p.read_bytes() for p in _files(out)} == stamp  # untouched
    assert main(["run", str(site), "--out", str(out), "--overwrite"]) == 0


def test_bad_bundle_exit_3_one_line_nothing_written(site: Path, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    pts = tmp_path / "S-1" / "points.csv"
    pts.write_text(pts.read_text().replace("P3,", "P2,", 1))
    out = tmp_path / "out"
    assert main(["run", str(site), "--out", str(out)]) == 3
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "points.csv: line 5, column id: duplicate point id 'P2'" in err
    assert _files(out) == []


def test_misfit_exit_4_then_override(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    folder = _bump_bundle(tmp_path / "S-1")
    toml = folder / "scan.toml"
    toml.write_text(toml.read_text().replace("drawing = [11.0, 20.0]", "drawing = [11.05, 20.0]"))
    site = write_site(tmp_path, ["S-1"])
    out = tmp_path / "out"
    assert main(["run", str(site), "--out", str(out)]) == 4
    err = capsys.readouterr().err
    assert "fit misses B by" in err
    # the evidence follows the one error line: the fit and one residual row per target, indented
    first, *evidence = [line for line in err.splitlines() if not line.startswith(("scans", "failed", "  "))
                        or line.startswith("    ")][:1] + [line for line in err.splitlines() if line.startswith("    ")]
    assert first.startswith("overlay: error:")
    assert any(line.strip().startswith("model similarity, 4 points, RMS") for line in evidence)
    rows = [line for line in evidence if re.search(r"dx [+-]\d\.\d{4}  dy [+-]\d\.\d{4}  \|r\| \d\.\d{4}", line)]
    assert len(rows) == 4 and any(line.split()[0] == "B" for line in rows)
    assert _files(out) == []
    assert main(["run", str(site), "--out", str(out), "--accept-misfit"]) == 0
    assert "MISFIT ACCEPTED BY OVERRIDE" in (out / "overlay-report.txt").read_text()


def test_unknown_epsg_exit_4(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    _bump_bundle(tmp_path / "S-1")
    site = write_site(tmp_path, ["S-1"], extra='\n[map]\ncrs = "EPSG:999999"\norigin = [0.0, 0.0]\n')
    assert main(["run", str(site), "--out", str(tmp_path / "out")]) == 4
    assert "unknown or invalid CRS 'EPSG:999999'" in capsys.readouterr().err


def test_unknown_exporter_names_choices(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    _bump_bundle(tmp_path / "S-1")
    site = write_site(tmp_path, ["S-1"], extra='\n[outputs]\nformats = ["dxf", "kml"]\n')
    assert main(["run", str(site), "--out", str(tmp_path / "out")]) == 3
    err = capsys.readouterr().err
    assert "outputs.formats: unknown exporter 'kml'; available: dxf, geojson, gpkg, quantities-csv, shapefile" in err
    assert _files(tmp_path / "out") == []


def test_missing_site_file_exit_3(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    assert main(["run", str(tmp_path / "nope.toml")]) == 3
    assert "nope.toml: file not found" in capsys.readouterr().err


def test_ready_ver_run_finds_the_bump(site: Path, tmp_path: Path) -> None:
    out = tmp_path / "out"
    assert main(["run", str(site), "--out", str(out), "-q"]) == 0
    import csv

    rows = list(csv.DictReader((out / "overlay-quantities.csv").open()))
    # 20 − 200 r² ≥ 6 dB ↔ r ≤ 0.2646 m: area π·0.07 = 0.2199 m² (hand-worked), within 2 %
    watch = [r for r in rows if r["row_kind"] == "zone" and r["class"] == "watch"]
    assert len(watch) == 1 and watch[0]["element"] == "EL-1"
    assert float(watch[0]["contour_area_m2"]) == pytest.approx(np.pi * 0.07, rel=0.02)


def test_describe(bundle: Path, capsys: pytest.CaptureFixture) -> None:
    assert main(["describe", str(bundle)]) == 0
    out = capsys.readouterr().out
    assert "scan S-T1" in out and "6 rows x 8 cols" in out and "targets     4" in out and "gate" in out
    manifest = bundle / "scan.toml"
    manifest.write_text(manifest.read_text().replace('element = "EL-1"', 'element = "EL-1"\nnote = "west bay, wet patch"'))
    assert main(["describe", str(bundle)]) == 0
    assert "note        west bay, wet patch" in capsys.readouterr().out  # the bundle's own note is shown


def test_usage_errors_exit_2(capsys: pytest.CaptureFixture) -> None:
    assert main([]) == 2
    with pytest.raises(SystemExit) as info:
        main(["run"])
    assert info.value.code == 2


def test_console_script_and_module_entry() -> None:
    script = str(Path(sys.executable).parent / "overlay")
    for cmd in ([script, "--version"], [sys.executable, "-m", "overlay", "--version"]):
        done = subprocess.run(cmd, capture_output=True, text=True, check=False)
        assert done.returncode == 0 and done.stdout.startswith("overlay "), done
    done = subprocess.run([script, "exporters"], capture_output=True, text=True, check=False)
    assert done.returncode == 0 and "quantities-csv" in done.stdout


@pytest.mark.parametrize(
    "damage, fragment",
    [
        (lambda f: np.save(f / "records.npy", np.zeros((48, 1024), dtype=np.int32)), "dtype must be float32 or float64"),
        (lambda f: np.save(f / "records.npy", np.zeros((40, 1024), dtype=np.float32)), "points.csv has 48"),
        (lambda f: np.save(f / "records.npy", np.zeros((48, 2, 3, 4), dtype=np.float32)), "shape must be"),
        (lambda f: (f / "scan.toml").write_text((f / "scan.toml").read_text().replace('"surface"', '"laser"')), "coordinates.kind"),
        (lambda f: (f / "points.csv").unlink(), "points.csv: file not found"),
    ],
)
def test_bad_records_bundles_exit_3_and_write_nothing(tmp_path: Path, capsys: pytest.CaptureFixture, damage, fragment: str) -> None:
    folder = write_bundle(tmp_path / "S-1")
    damage(folder)
    site = write_site(tmp_path, ["S-1"])
    assert main(["run", str(site), "--out", str(tmp_path / "out")]) == 3
    err = capsys.readouterr().err.strip()
    assert fragment in err and len(err.splitlines()) == 1
    assert _files(tmp_path / "out") == []


def test_all_points_invalid_exit_3(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    folder = write_bundle(tmp_path / "S-1", records=np.full((48, 1024), np.nan, dtype=np.float32))
    site = write_site(tmp_path, ["S-1"])
    assert main(["run", str(site), "--out", str(tmp_path / "out")]) == 3
    assert "no valid point" in capsys.readouterr().err
    assert folder.exists() and _files(tmp_path / "out") == []


def test_monuments_fit_places_the_drawing(tmp_path: Path) -> None:
    # two monuments 10 m apart along drawing +x, mapped due north: bearing 0°, so drawing (0, 1) maps west
    _bump_bundle(tmp_path / "S-1")
    extra = (
        '\n[map]\ncrs = "EPSG:25832"\n'
        '[[map.monuments]]\nname = "M1"\ndrawing = [0.0, 0.0]\nmap = [512000.0, 5712000.0]\n'
        '[[map.monuments]]\nname = "M2"\ndrawing = [10.0, 0.0]\nmap = [512000.0, 5712010.0]\n'
    )
    site = write_site(tmp_path, ["S-1"], extra=extra)
    out = tmp_path / "out"
    assert main(["run", str(site), "--out", str(out), "-q"]) == 0
    import pyogrio

    ext = pyogrio.read_dataframe(out / "overlay.gpkg", layer="scan_extents")
    # drawing x 10.0..11.0, y 20.0..21.0 → map E 512000 − (20..21), N 5712000 + (10..11)
    minx, miny, maxx, maxy = ext.total_bounds
    assert (minx, maxx) == pytest.approx((511979.0, 511980.0), abs=1e-6)
    assert (miny, maxy) == pytest.approx((5712010.0, 5712011.0), abs=1e-6)
    assert "monuments" in (out / "overlay-report.txt").read_text()


def test_scattered_points_without_row_col_run_end_to_end(tmp_path: Path) -> None:
    # jittered points, no row/col: resampled and contoured; 20 − 200 r² ≥ 6 dB ↔ area π·0.07 m² (2 %)
    folder = tmp_path / "S-1"
    rng = np.random.default_rng(3)
    rr, cc = np.mgrid[0:31, 0:31]
    xy = np.column_stack([cc.ravel(), rr.ravel()]) * 0.05 + rng.uniform(-0.015, 0.015, (961, 2))
    ver = 20.0 - 200.0 * ((xy[:, 0] - 0.75) ** 2 + (xy[:, 1] - 0.75) ** 2)
    write_bundle(folder, n_rows=31, n_cols=31, spacing=0.05, payload="ver", ver=ver, points_header="id,x,y,ver_db")
    lines = (folder / "points.csv").read_text().splitlines()
    lines = [lines[0]] + [f"P{k},{x:.5f},{y:.5f},{v:.4f}" for k, ((x, y), v) in enumerate(zip(xy, ver))]
    (folder / "points.csv").write_text("\n".join(lines) + "\n")
    from overlay.io.site import read_site
    from overlay.job import run_site

    result = run_site(read_site(write_site(tmp_path, ["S-1"])))
    (watch,) = [z for z in result.zones if z.class_name == "watch"]
    assert watch.area_m2 == pytest.approx(np.pi * 0.07, rel=0.02)


def test_collinear_targets_for_an_affine_fit_exit_4_nothing_written(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    folder = _bump_bundle(tmp_path / "S-1")
    toml = folder / "scan.toml"
    text = toml.read_text()
    text = text[: text.index("[[targets]]")] + "".join(
        f'[[targets]]\nname = "L{k}"\nscanner = [{0.2 * k}, {0.1 * k}]\ndrawing = [{10 + 0.2 * k}, {20 + 0.1 * k}]\n\n' for k in range(4))
    toml.write_text(text)
    site = write_site(tmp_path, ["S-1"], extra="")
    site.write_text(site.read_text().replace("tolerance_m = 0.01", "tolerance_m = 0.01\nmodel = \"affine\""))
    assert main(["run", str(site), "--out", str(tmp_path / "out")]) == 4
    err = capsys.readouterr().err
    assert "L0, L1, L2, L3 are (nearly) collinear" in err and "S-1: targets:" in err
    assert _files(tmp_path / "out") == []


def _run_with_stderr(site: Path, out: Path, *, terminal: bool) -> str:
    """Run the console script with stderr on a pipe or on a pseudo-terminal; what it wrote there."""
    cmd = [str(Path(sys.executable).parent / "overlay"), "run", str(site), "--out", str(out), "--no-pdf"]
    if not terminal:
        done = subprocess.run(cmd, capture_output=True, text=True, check=True)
        return done.stderr
    import fcntl  # POSIX only, like the test
    import pty
    import struct
    import termios

    leader, follower = pty.openpty()
    fcntl.ioctl(follower, termios.TIOCSWINSZ, struct.pack("HHHH", 24, 120, 0, 0))  # a 120-column terminal
    chunks = []
    try:
        proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=follower)
        os.close(follower)  # the child holds its own copy; read while it runs, so it never blocks on a full pty
        while True:
            try:
                data = os.read(leader, 65536)
            except OSError:  # Linux: EIO once the child has exited and the output is drained
                break
            if not data:
                break
            chunks.append(data)
        assert proc.wait(timeout=120) == 0
    finally:
        os.close(leader)
    return b"".join(chunks).decode(errors="replace")


@pytest.mark.skipif(sys.platform == "win32", reason="needs a POSIX pseudo-terminal")
def test_progress_bars_on_a_terminal_only(tmp_path: Path) -> None:
    # a records bundle so the per-point bar has work; the bars go to stderr on a terminal, nothing off it
    write_bundle(tmp_path / "S-1")
    site = write_site(tmp_path, ["S-1"])
    quiet = _run_with_stderr(site, tmp_path / "out-pipe", terminal=False)
    assert "scans" not in quiet and "pictures" not in quiet and "\r" not in quiet
    shown = _run_with_stderr(site, tmp_path / "out-tty", terminal=True)
    assert "scans" in shown and "points" in shown and "48" in shown and "pictures" in shown


def test_quiet_prints_only_the_paths_written(site: Path, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    out = tmp_path / "out"
    assert main(["run", str(site), "--out", str(out), "-q", "--no-pictures"]) == 0
    printed = capsys.readouterr().out.splitlines()
    assert printed and all(Path(line).exists() for line in printed), printed
    assert {Path(p).name for p in printed} == {p.name for p in _files(out)}


def test_demo_offers_no_overwrite_option(capsys: pytest.CaptureFixture) -> None:
    # a demo rerun always replaces its folder, so an --overwrite option would be a promise with no effect
    with pytest.raises(SystemExit):
        main(["demo", "--help"])
    assert "--overwrite" not in capsys.readouterr().out
    with pytest.raises(SystemExit):
        main(["run", "--help"])
    assert "--overwrite" in capsys.readouterr().out


def test_site_file_errors_name_the_line(site: Path, capsys: pytest.CaptureFixture) -> None:
    text = site.read_text()
    site.write_text(text.replace("tolerance_m = 0.01", "tolerance_m = -1"))
    assert main(["run", str(site), "--out", str(site.parent / "out")]) == 3
    err = capsys.readouterr().err.strip()
    line = text.splitlines().index("tolerance_m = 0.01") + 1
    assert f"site.toml: line {line}, registration.tolerance_m: must be positive" in err, err


def test_parsing_the_command_line_imports_no_heavy_library() -> None:
    # `overlay --help` and `--version` start at once: the numeric and GIS libraries are imported when a
    # command runs, not to parse its arguments (start-up time itself is measured in benchmarks/, not here)
    import subprocess
    import sys

    code = ("import sys, overlay, overlay.cli.main as m; m.build_parser(); "
            "print(sorted(x for x in ('numpy', 'scipy', 'pandas', 'geopandas', 'matplotlib', 'shapely', 'pyproj', "
            "'ezdxf', 'pyogrio') if x in sys.modules))")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert done.stdout.strip() == "[]", done.stdout
