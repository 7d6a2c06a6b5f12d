"""Refusals: the owner's files are never damaged, a user's mistake is never silent, bad input is one
clear line with its exit code (3 bad input, 4 registration or CRS, 5 output conflict), and a failed
or interrupted run leaves nothing behind.  Each case below was found to misbehave before (a
traceback, a wrong number with exit 0, or a damaged owner's file)."""

from __future__ import annotations

import os
import pickle
import shutil
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import geopandas as gpd
import numpy as np
import pytest
import shapely

from overlay.cli.main import main

from .conftest import write_bundle, write_site

MAP = '\n[map]\ncrs = "EPSG:25832"\norigin = [500000.0, 5700000.0]\nbearing_deg = 90.0\n'


def bump(folder: Path, **kw: object) -> Path:
    """A 21 × 21 bundle with ready VER, a 20 dB bump in the middle; drawing = scanner + (10, 20) m."""
    rr, cc = np.mgrid[0:21, 0:21]
    ver = (20.0 - 200.0 * (((cc - 10) * 0.05) ** 2 + ((rr - 10) * 0.05) ** 2)).ravel()
    return write_bundle(folder, n_rows=21, n_cols=21, spacing=0.05, payload="ver", ver=ver,
                        points_header="id,row,col,x,y,ver_db", **kw)


def owner_site(tmp: Path, extra: str = "", basename: str = "overlay") -> tuple[Path, Path]:
    """A site with a map frame and the owner's asset GeoPackage (GeoPackage 1.2, one panel EL-1) to merge into."""
    bump(tmp / "S-1")
    assets = tmp / "assets.gpkg"
    panel = shapely.box(500009.5, 5700019.5, 500011.5, 5700021.5)
    gpd.GeoDataFrame({"asset_id": ["EL-1"]}, geometry=[panel], crs=25832).to_file(
        assets, layer="panels", driver="GPKG", VERSION="1.2")
    text = MAP + ('\n[elements]\nsource = "assets.gpkg"\nlayer = "panels"\nid_field = "asset_id"\n'
                  '\n[merge]\nfindings_layer = "findings"\n') + f'\n[outputs]\nbasename = "{basename}"\n' + extra
    return write_site(tmp, ["S-1"], extra=text), assets


def files(folder: Path) -> list[Path]:
    """Every file under ``folder`` but the per-scan cache."""
    if not folder.exists():
        return []
    return sorted(p for p in folder.rglob("*") if p.is_file() and ".overlay-cache" not in p.parts)


def err_line(capsys: pytest.CaptureFixture) -> str:
    """The one error line; any evidence below it (a fit's residual table) is indented."""
    first, *evidence = capsys.readouterr().err.strip("\n").splitlines()
    assert first.startswith("overlay: error:"), first
    assert all(line.startswith("    ") for line in evidence), evidence
    return first


def run(site: Path, out: Path, *extra: str) -> int:
    return main(["run", str(site), "--out", str(out), "--no-pictures", *extra])


# --- the owner's files ---------------------------------------------------------------------------

