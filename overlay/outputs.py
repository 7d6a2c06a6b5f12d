"""Writing outputs safely: check every target first, write to a temporary file, move into place.

A failed run leaves no half-written file and never touches an existing one
unless the user asked for it to be replaced.
"""

from __future__ import annotations

import errno
import os
import tempfile
import warnings
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable, Sequence

from .errors import ExporterError, OutputConflictError, OutputWarning, OutputWriteError, OverlayError, UsageError
from .staging import Staged

if TYPE_CHECKING:
    from .exporters import Exporter
    from .merge import MergeSummary
    from .pipeline import RunResult
    from .site import Site


def check_targets(paths: Sequence[Path], *, overwrite: bool) -> None:
    """Refuse (before anything is written) when a target exists and overwriting was not asked for."""
    for p in paths:
        if p.parent.exists() and not p.parent.is_dir():
            raise OutputWriteError("the output folder is a file", source=p.parent)
    clash = [p for p in paths if p.exists()]
    if clash and not overwrite:
        raise OutputConflictError(
            f"would overwrite {len(clash)} existing file(s) ({', '.join(p.name for p in clash)}); "
            "pass --overwrite or choose another --out folder",
            source=clash[0].parent,
        )
    dirs = [p for p in clash if p.is_dir()]
    if dirs:
        raise OutputConflictError("a folder stands where an output file should go", source=dirs[0])


def check_out_dir(out_dir: Path) -> None:
    """The output folder must be a folder we can create and write in (checked before any work)."""
    if out_dir.exists() and not out_dir.is_dir():
        raise OutputWriteError("the output folder is a file", source=out_dir)
    probe = out_dir
    while not probe.exists():
        probe = probe.parent
    try:  # the first folder that exists must take a new entry (read-only mounts and /proc do not)
        os.rmdir(tempfile.mkdtemp(prefix=".overlay-probe-", dir=probe))
    except OSError as exc:
        raise OutputWriteError(f"cannot create the output folder ({exc.strerror or exc} in {probe})",
                               source=out_dir) from exc


def run_inputs(site: "Site") -> list[Path]:
    """Every file and folder a run reads: site file, bundles, base drawing, asset file (and its journals)."""
    inputs = [site.path, *(e.bundle for e in site.scans)]
    if site.dxf.base is not None:
        inputs.append(site.dxf.base)
    if site.elements is not None:
        src = site.elements.source
        inputs += [src, *(src.with_name(src.name + s) for s in ("-wal", "-shm", "-journal"))]
    return inputs


def check_not_inputs(outputs: Sequence[Path], inputs: Sequence[Path]) -> None:
    """No output may be, or hold, or lie inside an input of the run (exit 5 naming both)."""
    def real(p: Path) -> Path:
        return p.parent.resolve() / p.name

    ins = [(i, real(i)) for i in inputs]
    for o in outputs:
        ro = real(o)
        for i, ri in ins:
            if ro == ri or ri.is_relative_to(ro) or (ri.is_dir() and ro.is_relative_to(ri)):
                raise OutputConflictError(f"output {o} would overwrite or sit inside the run's input {i}; choose "
                                          "another --out folder or [outputs] basename", source=o)


def output_paths(out_dir: Path, basename: str, exporters: dict[str, "Exporter"], formats: Sequence[str]) -> dict[str, Path]:
    """Final path of each requested format, plus the text report."""
    paths = {f: out_dir / f"{basename}{exporters[f].suffix}" for f in formats}
    paths["report"] = out_dir / f"{basename}-report.txt"
    return paths


def select_exporters(formats: Sequence[str], source: Path | None = None) -> dict[str, "Exporter"]:
    """The installed exporters for ``formats``; an unknown or broken name is a site-file error naming the choices."""
    from .errors import SiteFileError
    from .exporters import load_exporters

    usable, broken = load_exporters()
    chosen: dict[str, Exporter] = {}
    for f in formats:
        if f in usable:
            chosen[f] = usable[f]
            continue
        why = next((b.problem for b in broken if b.name == f), None)
        problem = f"exporter {f!r} is broken: {why}" if why else f"unknown exporter {f!r}"
        raise SiteFileError(f"{problem}; available: {', '.join(sorted(usable)) or 'none'}", source=source, field="outputs.formats")
    return chosen


