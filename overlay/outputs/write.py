"""Writing outputs safely: check every target first, write to a temporary file, move into place.

A failed run leaves no half-written file and never touches an existing one
unless the user asked for it to be replaced.
"""

from __future__ import annotations

import contextlib
import errno
import os
import re
import tempfile
import warnings
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable, Iterator, Sequence

from overlay.errors import (
    ExporterError,
    OutputConflictError,
    OutputWarning,
    OutputWriteError,
    OverlayError,
    UsageError,
)
from overlay.outputs.staging import Staged

if TYPE_CHECKING:
    from overlay.assets.merge import MergeSummary
    from overlay.exporters import Exporter
    from overlay.job import RunResult
    from overlay.settings import Site


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
    if site.elements is not None and site.elements.source is not None:
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
    from overlay.errors import SiteFileError
    from overlay.exporters import GROUP, load_exporters
    from overlay.plugins import plugin_names

    usable, broken = load_exporters(only=set(formats))
    chosen: dict[str, Exporter] = {}
    for f in formats:
        if f in usable:
            chosen[f] = usable[f]
            continue
        why = next((b.problem for b in broken if b.name == f), None)
        problem = f"exporter {f!r} is broken: {why}" if why else f"unknown exporter {f!r}"
        names = [n for n in plugin_names(GROUP) if n not in {b.name for b in broken}]
        raise SiteFileError(f"{problem}; available: {', '.join(names) or 'none'}", source=source, field="outputs.formats")
    return chosen


def file_stem(text: str) -> str:
    """A name safe in a file name (element ids are free text)."""
    return re.sub(r"[^A-Za-z0-9._+-]", "_", text)


def _picture_tasks(result: "RunResult", dxf_path: Path | None) -> list[tuple[str, str, str]]:
    """(name, kind, key) of every picture, in report order: the site, each element with defects, each
    scan (and its sound field where VER is measured against it), each defect, the DXF.  Drawn from the
    site's final zones — after the mosaic — so every id and number matches the tables."""
    from overlay.quantities import defects

    tasks = [("site-map", "site", "")]
    tasks += [(f"element-{file_stem(e)}", "element", e) for e in elements_with_zones(result)]
    for s in result.scans:
        tasks.append((f"scan-{s.scan_id}", "scan", s.scan_id))
        if s.reference is not None and s.reference.level_db is not None:
            tasks.append((f"field-{s.scan_id}", "field", s.scan_id))
    tasks += [(f"defect-{file_stem(d.defect_id)}", "defect", d.defect_id)
              for d in defects(result.zones, result.site.zones.classes)]
    if result.site.zones.calibration is not None:
        tasks.append(("calibration-roc", "roc", ""))
    return tasks + ([("dxf-preview", "dxf", "")] if dxf_path is not None else [])


def elements_with_zones(result: "RunResult") -> list[str]:
    return sorted({z.element for z in result.zones if z.element})


def picture_names(result: "RunResult", with_dxf: bool) -> list[str]:
    """Names of the pictures a run draws (files ``<name>.png`` in ``<basename>-pictures/``)."""
    return [t[0] for t in _picture_tasks(result, Path("drawing.dxf") if with_dxf else None)]


_SHARED: dict[str, Any] = {}  # what a picture worker process draws from (set once per process)


def _share(result: "RunResult", dxf_path: Path | None) -> None:
    _SHARED.clear()
    _SHARED.update(result=result, dxf=dxf_path, compact=report_is_folder(result))


def _draw(task: tuple[str, str, str]) -> bytes:
    from overlay.outputs import pictures, site_pictures
    from overlay.quantities import defects

    _, kind, key = task
    result, dxf_path = _SHARED["result"], _SHARED["dxf"]
    if kind in ("site", "element") and "lines" not in _SHARED:
        base = result.site.dxf.base
        _SHARED["lines"] = site_pictures.drawing_lines(base) if base else None
    if kind == "site":
        return site_pictures.site_map(result, _SHARED["lines"])
    if kind == "element":
        return site_pictures.element_map(result, key, _SHARED["lines"])
    compact = _SHARED["compact"]  # a campaign: the compact pictures, drawn in a fraction of the time
    if kind in ("scan", "field"):
        scan = next(s for s in result.scans if s.scan_id == key)
        if kind == "field":
            return pictures.field_map(result, scan)
        return pictures.scan_thumbnail(result, scan) if compact else pictures.scan_preview(result, scan)
    if kind == "defect":
        if "defects" not in _SHARED:
            _SHARED["defects"] = {d.defect_id: d for d in defects(result.zones, result.site.zones.classes)}
        d = _SHARED["defects"][key]
        return pictures.defect_spectrum(result, d) if compact else pictures.defect_sheet(result, d)
    if kind == "roc":
        from overlay.outputs.report_text import recorded_calibration

        d = recorded_calibration(result)
        assert d is not None
        return site_pictures.roc_curve(d["roc"]["fpr"], d["roc"]["tpr"], d["auc"])
    return site_pictures.dxf_preview(dxf_path)


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
    from overlay.assets.merge import prepare_merge

    exporters = select_exporters(result.site.outputs.formats, result.site.path)
    paths = output_paths(out_dir, result.site.outputs.basename, exporters, result.site.outputs.formats)
    folder = out_dir / f"{result.site.outputs.basename}-pictures"
    pics: dict[str, Path] = {}
    pages: dict[str, Path] = {}
    if pictures:
        pics = {n: folder / f"{n}.png" for n in picture_names(result, "dxf" in exporters)}
        if report_is_folder(result):
            pages = {n: out_dir / f"{result.site.outputs.basename}-report" / n for n in report_page_names(result)}
        else:
            paths["html"] = out_dir / f"{result.site.outputs.basename}-report.html"
    browser = find_pdf_printer() if (pdf or (pdf is None and not pages)) and pictures else None
    if pdf and browser is None:
        raise UsageError("printing the report to PDF needs a headless Chromium (Debian package chromium); the HTML "
                         "report prints from any browser")
    if browser:
        if pages:
            pages.update({n[:-5] + ".pdf": p.with_suffix(".pdf") for n, p in list(pages.items())})
        else:
            paths["pdf"] = out_dir / f"{result.site.outputs.basename}-report.pdf"
    finals = list(paths.values()) + list(pics.values()) + list(pages.values())
    check_targets(finals, overwrite=overwrite)
    check_not_inputs(finals + ([folder] if pictures else []) + ([next(iter(pages.values())).parent] if pages else []),
                     run_inputs(result.site))
    staged = Staged(finals)
    opened = None
    try:
        _write_staged(result, exporters, paths, pics, pages, staged, jobs, progress, pdf, browser)
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
    if pages:
        paths["html"] = pages["index.html"]
        if "index.pdf" in pages and pages["index.pdf"] in staged.temps:
            paths["pdf"] = pages["index.pdf"]
    return Written({k: v for k, v in paths.items() if k != "pdf" or v in staged.temps}, summary)