def test_an_output_that_is_the_owners_file_is_refused(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    # basename "assets" with --out the site folder: our GeoPackage would replace the owner's register
    site, assets = owner_site(tmp_path, basename="assets")
    before = assets.read_bytes()
    assert run(site, tmp_path, "--overwrite") == 5
    err = err_line(capsys)
    assert "assets.gpkg" in err and "input" in err
    assert assets.read_bytes() == before
    assert not (tmp_path / "assets.dxf").exists() and not (tmp_path / "assets-report.txt").exists()


def test_a_refused_merge_writes_no_output(tmp_path: Path, capsys: pytest.CaptureFixture, monkeypatch) -> None:
    import overlay.assets.merge

    site, assets = owner_site(tmp_path)
    monkeypatch.setattr(overlay.assets.merge, "WAIT_S", 0.2)
    before = assets.read_bytes()
    for lock in ("IMMEDIATE", "EXCLUSIVE"):  # a GIS edit session; one that even keeps readers out
        holder = sqlite3.connect(assets, isolation_level=None)
        holder.execute(f"BEGIN {lock}")
        try:
            assert run(site, tmp_path / "out") == 5
        finally:
            holder.execute("ROLLBACK")
            holder.close()
        assert "locked" in err_line(capsys)
    assert files(tmp_path / "out") == [] and assets.read_bytes() == before
    assert run(site, tmp_path / "out") == 0  # once the lock is gone, outputs and merge both happen
    con = sqlite3.connect(assets)
    assert con.execute("SELECT count(*) FROM findings").fetchone()[0] == 1  # one defect on EL-1 (at its highest class)
    con.close()


def test_outputs_that_cannot_move_into_place_roll_the_merge_back(tmp_path: Path, capsys: pytest.CaptureFixture,
                                                                  monkeypatch) -> None:
    import overlay.outputs.staging

    site, assets = owner_site(tmp_path)
    out = tmp_path / "out"
    assert run(site, out) == 0
    stamp = {p: p.read_bytes() for p in files(out)}
    findings_before = sqlite3.connect(assets).execute("SELECT * FROM findings").fetchall()
    site.write_text(site.read_text().replace('findings_layer = "findings"', 'findings_layer = "findings"\nmethod = "new"'))
    real, moved = os.replace, []

    def flaky(src, dst):  # the third output fails to move into place (a full disk, a file system gone read-only)
        if Path(dst).parent == out and ".old." not in str(dst):
            moved.append(dst)
            if len(moved) == 3:
                raise OSError(28, "No space left on device")
        return real(src, dst)

    monkeypatch.setattr(overlay.outputs.staging.os, "replace", flaky)
    assert run(site, out, "--overwrite", "--no-cache") == 5
    assert "No space left" in err_line(capsys)
    monkeypatch.undo()
    assert {p: p.read_bytes() for p in files(out)} == stamp  # the earlier outputs are back, byte for byte
    assert sqlite3.connect(assets).execute("SELECT * FROM findings").fetchall() == findings_before  # rolled back
    assert not [p for p in out.rglob("*.part*")]
    assert run(site, out, "--overwrite") == 0  # and without the fault both happen
    assert {r[0] for r in sqlite3.connect(assets).execute("SELECT method FROM findings")} == {"new"}


# --- mistakes that changed a number with exit 0 -----------------------------------------------------

@pytest.mark.parametrize("old, new, field, hint", [
    ('drawing_unit = "m"', 'drawing_units = "mm"', "site.drawing_units", "did you mean 'drawing_unit'"),
    ("[registration]", "[regstration]", "regstration", "did you mean 'registration'"),
    ("tolerance_m = 0.01", "tolerance = 0.01", "registration.tolerance", "use tolerance_m"),
])
def test_unknown_site_fields_are_errors(tmp_path: Path, capsys: pytest.CaptureFixture, old: str, new: str,
                                        field: str, hint: str) -> None:
    bump(tmp_path / "S-1")
    site = write_site(tmp_path, ["S-1"])
    site.write_text(site.read_text().replace(old, new))
    assert run(site, tmp_path / "out") == 3
    err = err_line(capsys)
    assert f"{field}: " in err and hint in err
    assert files(tmp_path / "out") == []


def test_misspelt_bearing_is_an_error(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    bump(tmp_path / "S-1")
    site = write_site(tmp_path, ["S-1"], extra=MAP.replace("bearing_deg = 90.0", "bearing = 30.0"))
    assert run(site, tmp_path / "out") == 3
    assert "map.bearing: unknown field; did you mean 'bearing_deg'" in err_line(capsys)


def test_control_point_naming_no_target_is_an_error(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    bump(tmp_path / "S-1")  # targets A, B, C, D
    site = write_site(tmp_path, ["S-1"], extra="\n[control_points]\nA = [10.0, 20.0]\nBB = [11.0, 20.0]\n")
    assert run(site, tmp_path / "out") == 3
    err = err_line(capsys)
    assert "control_points.BB: names no target of any bundle" in err


def test_default_tolerance_is_a_length_on_a_millimetre_drawing(tmp_path: Path) -> None:
    # 20 mm on the structure is 20 drawing units on a mm drawing: the same scan registers and gives the
    # same zone area as on the metre drawing (areas are m² whatever the drawing unit)
    import csv

    areas = {}
    for unit, k in (("m", 1.0), ("mm", 1000.0)):
        folder = bump(tmp_path / unit / "S-1")
        toml = folder / "scan.toml"
        text = toml.read_text()
        for x, y in ((10.0, 20.0), (11.0, 20.0), (11.0, 21.0), (10.0, 21.0)):
            text = text.replace(f"drawing = [{x}, {y}]", f"drawing = [{x * k}, {y * k}]")
        toml.write_text(text)
        site = write_site(tmp_path / unit, ["S-1"])
        site.write_text(site.read_text().replace('drawing_unit = "m"', f'drawing_unit = "{unit}"')
                        .replace("tolerance_m = 0.01\n", ""))
        out = tmp_path / unit / "out"
        assert run(site, out) == 0
        rows = list(csv.DictReader((out / "overlay-quantities.csv").open()))
        areas[unit] = float(next(r for r in rows if r["row_kind"] == "zone" and r["class"] == "watch")["contour_area_m2"])
    assert areas["mm"] == pytest.approx(areas["m"], rel=1e-9)


def test_a_millimetre_drawing_declared_in_metres_is_exit_4(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    folder = bump(tmp_path / "S-1")
    toml = folder / "scan.toml"
    text = toml.read_text()
    for x, y in ((10.0, 20.0), (11.0, 20.0), (11.0, 21.0), (10.0, 21.0)):
        text = text.replace(f"drawing = [{x}, {y}]", f"drawing = [{x * 1000}, {y * 1000}]")
    toml.write_text(text)
    site = write_site(tmp_path, ["S-1"])
    site.write_text(site.read_text().replace("tolerance_m = 0.01", "tolerance_m = 1000.0"))  # even a loose tolerance
    assert run(site, tmp_path / "out") == 4
    assert "is the drawing in mm?" in err_line(capsys)


def test_a_map_scale_of_a_unit_mistake_is_refused(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    bump(tmp_path / "S-1")
    site = write_site(tmp_path, ["S-1"], extra=MAP + "scale = 1000.0\n")
    assert run(site, tmp_path / "out") == 3
    assert "map.scale: must lie in 0.9..1.1" in err_line(capsys)


def test_a_map_origin_of_1e300_is_exit_4(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    bump(tmp_path / "S-1")
    site = write_site(tmp_path, ["S-1"], extra=MAP.replace("500000.0, 5700000.0", "1e300, 5700000.0"))
    assert run(site, tmp_path / "out") == 4
    assert "not a place on the earth" in err_line(capsys)


def test_a_wrong_crs_on_rerun_keeps_the_findings(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    # EPSG:25833 is valid and the site still lies within 3° of its area of use, but the zones land
    # 100s of km from their panel: nothing is removed (exit 4), the earlier findings stay
    site, assets = owner_site(tmp_path)
    assert run(site, tmp_path / "out") == 0
    before = sqlite3.connect(assets).execute("SELECT * FROM findings ORDER BY fid").fetchall()
    site.write_text(site.read_text().replace("EPSG:25832", "EPSG:25833"))
    code = run(site, tmp_path / "out2")
    assert code == 4, capsys.readouterr().err
    assert sqlite3.connect(assets).execute("SELECT * FROM findings ORDER BY fid").fetchall() == before


# --- degenerate and hostile input: exit 3, never a traceback or a hang -----------------------------

def _rewrite_points(folder: Path, edit) -> None:
    p = folder / "points.csv"
    p.write_text(edit(p.read_text()))


@pytest.mark.parametrize("edit, fragment", [
    (lambda t: t.replace(",0.0,0.0,", ",1e308,0.0,", 1), "coordinate beyond"),
    (lambda t: t.replace("P5,0,5,", 'P5,0,5,"', 1), "line 7: has 4 fields, header has 6"),
    (lambda t: t.replace("P5,", '"' + "x" * 200000 + '",', 1), "not readable as CSV"),  # past csv's field limit
    (lambda t: t.replace("P5,0,5,", "P5,40000,40000,", 1), "are not a grid"),
    (lambda t: t.replace("ver_db", "ver_dB", 1), "did you mean 'ver_db'"),
])
def test_bad_points_tables(tmp_path: Path, capsys: pytest.CaptureFixture, edit, fragment: str) -> None:
    folder = bump(tmp_path / "S-1")
    _rewrite_points(folder, edit)
    site = write_site(tmp_path, ["S-1"])
    assert run(site, tmp_path / "out") == 3
    assert fragment in err_line(capsys)
    assert files(tmp_path / "out") == []


def test_all_points_at_one_spot_without_grid_indices(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    folder = tmp_path / "S-1"
    write_bundle(folder, payload="ver", ver=np.full(48, 10.0), points_header="id,x,y,ver_db")
    _rewrite_points(folder, lambda t: "\n".join([t.splitlines()[0]] + [f"P{k},0.2,0.2,10.0" for k in range(48)]) + "\n")
    site = write_site(tmp_path, ["S-1"])
    assert run(site, tmp_path / "out") == 3
    assert "coincide or lie on one line" in err_line(capsys)


def test_collinear_points_without_grid_indices(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    folder = tmp_path / "S-1"
    write_bundle(folder, payload="ver", ver=np.full(48, 10.0), points_header="id,x,y,ver_db")
    _rewrite_points(folder, lambda t: "\n".join([t.splitlines()[0]] + [f"P{k},{0.01 * k},0.3,10.0" for k in range(48)])
                    + "\n")
    site = write_site(tmp_path, ["S-1"])
    assert run(site, tmp_path / "out") == 3
    assert "coincide or lie on one line" in err_line(capsys)


@pytest.mark.parametrize("surveyed", ["0001-01-01T00:00:00Z", "9999-12-31T23:59:59-05:00"])
def test_a_survey_date_at_the_calendars_edge(tmp_path: Path, capsys: pytest.CaptureFixture, surveyed: str) -> None:
    folder = bump(tmp_path / "S-1")
    toml = folder / "scan.toml"
    toml.write_text(toml.read_text().replace('element = "EL-1"', f'element = "EL-1"\nsurveyed = {surveyed}'))
    assert run(write_site(tmp_path, ["S-1"]), tmp_path / "out") == 3
    assert "scan.surveyed: year" in err_line(capsys)


def test_deeply_nested_toml(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    site = tmp_path / "site.toml"
    site.write_text('format = "overlay-site/1"\nx = ' + "[" * 5000 + "]" * 5000 + "\n")
    assert main(["run", str(site), "--out", str(tmp_path / "out")]) == 3
    assert "site.toml" in err_line(capsys)


def test_a_truncated_base_drawing(demo: dict, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    bump(tmp_path / "S-1")
    base = tmp_path / "base.dxf"
    base.write_bytes((demo["root"] / "site" / "as-built.dxf").read_bytes()[:3000])
    site = write_site(tmp_path, ["S-1"], extra='\n[dxf]\nbase = "base.dxf"\n')
    assert main(["run", str(site), "--out", str(tmp_path / "out")]) == 3
    assert "dxf.base: cannot read the base drawing" in err_line(capsys)
    assert files(tmp_path / "out") == []


def test_records_longer_than_their_header(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    folder = write_bundle(tmp_path / "S-1")
    with (folder / "records.npy").open("ab") as fh:
        fh.write(b"\0" * 4096)
    assert run(write_site(tmp_path, ["S-1"]), tmp_path / "out") == 3
    assert "longer than its array" in err_line(capsys)


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="needs named pipes")
def test_records_that_are_a_pipe_do_not_block(tmp_path: Path) -> None:
    folder = write_bundle(tmp_path / "S-1")
    (folder / "records.npy").unlink()
    os.mkfifo(folder / "records.npy")
    site = write_site(tmp_path, ["S-1"])
    done = subprocess.run([sys.executable, "-m", "overlay", "run", str(site), "--out", str(tmp_path / "out")],
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 3 and "not a regular file" in done.stderr


# --- output folders --------------------------------------------------------------------------------

def test_out_that_is_a_file(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    bump(tmp_path / "S-1")
    (tmp_path / "out").write_text("a file")
    assert run(write_site(tmp_path, ["S-1"]), tmp_path / "out") == 5
    assert "is a file" in err_line(capsys)


def test_out_that_cannot_be_created(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    bump(tmp_path / "S-1")
    assert run(write_site(tmp_path, ["S-1"]), Path("/proc/overlay-out")) == 5  # /proc takes no new folders
    assert "cannot create the output folder" in err_line(capsys)


def test_a_full_disk_leaves_nothing(tmp_path: Path, capsys: pytest.CaptureFixture, monkeypatch) -> None:
    bump(tmp_path / "S-1")

    def full(self, data):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(Path, "write_bytes", full)
    out = tmp_path / "out"
    assert run(write_site(tmp_path, ["S-1"]), out) == 5
    assert "No space left on device" in err_line(capsys)
    assert files(out) == []


# --- the cache is data --------------------------------------------------------------------------------

class _Bomb:
    def __reduce__(self):
        return (Path.write_text, (Path(os.environ["OVERLAY_TEST_MARK"]), "code ran"))


def test_a_poisoned_or_truncated_cache_entry_runs_nothing_and_is_recomputed(tmp_path: Path, monkeypatch,
                                                                              capsys: pytest.CaptureFixture) -> None:
    bump(tmp_path / "S-1")
    site = write_site(tmp_path, ["S-1"])
    out = tmp_path / "out"
    assert run(site, out) == 0
    first = (out / "overlay-quantities.csv").read_text()
    (entry,) = (out / ".overlay-cache").glob("*.npz")
    mark = tmp_path / "mark"
    monkeypatch.setenv("OVERLAY_TEST_MARK", str(mark))
    for poison in (pickle.dumps(_Bomb()), entry.read_bytes()[:200]):
        entry.write_bytes(poison)
        capsys.readouterr()
        assert run(site, out, "--overwrite") == 0
        assert not mark.exists()  # the pickle was never unpickled
        assert "cache entry" in capsys.readouterr().err
        assert (out / "overlay-quantities.csv").read_text() == first
        assert entry.exists()  # computed again and cached again


# --- interrupted runs ----------------------------------------------------------------------------------

def test_sigterm_leaves_no_temporary_file_and_no_merge(demo: dict, tmp_path: Path) -> None:
    site_dir = tmp_path / "site"
    shutil.copytree(demo["root"] / "site", site_dir)
    before = (site_dir / "assets.gpkg").read_bytes()
    out = tmp_path / "out"
    proc = subprocess.Popen([sys.executable, "-m", "overlay", "run", str(site_dir / "site.toml"), "--out", str(out),
                             "--no-pdf", "--no-cache"], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    deadline = time.time() + 120
    while time.time() < deadline and not list(out.glob(".*.part*")):  # wait until it is writing its outputs
        time.sleep(0.02)
    proc.send_signal(signal.SIGTERM)
    err = proc.communicate(timeout=120)[1]
    assert proc.returncode == 1 and "interrupted" in err, err
    assert not [p for p in out.rglob("*") if ".part" in p.name]
    assert files(out) == []
    assert (site_dir / "assets.gpkg").read_bytes() == before
    assert not [p for p in site_dir.iterdir() if p.name.startswith(".")]


def test_a_stale_temporary_file_of_a_killed_run_is_removed(tmp_path: Path) -> None:
    bump(tmp_path / "S-1")
    out = tmp_path / "out"
    out.mkdir()
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    stale = out / f".overlay.gpkg.{int(dead.stdout)}.0badf00d.part.gpkg"
    stale.write_bytes(b"half a GeoPackage")
    assert run(write_site(tmp_path, ["S-1"]), out) == 0
    assert not stale.exists()


def _children(pid: int) -> set[int]:
    found = set()
    for task in Path(f"/proc/{pid}/task").glob("*"):
        with open(task / "children") as fh:
            found |= {int(c) for c in fh.read().split()}
    return found


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
def test_workers_end_with_their_parent(demo: dict, tmp_path: Path) -> None:
    proc = subprocess.Popen([sys.executable, "-m", "overlay", "run", str(demo["site_path"]), "--out", str(tmp_path / "o"),
                             "--jobs", "2", "--no-cache", "--no-merge", "--no-pictures"],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    workers: set[int] = set()
    deadline = time.time() + 60
    while time.time() < deadline and len(workers) < 2 and proc.poll() is None:
        workers = _children(proc.pid)
        time.sleep(0.01)
    assert len(workers) >= 2, "the pool did not start"
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait()
    deadline = time.time() + 20
    while time.time() < deadline and any(Path(f"/proc/{w}").exists() and _state(w) != "Z" for w in workers):
        time.sleep(0.1)
    assert not [w for w in workers if Path(f"/proc/{w}").exists() and _state(w) != "Z"]


def _state(pid: int) -> str:
    try:
        return Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except OSError:
        return "gone"