def _picture_tasks(result: "RunResult", dxf_path: Path | None) -> list[tuple[str, str, int, int]]:
    """(name, kind, scan index, zone index) of every picture, in report order."""
    tasks = [("site-map", "site", -1, -1)]
    for i, s in enumerate(result.scans):
        tasks.append((f"scan-{s.scan_id}", "scan", i, -1))
        if s.reference is not None and s.reference.level_db is not None:
            tasks.append((f"field-{s.scan_id}", "field", i, -1))
        tasks += [(f"zone-{z.zone_id}", "zone", i, k) for k, z in enumerate(s.zones)]
    return tasks + ([("dxf-preview", "dxf", -1, -1)] if dxf_path is not None else [])


def picture_names(result: "RunResult", with_dxf: bool) -> list[str]:
    """Names of the pictures a run draws (files ``<name>.png`` in ``<basename>-pictures/``)."""
    return [t[0] for t in _picture_tasks(result, Path("drawing.dxf") if with_dxf else None)]


_SHARED: dict[str, Any] = {}  # what a picture worker process draws from (set once per process)


def _share(result: "RunResult", dxf_path: Path | None) -> None:
    _SHARED.update(result=result, dxf=dxf_path)


def _draw(task: tuple[str, str, int, int]) -> bytes:
    from . import pictures

    _, kind, i, k = task
    result, dxf_path = _SHARED["result"], _SHARED["dxf"]
    if kind == "site":
        base = result.site.dxf.base
        return pictures.site_map(result, pictures.drawing_lines(base) if base else None)
    if kind == "scan":
        return pictures.scan_preview(result, result.scans[i])
    if kind == "field":
        return pictures.field_map(result, result.scans[i])
    if kind == "zone":
        return pictures.zone_sheet(result, result.scans[i], result.scans[i].zones[k])
    return pictures.dxf_preview(dxf_path)


