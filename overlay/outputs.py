"""Writing outputs safely: check every target first, write to a temporary file, move into place.

A failed run leaves no half-written file and never touches an existing one
unless the user asked for it to be replaced.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from pathlib import Path
from typing import TYPE_CHECKING, Iterator, Sequence

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
            fd, tmp = tempfile.mkstemp(prefix=f".{final.name}.", suffix=".part" + final.suffix, dir=final.parent)
            os.close(fd)
            os.unlink(tmp)  # writers such as GDAL want to create the file themselves
            temps[final] = Path(tmp)
        yield temps
        for final, tmp in temps.items():
            if not tmp.exists():
                raise ExporterError("the exporter wrote nothing", source=final)
        for final, tmp in temps.items():
            os.replace(tmp, final)
    finally:
        for tmp in temps.values():
            with contextlib.suppress(FileNotFoundError):
                tmp.unlink()


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


def write_outputs(result: "RunResult", out_dir: Path, *, overwrite: bool = False) -> dict[str, Path]:
    """Write every requested format and the report; all move into place together or none does."""
    from .report import run_report

    exporters = select_exporters(result.site.formats, result.site.path)
    paths = output_paths(out_dir, result.site.basename, exporters, result.site.formats)
    check_targets(list(paths.values()), overwrite=overwrite)
    with staged(list(paths.values())) as temps:
        for fmt, exporter in exporters.items():
            try:
                exporter.write(result, temps[paths[fmt]])
            except OverlayError:
                raise
            except Exception as exc:
                raise ExporterError(f"exporter {fmt!r} failed: {type(exc).__name__}: {exc}", source=paths[fmt]) from exc
        temps[paths["report"]].write_text(run_report(result), encoding="utf-8")
    return paths
