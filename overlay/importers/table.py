"""Plain tables → bundles with ready VER: a CSV of per-point values, or a CSV matrix of VER values.

Nothing is guessed: the columns of a per-point table are named by ``--map`` options or a small
TOML mapping file (keys ``id``, ``x``, ``y``, and ``ver_db`` or ``energy``, optional ``peak_hz``,
``row``, ``col``, ``valid``); a missing mapping or column is an error naming it.  Band energies
are turned into VER against the 10th percentile of the valid energies (said in the summary).
"""

from __future__ import annotations

import argparse
import csv
from pathlib import Path
from typing import Any

import numpy as np

from overlay.errors import BundleError, SiteFileError, UsageError
from overlay.importers import Imported
from overlay.signal.energy import DEFAULT_PERCENTILE, reference_energy, ver_db
from overlay.units import LENGTH_TO_M


def _csv(path: Path) -> list[list[str]]:
    """The non-blank rows of a UTF-8 CSV file; a missing or undecodable file is a BundleError."""
    if not path.is_file():
        raise BundleError("file not found", source=path)
    try:
        rows = list(csv.reader(path.read_text(encoding="utf-8-sig").splitlines()))
    except UnicodeDecodeError as exc:
        raise BundleError("not UTF-8 text", source=path) from exc
    return [r for r in rows if any(c.strip() for c in r)]


def _rows(path: Path) -> tuple[list[str], list[list[str]]]:
    """Header and data rows of a table with a header row."""
    rows = _csv(path)
    if len(rows) < 2:
        raise BundleError("needs a header row and at least one data row", source=path)
    return [h.strip() for h in rows[0]], rows[1:]


def _float(s: str, path: Path, line: int, col: str) -> float:
    try:
        v = float(s)
    except ValueError:
        raise BundleError(f"not a number: {s!r}", source=path, field=f"line {line}, column {col}") from None
    return v


class PointTableImporter:
    name = "point-table"
    description = "CSV of per-point values (id, x, y, VER or band energy, optional peak frequency), columns mapped"

    def add_arguments(self, parser: Any) -> None:
        """The point table's own command-line options: which column holds what."""
        parser.add_argument("--map", dest="columns", action=_ColumnMap, metavar="KEY=COLUMN",
                            help="column for id, x, y, ver_db or energy, peak_hz (repeatable)")
        parser.add_argument("--mapping", dest="columns", action=_ColumnFile, metavar="FILE.toml",
                            help='[columns] key = "COLUMN" in a file')

    def read(self, paths: list[Path], options: dict[str, Any]) -> Imported:
        path = paths[0]
        header, body = _rows(path)
        mapping = dict(options.get("columns") or {})
        for need in ("id", "x", "y"):
            if need not in mapping:
                raise BundleError(f"no column mapped to {need!r} (--map {need}=COLUMN)", source=path, field="mapping")
        if ("ver_db" in mapping) == ("energy" in mapping):
            raise BundleError("map exactly one of ver_db or energy", source=path, field="mapping")
        idx = {}
        for key, col in mapping.items():
            if col not in header:
                raise BundleError(f"column {col!r} (mapped to {key}) not in the header ({', '.join(header)})",
                                  source=path, field="line 1")
            idx[key] = header.index(col)
        k_len = LENGTH_TO_M[options.get("length_unit", "m")]
        n = len(body)
        ids, xy = [], np.zeros((n, 2))
        val = np.full(n, np.nan)
        peak = np.full(n, np.nan) if "peak_hz" in idx else None
        valid = np.ones(n, dtype=bool)
        dropped: list[str] = []
        seen: dict[str, int] = {}
        what = "ver_db" if "ver_db" in idx else "energy"
        for i, r in enumerate(body):
            line = i + 2
            if len(r) != len(header):
                raise BundleError(f"has {len(r)} fields, header has {len(header)}", source=path, field=f"line {line}")
            pid = r[idx["id"]].strip()
            if pid in seen:
                raise BundleError(f"duplicate id {pid!r} (first on line {seen[pid]})", source=path, field=f"line {line}")
            seen[pid] = line
            ids.append(pid)
            xy[i] = [_float(r[idx["x"]], path, line, mapping["x"]) * k_len, _float(r[idx["y"]], path, line, mapping["y"]) * k_len]
            v = _float(r[idx[what]], path, line, mapping[what]) if r[idx[what]].strip() else np.nan
            if not np.isfinite(v):
                if not options.get("allow_partial"):
                    raise BundleError(f"no finite {what} (use --allow-partial to keep the point as invalid)",
                                      source=path, field=f"line {line}, column {mapping[what]}")
                valid[i] = False
                dropped.append(f"line {line}: no finite {what}")
            val[i] = v
            if peak is not None and r[idx["peak_hz"]].strip():
                peak[i] = _float(r[idx["peak_hz"]], path, line, mapping["peak_hz"])
        out = Imported(scan_id=str(options.get("scan_id") or path.stem), ids=ids, xy=xy, valid=valid, peak_hz=peak,
                       dropped=dropped)
        if what == "energy":
            ref = reference_energy(val, valid, "percentile", DEFAULT_PERCENTILE, source=str(path))
            out.ver_db = ver_db(val, ref.energy)
            out.assumed.append(f"VER against the {DEFAULT_PERCENTILE:g}th percentile of the energies ({ref.energy:.4g})")
        else:
            out.ver_db = val
        out.found = [f"{n} points, {int(valid.sum())} valid", f"{what} from column {mapping[what]!r}"]
        if "length_unit" not in options:
            out.assumed.append("coordinates in metres (--length-unit)")
        return out


