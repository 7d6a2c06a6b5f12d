"""Importer plugins: instrument exports → scan bundles, through the entry-point group ``overlay.importers``.

Mirrors the exporters: the built-ins register through the same group as a
third party would; a plugin that fails to load or lacks ``read`` is listed as
broken and never stops the others.  An importer turns input files into an
``Imported`` scan; ``write_bundle`` writes it as ``scan-bundle/1`` and the
bundle reader checks the result like any other bundle.
"""

from __future__ import annotations

import os
import shutil
import tempfile
from dataclasses import dataclass, field
from importlib.metadata import EntryPoint
from pathlib import Path
from typing import Any, Iterable, Protocol, runtime_checkable

import numpy as np

from overlay.errors import OutputConflictError
from overlay.plugins import Broken, load_group

GROUP = "overlay.importers"


@dataclass
class Imported:
    """A scan read from an instrument export, ready to become a bundle (SI units: m, m/s)."""

    scan_id: str
    ids: list[str]
    xy: np.ndarray
    valid: np.ndarray
    row: np.ndarray | None = None
    col: np.ndarray | None = None
    records: np.ndarray | None = None  # (points, samples), m/s
    sample_rate_hz: float | None = None
    spectra: np.ndarray | None = None  # (points, freqs), (m/s)^2/Hz
    frequencies: np.ndarray | None = None
    ver_db: np.ndarray | None = None
    peak_hz: np.ndarray | None = None
    band_hz: tuple[float, float] | None = None
    gate_s: tuple[float, float] | None = None
    geometry: dict[str, float] = field(default_factory=dict)
    found: list[str] = field(default_factory=list)  # what the importer read
    assumed: list[str] = field(default_factory=list)  # what it had to assume
    dropped: list[str] = field(default_factory=list)  # records left out (with allow_partial)


@runtime_checkable
class Importer(Protocol):
    name: str
    description: str

    def read(self, paths: list[Path], options: dict[str, Any]) -> Imported:
        """Read the input files into one scan; raise BundleError (exit 3) on bad input.

        ``options``: the command's common options and, when the importer has an ``add_arguments(parser)``
        method (optional), the options it added there, each under its argument's ``dest``."""


def _check(obj: object, name: str) -> str | None:
    if not all(isinstance(getattr(obj, a, None), str) for a in ("name", "description")) or not callable(
            getattr(obj, "read", None)):
        return "needs text name, description and a callable read(paths, options)"
    return None


def load_importers(eps: Iterable[EntryPoint] | None = None) -> tuple[dict[str, Importer], list[Broken]]:
    """Every importer of the group: the usable ones by name and the broken ones."""
    return load_group(GROUP, _check, eps)


def write_bundle(scan: Imported, folder: Path, *, overwrite: bool = False) -> Path:
    """Write ``scan`` as a scan-bundle/1 folder: into a temporary folder first, renamed when complete."""
    if folder.exists() and not overwrite:
        raise OutputConflictError("bundle folder already exists; choose another --out or pass --overwrite", source=folder)
    folder.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{folder.name}.", dir=folder.parent))
    try:
        _write(scan, tmp)
        if folder.exists():
            shutil.rmtree(folder)
        os.replace(tmp, folder)
    finally:
        if tmp.exists():
            shutil.rmtree(tmp)
    return folder


def _write(scan: Imported, d: Path) -> None:
    cols = ["id"] + (["row", "col"] if scan.row is not None else []) + ["x", "y", "valid"]
    cols += (["ver_db"] if scan.ver_db is not None else []) + (["peak_hz"] if scan.peak_hz is not None else [])
    lines = [",".join(cols)]
    for k, pid in enumerate(scan.ids):
        vals = [pid] + ([str(int(scan.row[k])), str(int(scan.col[k]))] if scan.row is not None else [])
        vals += [repr(float(scan.xy[k, 0])), repr(float(scan.xy[k, 1])), "1" if scan.valid[k] else "0"]
        if scan.ver_db is not None:
            vals.append("" if not np.isfinite(scan.ver_db[k]) else repr(float(scan.ver_db[k])))
        if scan.peak_hz is not None:
            vals.append("" if not np.isfinite(scan.peak_hz[k]) else repr(float(scan.peak_hz[k])))
        lines.append(",".join(vals))
    (d / "points.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")
    toml = ['format = "scan-bundle/1"', "", "[scan]", f'id = "{scan.scan_id}"', 'note = "imported by overlay import"', "",
            "[coordinates]", 'kind = "surface"', 'unit = "m"', ""]
    if scan.records is not None:
        np.save(d / "records.npy", scan.records.astype(np.float32))
        toml += ["[records]", f"sample_rate_hz = {scan.sample_rate_hz!r}", 'velocity_unit = "m/s"', "trigger_s = 0.0"]
        if scan.gate_s is not None:
            toml.append(f"gate_s = [{scan.gate_s[0]!r}, {scan.gate_s[1]!r}]")
        toml.append("")
    if scan.spectra is not None:
        np.save(d / "spectra.npy", scan.spectra)
        np.save(d / "frequencies.npy", scan.frequencies)
        toml += ["[spectra]", 'velocity_unit = "m/s"', ""]
    if scan.geometry:
        toml += ["[geometry]"] + [f"{k} = {v!r}" for k, v in scan.geometry.items()] + [""]
    if scan.band_hz is not None and scan.ver_db is None:
        toml += ["[band]", f"hz = [{scan.band_hz[0]!r}, {scan.band_hz[1]!r}]", ""]
    (d / "scan.toml").write_text("\n".join(toml), encoding="utf-8")