def _write_staged(result: "RunResult", exporters: dict[str, "Exporter"], paths: dict[str, Path],
                  pics: dict[str, Path], pages: dict[str, Path], staged: Staged, jobs: int,
                  progress: Callable[[int], None] | None, pdf: bool | None, browser: str | None) -> None:
    """Every output into its temporary file."""
    from overlay.outputs.report_text import run_report

    with _formats_written(result, exporters, paths, staged):  # the second process, if any, works on meanwhile
        _write_text(staged[paths["report"]], run_report(result))
        if pics:
            _write_pictures_and_pages(result, exporters, paths, pics, pages, staged, jobs, progress, pdf, browser)


def _write_pictures_and_pages(result: "RunResult", exporters: dict[str, "Exporter"], paths: dict[str, Path],
                              pics: dict[str, Path], pages: dict[str, Path], staged: Staged, jobs: int,
                              progress: Callable[[int], None] | None, pdf: bool | None, browser: str | None) -> None:
    from overlay.outputs.report_html import report_pages, site_report

    images = draw_pictures(result, staged[paths["dxf"]] if "dxf" in exporters else None, jobs=jobs, progress=progress)
    for name, png in images.items():
        _write_bytes(staged[pics[name]], png)
    if not pages:
        _write_text(staged[paths["html"]], site_report(result, images))
        if browser is not None:
            _print(staged, staged[paths["html"]], paths["pdf"], browser, pdf)
        return
    from overlay.outputs.report_html import embedded, linked

    texts = report_pages(result, linked(set(images), f"../{pics[next(iter(images))].parent.name}"))
    for name, text in texts.items():
        _write_text(staged[pages[name]], text)
    if browser is not None:  # each PDF prints from the same page with its pictures embedded
        with tempfile.TemporaryDirectory(prefix="overlay-print-") as tmp:
            for name, text in report_pages(result, embedded(images)).items():
                page = Path(tmp) / name
                _write_text(page, text)
                _print(staged, page, pages[name[:-5] + ".pdf"], browser, pdf)


@contextlib.contextmanager
def _formats_written(result: "RunResult", exporters: dict[str, "Exporter"], paths: dict[str, Path],
                     staged: Staged) -> Iterator[None]:
    """Every format into its temporary file: the DXF here and, meanwhile, the others in a second process
    (overlay.processes), where one can be forked — waited for when the caller's block is done, so the
    reports and pictures are made meanwhile too; else all here, one after the other, first."""
    from overlay.processes import Beside, can_fork

    def write(formats: list[str]) -> None:
        for fmt in formats:
            _export(fmt, exporters[fmt], result, staged[paths[fmt]], paths[fmt])

    here = [f for f in exporters if f == "dxf"]
    there = [f for f in exporters if f != "dxf"]
    if not (here and there and can_fork()):
        write(list(exporters))
        yield
        return
    beside = Beside(lambda: write(there))
    try:
        write(here)
        yield
    except BaseException:
        beside.stop()
        raise
    beside.wait()


def _export(fmt: str, exporter: "Exporter", result: "RunResult", path: Path, final: Path) -> None:
    """One format to ``path``; a library's failure becomes our error naming the final file."""
    try:
        exporter.write(result, path)
    except OverlayError:
        raise
    except OSError as exc:
        raise OutputWriteError(f"exporter {fmt!r} could not write ({exc.strerror or exc})", source=final) from exc
    except Exception as exc:
        if _out_of_room(exc, final.parent):
            raise OutputWriteError(f"exporter {fmt!r} could not write: no space left on device", source=final) from exc
        raise ExporterError(f"exporter {fmt!r} failed: {type(exc).__name__}: {exc}", source=final) from exc


def _print(staged: Staged, html_path: Path, pdf_path: Path, browser: str, pdf: bool | None) -> None:
    try:
        print_pdf(html_path, staged[pdf_path], browser)
    except ExporterError as exc:
        if pdf:
            raise
        warnings.warn(f"{exc.line()}; the HTML report is written, no PDF", OutputWarning, stacklevel=4)
        staged.drop(pdf_path)


def report_is_folder(result: "RunResult") -> bool:
    """Above ``PAGE_LIMIT_SCANS`` scans the HTML report is a folder of pages, not one page."""
    from overlay.outputs.report_html import PAGE_LIMIT_SCANS

    return len(result.scans) > PAGE_LIMIT_SCANS


def report_page_names(result: "RunResult") -> list[str]:
    from overlay.outputs.report_html import page_names

    return page_names(result)


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
