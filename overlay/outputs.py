"""Writing outputs safely: check every target first, write to a temporary file, move into place.

A failed run leaves no half-written file and never touches an existing one
unless the user asked for it to be replaced.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
import warnings
from pathlib import Path
from concurrent.futures import ProcessPoolExecutor
from typing import TYPE_CHECKING, Any, Callable, Iterator, Sequence

from .errors import ExporterError, OutputConflictError, OverlayError

if TYPE_CHECKING:
    from .exporters import Exporter
    from .pipeline import RunResult


def check_targets(paths: Sequence[Path], *, overwrite: bool) -> None:
    """Refuse (before anything is written) when a target exists and overwriting was not asked for."""
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


@contextlib.contextmanager
def staged(finals: Sequence[Path]) -> Iterator[dict[Path, Path]]:
    """Temporary paths beside each final path; all are moved into place only if the block succeeds.

    So a run that fails in its third output leaves neither the first two
    nor any temporary file behind.
    """
    temps: dict[Path, Path] = {}
    try:
        for final in finals:
            final.parent.mkdir(parents=True, exist_ok=True)
            fd, name = tempfile.mkstemp(prefix=f".{final.name}.", suffix=".part" + final.suffix, dir=final.parent)
            os.close(fd)
            os.unlink(name)  # writers such as GDAL want to create the file themselves
            temps[final] = Path(name)
        yield temps
        for final, tmp in temps.items():
            if not tmp.exists():
                raise ExporterError("the exporter wrote nothing", source=final)
        for final, tmp in temps.items():
            os.replace(tmp, final)
    finally:
        for left in temps.values():
            with contextlib.suppress(FileNotFoundError):
                left.unlink()


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


def write_outputs(result: "RunResult", out_dir: Path, *, overwrite: bool = False, pictures: bool = True,
                  pdf: bool | None = None, jobs: int = 1,
                  progress: Callable[[int], None] | None = None) -> dict[str, Path]:
    """Write every requested format, the reports and (by default) the pictures; all move into place
    together or none does.  ``pdf``: True prints the HTML report to PDF (Chromium needed), None
    does so when Chromium is installed (a failure is then only a warning), False never.
    ``jobs``: processes for the pictures; ``progress`` is called once per picture drawn."""
    from .report import run_report
    from .report_html import site_report

    exporters = select_exporters(result.site.formats, result.site.path)
    paths = output_paths(out_dir, result.site.basename, exporters, result.site.formats)
    folder = out_dir / f"{result.site.basename}-pictures"
    pics: dict[str, Path] = {}
    if pictures:
        paths["html"] = out_dir / f"{result.site.basename}-report.html"
        pics = {n: folder / f"{n}.png" for n in picture_names(result, "dxf" in exporters)}
    browser = find_pdf_printer() if pdf is not False and pictures else None
    if pdf and browser is None:
        from .errors import UsageError

        raise UsageError("--pdf needs a headless Chromium (Debian package chromium); the HTML report prints from any browser")
    pdf_path = out_dir / f"{result.site.basename}-report.pdf" if browser else None
    check_targets(list(paths.values()) + list(pics.values()) + ([pdf_path] if pdf_path else []), overwrite=overwrite)
    try:
        with staged(list(paths.values()) + list(pics.values())) as temps:
            for fmt, exporter in exporters.items():
                try:
                    exporter.write(result, temps[paths[fmt]])
                except OverlayError:
                    raise
                except Exception as exc:
                    raise ExporterError(f"exporter {fmt!r} failed: {type(exc).__name__}: {exc}", source=paths[fmt]) from exc
            temps[paths["report"]].write_text(run_report(result), encoding="utf-8")
            if pictures:
                images = draw_pictures(result, temps[paths["dxf"]] if "dxf" in exporters else None, jobs=jobs,
                                       progress=progress)
                for name, png in images.items():
                    temps[pics[name]].write_bytes(png)
                temps[paths["html"]].write_text(site_report(result, images), encoding="utf-8")
    except BaseException:
        with contextlib.suppress(OSError):
            folder.rmdir()  # only if we left it empty
        raise
    if pictures:
        paths["pictures"] = folder
    if browser and pdf_path is not None:
        with staged([pdf_path]) as temps:
            try:
                print_pdf(paths["html"], temps[pdf_path], browser)
            except ExporterError as exc:
                if pdf:
                    raise
                warnings.warn(f"{exc.line()}; the HTML report is written, no PDF", stacklevel=2)
                temps[pdf_path].write_bytes(b"")  # keep staging happy, removed below
        if pdf_path.exists() and pdf_path.stat().st_size == 0:
            pdf_path.unlink()
        else:
            paths["pdf"] = pdf_path
    return paths
