"""The second writing process (overlay.processes): the formats other than the DXF are written in a
forked process while the DXF is drawn.  What must hold is what held when all were written in one
process: every file, the same errors with their exit codes, the warnings, and nothing left behind
when either side fails or the child is killed.

Each case runs in a fresh interpreter: a process with other threads running (a test's Dask cluster,
say) never forks, by design, so the case must start from one that can.
"""

from __future__ import annotations

import json
import pickle
import subprocess
import sys
from pathlib import Path

import pytest

from overlay.errors import EXIT_UNEXPECTED

CASE = r'''
import json, os, pickle, sys, threading, time, warnings
from pathlib import Path

from overlay.errors import OverlayError
from overlay.exporters.dxf import DxfExporter
from overlay.exporters.gpkg import GeoPackageExporter
import overlay.outputs.write as write
from overlay.outputs.write import write_outputs

case, out = sys.argv[1], Path(sys.argv[3])
result = pickle.loads(Path(sys.argv[2]).read_bytes())
pids = out.parent / "pids"
real_gpkg, real_dxf, real_draw = GeoPackageExporter.write, DxfExporter.write, write.draw_pictures


def note(kind):
    with open(pids, "a") as f:
        f.write(f"{kind} {os.getpid()}\n")


def gpkg(self, r, path):
    note("gpkg")
    if case == "warns":
        warnings.warn("said beside the drawing", UserWarning)
    if case == "fails":
        raise RuntimeError("boom")
    if case == "dies":
        os._exit(3)
    if case == "pictures meanwhile":
        time.sleep(3.0)
    if case in ("drawing fails", "pictures fail"):  # half a file and SQLite's journal beside it, a long write
        path.write_bytes(b"half")
        Path(f"{path}-journal").write_bytes(b"journal")
        time.sleep(60)
    real_gpkg(self, r, path)
    note("gpkg-done")


def dxf(self, r, path):
    note("dxf")
    if case == "drawing fails":
        time.sleep(1.0)
        raise RuntimeError("drawing failed")
    real_dxf(self, r, path)


def draw(*args, **kwargs):
    note("pictures")
    if case == "pictures fail":
        time.sleep(1.0)
        raise OSError(28, "No space left on device")  # as a full disk would stop the pictures
    return real_draw(*args, **kwargs)


GeoPackageExporter.write, DxfExporter.write, write.draw_pictures = gpkg, dxf, draw
if case == "thread":
    threading.Thread(target=time.sleep, args=(30,), daemon=True).start()
t0 = time.perf_counter()
with warnings.catch_warnings(record=True) as seen:
    warnings.simplefilter("always")
    try:
        write_outputs(result, out, pictures=case.startswith("pictures"), pdf=False)
        error = None
    except OverlayError as exc:
        error = {"line": exc.line(), "type": type(exc).__name__, "source": exc.source, "code": exc.exit_code}
    except OSError as exc:
        error = {"line": str(exc), "type": type(exc).__name__}
print(json.dumps({"error": error, "pid": os.getpid(), "seconds": time.perf_counter() - t0,
                  "warnings": [str(w.message) for w in seen]}))
'''


@pytest.fixture(scope="module")
def pickled(demo: dict, tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("result") / "result.pickle"
    path.write_bytes(pickle.dumps(demo["result"]))
    return path


def run_case(case: str, pickled: Path, tmp: Path) -> tuple[dict, dict[str, int], Path]:
    out = tmp / "out"
    done = subprocess.run([sys.executable, "-c", CASE, case, str(pickled), str(out)], capture_output=True,
                          text=True, timeout=300, check=False)
    assert done.returncode == 0, done.stderr[-2000:]
    said = json.loads(done.stdout.strip().splitlines()[-1])
    pids = dict(line.split() for line in (tmp / "pids").read_text().splitlines())
    said["order"] = [line.split()[0] for line in (tmp / "pids").read_text().splitlines()]
    return said, {k: int(v) for k, v in pids.items()}, out


def files(out: Path) -> list[str]:
    return sorted(p.name for p in out.rglob("*")) if out.exists() else []


def test_the_other_formats_are_written_beside_the_drawing(pickled: Path, tmp_path: Path) -> None:
    said, pids, out = run_case("plain", pickled, tmp_path)
    assert said["error"] is None
    assert pids["dxf"] == said["pid"] and pids["gpkg"] != said["pid"]  # the GeoPackage in the second process
    assert {".dxf", ".gpkg", ".csv", ".txt"} <= {Path(n).suffix for n in files(out)}
    assert not [n for n in files(out) if ".part" in n]


def test_with_another_thread_running_all_is_written_here(pickled: Path, tmp_path: Path) -> None:
    said, pids, out = run_case("thread", pickled, tmp_path)
    assert said["error"] is None
    assert pids["dxf"] == pids["gpkg"] == said["pid"]  # no fork beside a running thread
    assert ".gpkg" in {Path(n).suffix for n in files(out)}


def test_a_warning_beside_reaches_the_user(pickled: Path, tmp_path: Path) -> None:
    said, _, _ = run_case("warns", pickled, tmp_path)
    assert said["error"] is None
    assert "said beside the drawing" in said["warnings"]


def test_a_failure_beside_is_the_same_error_and_leaves_nothing(pickled: Path, tmp_path: Path) -> None:
    said, _, out = run_case("fails", pickled, tmp_path)
    assert said["error"]["type"] == "ExporterError" and said["error"]["code"] == EXIT_UNEXPECTED
    assert Path(said["error"]["source"]).parent == out and said["error"]["source"].endswith(".gpkg")
    assert said["error"]["line"].endswith("exporter 'gpkg' failed: RuntimeError: boom")
    assert files(out) == []


def test_a_writer_killed_beside_is_an_error_and_leaves_nothing(pickled: Path, tmp_path: Path) -> None:
    said, _, out = run_case("dies", pickled, tmp_path)
    assert said["error"]["type"] == "ExporterError"
    assert "ended without an answer (exit code 3)" in said["error"]["line"]
    assert files(out) == []


def test_a_failed_drawing_stops_the_writer_beside_and_removes_its_files(pickled: Path, tmp_path: Path) -> None:
    said, _, out = run_case("drawing fails", pickled, tmp_path)
    assert said["error"]["line"].endswith("exporter 'dxf' failed: RuntimeError: drawing failed")
    assert said["seconds"] < 30  # the writer beside was stopped, not waited for (it sleeps 60 s)
    assert files(out) == []  # its half-written file and the journal beside it are gone too


def test_the_pictures_are_drawn_while_the_writer_beside_still_works(pickled: Path, tmp_path: Path) -> None:
    said, pids, out = run_case("pictures meanwhile", pickled, tmp_path)
    assert said["error"] is None
    assert said["order"].index("pictures") < said["order"].index("gpkg-done")  # not waited for first
    assert pids["pictures"] == said["pid"] != pids["gpkg"]
    assert ".gpkg" in {Path(n).suffix for n in files(out)} and any(n.endswith(".png") for n in files(out))


def test_failed_pictures_stop_the_writer_beside_and_remove_its_files(pickled: Path, tmp_path: Path) -> None:
    said, _, out = run_case("pictures fail", pickled, tmp_path)
    assert said["error"] is not None and "No space left on device" in said["error"]["line"]
    assert said["seconds"] < 30  # the writer beside was stopped, not waited for (it sleeps 60 s)
    assert files(out) == []