class MatrixTableImporter:
    name = "ver-matrix"
    description = "CSV matrix of VER values (dB) on a regular grid, with --origin and --spacing"

    def add_arguments(self, parser: Any) -> None:
        """The matrix's own command-line options: where it sits and how far apart its values are."""
        parser.add_argument("--origin", nargs=2, type=float, metavar=("X", "Y"), help="position of the first value, m")
        parser.add_argument("--spacing", type=float, help="grid spacing, m")

    def read(self, paths: list[Path], options: dict[str, Any]) -> Imported:
        path = paths[0]
        rows = _csv(path)
        if "spacing" not in options:
            raise BundleError("give the grid spacing (--spacing, metres)", source=path, field="options")
        if not rows:
            raise BundleError("empty file", source=path)
        width = len(rows[0])
        m = np.full((len(rows), width), np.nan)
        for i, r in enumerate(rows):
            if len(r) != width:
                raise BundleError(f"has {len(r)} values, the first row has {width}", source=path, field=f"line {i + 1}")
            for j, c in enumerate(r):
                m[i, j] = _float(c, path, i + 1, str(j + 1)) if c.strip() else np.nan
        bad = ~np.isfinite(m)
        if bad.any() and not options.get("allow_partial"):
            i, j = map(int, np.argwhere(bad)[0])
            raise BundleError("empty or non-finite value (use --allow-partial to keep it as invalid)",
                              source=path, field=f"line {i + 1}, column {j + 1}")
        ox, oy = options.get("origin", (0.0, 0.0))
        s = float(options["spacing"])
        rr, cc = np.mgrid[0 : m.shape[0], 0 : m.shape[1]]
        out = Imported(scan_id=str(options.get("scan_id") or path.stem),
                       ids=[f"R{r}C{c}" for r, c in zip(rr.ravel(), cc.ravel())],
                       xy=np.column_stack([ox + cc.ravel() * s, oy + rr.ravel() * s]), valid=~bad.ravel(),
                       row=rr.ravel(), col=cc.ravel(), ver_db=m.ravel(),
                       dropped=[f"line {i + 1}, column {j + 1}" for i, j in np.argwhere(bad)])
        out.found = [f"{m.shape[0]} rows x {m.shape[1]} columns of VER, spacing {s:g} m"]
        if "origin" not in options:
            out.assumed.append("origin (0, 0): first value of the first line at x = 0, y = 0; lines along +y")
        return out


class _ColumnMap(argparse.Action):
    """``--map KEY=COLUMN``, repeatable, into one dict of columns."""

    def __call__(self, parser: Any, namespace: Any, value: Any, option_string: str | None = None) -> None:
        if "=" not in value:
            raise UsageError(f"--map wants KEY=COLUMN, got {value!r}")
        k, v = value.split("=", 1)
        cols = dict(getattr(namespace, self.dest, None) or {})
        cols[k.strip()] = v.strip()
        setattr(namespace, self.dest, cols)


class _ColumnFile(argparse.Action):
    """``--mapping FILE.toml`` with ``[columns] key = "COLUMN"``; --map given after it wins."""

    def __call__(self, parser: Any, namespace: Any, value: Any, option_string: str | None = None) -> None:
        from overlay.io.tomlio import tomllib

        path = Path(value)
        try:
            found = tomllib.loads(path.read_text()).get("columns", {})
        except (OSError, tomllib.TOMLDecodeError) as exc:
            raise SiteFileError(f"cannot read the mapping file ({exc})", source=path) from exc
        setattr(namespace, self.dest, {**found, **(getattr(namespace, self.dest, None) or {})})