def draw_pictures(result: "RunResult", dxf_path: Path | None, *, jobs: int = 1,
                  progress: Callable[[int], None] | None = None) -> dict[str, bytes]:
    """Every picture of the run as PNG bytes, by name; on ``jobs`` processes when there are many.

    Pictures cost far more than the numbers over a campaign (a few tenths of a second each,
    thousands of them), and each is independent of the others.
    """
    tasks = _picture_tasks(result, dxf_path)
    if jobs <= 1 or len(tasks) < 4 * jobs:
        _share(result, dxf_path)
        try:
            drawn = []
            for t in tasks:
                drawn.append(_draw(t))
                if progress is not None:
                    progress(1)
        finally:
            _SHARED.clear()
        return {t[0]: png for t, png in zip(tasks, drawn)}
    with ProcessPoolExecutor(max_workers=jobs, initializer=_share, initargs=(result, dxf_path)) as pool:
        images = {}
        for t, png in zip(tasks, pool.map(_draw, tasks, chunksize=max(1, len(tasks) // (8 * jobs)))):
            images[t[0]] = png
            if progress is not None:
                progress(1)
    return images


def find_pdf_printer() -> str | None:
    """A headless Chromium that can print the HTML report to PDF, if installed."""
    import shutil

    return shutil.which("chromium") or shutil.which("chromium-browser") or shutil.which("google-chrome")


def print_pdf(html_path: Path, pdf_path: Path, browser: str) -> None:
    """The HTML report printed to PDF by headless Chromium (no network, a throw-away profile)."""
    import subprocess

    with tempfile.TemporaryDirectory() as profile:
        done = subprocess.run(
            [browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
             "--disable-component-update", "--disable-sync", "--no-first-run", f"--user-data-dir={profile}",
             "--no-pdf-header-footer", f"--print-to-pdf={pdf_path}", html_path.resolve().as_uri()],
            capture_output=True, text=True, timeout=300, check=False)
    if done.returncode != 0 or not pdf_path.exists():
        raise ExporterError(f"PDF printing failed ({done.stderr.strip()[-300:]})", source=pdf_path)


@dataclass(frozen=True)
class Written:
    """What a run wrote: the output paths by kind, and the merge into the owner's file (if any)."""

    paths: dict[str, Path]
    merge: "MergeSummary | None" = None


def write_outputs(result: "RunResult", out_dir: Path, *, overwrite: bool = False, pictures: bool = True,
                  pdf: bool | None = None, jobs: int = 1, progress: Callable[[int], None] | None = None,
                  merge: bool = False, replace_findings: bool = False) -> Written:
    """Write every requested format, the reports and (by default) the pictures, and (``merge``) the
    findings into the owner's asset GeoPackage — all of it, or nothing.

    Every check comes first (existing outputs, outputs that are inputs, the merge's lock and
    layers); the files are written to temporary paths, the merge is prepared inside the owner's
    transaction, the files move into place and only then is the merge committed; a failure at
    any step puts back what was there.  ``pdf``: True prints the HTML report to PDF (Chromium
    needed), None does so when Chromium is installed (a failure is then only a warning), False
    never.  ``jobs``: processes for the pictures; ``progress`` is called once per picture drawn."""
    from .merge import prepare_merge

    exporters = select_exporters(result.site.formats, result.site.path)
    paths = output_paths(out_dir, result.site.basename, exporters, result.site.formats)
    folder = out_dir / f"{result.site.basename}-pictures"
    pics: dict[str, Path] = {}
    if pictures:
        paths["html"] = out_dir / f"{result.site.basename}-report.html"
        pics = {n: folder / f"{n}.png" for n in picture_names(result, "dxf" in exporters)}
    browser = find_pdf_printer() if pdf is not False and pictures else None
    if pdf and browser is None:
        raise UsageError("--pdf needs a headless Chromium (Debian package chromium); the HTML report prints from any browser")
    if browser:
        paths["pdf"] = out_dir / f"{result.site.basename}-report.pdf"
    finals = list(paths.values()) + list(pics.values())
    check_targets(finals, overwrite=overwrite)
    check_not_inputs(finals + ([folder] if pictures else []), run_inputs(result.site))
    staged = Staged(finals)
    opened = None
    try:
        _write_staged(result, exporters, paths, pics, staged, jobs, progress, pdf, browser)
        if merge and result.site.merge is not None:
            opened = prepare_merge(result, replace_findings=replace_findings)
        staged.publish()
        summary = opened.commit() if opened is not None else None
    except BaseException:
        if opened is not None:
            opened.rollback()
        staged.undo()
        raise
    staged.finish()
    if pictures:
        paths["pictures"] = folder
    return Written({k: v for k, v in paths.items() if k != "pdf" or v in staged.temps}, summary)


def _write_staged(result: "RunResult", exporters: dict[str, "Exporter"], paths: dict[str, Path],
                  pics: dict[str, Path], staged: Staged, jobs: int, progress: Callable[[int], None] | None,
                  pdf: bool | None, browser: str | None) -> None:
    """Every output into its temporary file."""
    from .report import run_report
    from .report_html import site_report

    for fmt, exporter in exporters.items():
        try:
            exporter.write(result, staged[paths[fmt]])
        except OverlayError:
            raise
        except OSError as exc:
            raise OutputWriteError(f"exporter {fmt!r} could not write ({exc.strerror or exc})", source=paths[fmt]) from exc
        except Exception as exc:
            if _out_of_room(exc, paths[fmt].parent):
                raise OutputWriteError(f"exporter {fmt!r} could not write: no space left on device",
                                       source=paths[fmt]) from exc
            raise ExporterError(f"exporter {fmt!r} failed: {type(exc).__name__}: {exc}", source=paths[fmt]) from exc
    _write_text(staged[paths["report"]], run_report(result))
    if not pics:
        return
    images = draw_pictures(result, staged[paths["dxf"]] if "dxf" in exporters else None, jobs=jobs, progress=progress)
    for name, png in images.items():
        _write_bytes(staged[pics[name]], png)
    _write_text(staged[paths["html"]], site_report(result, images))
    if browser is not None:
        try:
            print_pdf(staged[paths["html"]], staged[paths["pdf"]], browser)
        except ExporterError as exc:
            if pdf:
                raise
            warnings.warn(f"{exc.line()}; the HTML report is written, no PDF", OutputWarning, stacklevel=3)
            staged.drop(paths["pdf"])


def _out_of_room(exc: Exception, folder: Path) -> bool:
    """A writer library (GDAL, ezdxf) that failed because the disk is full says so only in words."""
    text = str(exc).lower()
    return "no space left" in text or getattr(exc, "errno", None) == errno.ENOSPC or \
        (folder.exists() and os.statvfs(folder).f_bavail == 0)


def _write_text(path: Path, text: str) -> None:
    _write_bytes(path, text.encode("utf-8"))


def _write_bytes(path: Path, data: bytes) -> None:
    try:
        path.write_bytes(data)
    except OSError as exc:
        raise OutputWriteError(f"cannot write ({exc.strerror or exc})", source=path) from exc
