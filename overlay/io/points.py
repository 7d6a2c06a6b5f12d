"""``points.csv`` of a scan bundle: one row per measured point, every cell checked.

Columns are parsed whole with numpy; only where that fails is the first bad line searched for, so a
million-point file reads fast and a typo is still named by line and column.
"""

from __future__ import annotations

import csv
import difflib
import stat
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from overlay.errors import BundleError

KNOWN_COLUMNS = {"id", "row", "col", "x", "y", "ax", "ay", "valid", "signal_level", "ver_db", "peak_hz"}
MAX_POINTS_BYTES = 256 << 20  # points.csv of 256 MiB holds ~4 million points; anything larger is not one scan
MAX_SURFACE_M = 1.0e6  # |x|, |y| of surface coordinates and targets, metres
MAX_ANGLE_DEG = 89.0  # |ax|, |ay| of mirror angles: a beam at 90 degrees never meets the surface
CELLS_PER_POINT = 64  # row/col may span at most this many grid cells per point (else it is not a grid)


def read_points(path: Path, kind: str, unit_scale: float) -> dict[str, np.ndarray]:
    """The columns of ``points.csv`` as arrays ("id", "xy" in file units, "valid", and the optional
    "row"/"col", "signal_level", "ver_db", "peak_hz"); raise ``BundleError`` naming line and column."""
    rows = _csv_rows(path)
    header = [h.strip() for h in rows[0]]
    _check_header(header, kind, path)
    c = _columns(header, rows, path)
    table: dict[str, np.ndarray] = {"id": _point_ids(c), "xy": _coordinates(c, kind, unit_scale),
                                    "valid": _valid(c)}
    if "row" in header:
        table["row"], table["col"] = _grid(c)
    if "signal_level" in header:
        table["signal_level"] = _signal_level(c)
    for name in ("ver_db", "peak_hz"):
        if name in header:
            table[name] = c.numbers(name, allow_empty=True)
    return table


def regular_file(path: Path, max_bytes: int | None = None) -> None:
    """A regular file (not a FIFO or a device, which would block or never end), within its size limit."""
    if not path.exists():
        raise BundleError("file not found", source=path)
    st = path.stat()
    if not stat.S_ISREG(st.st_mode):
        raise BundleError("not a regular file (a pipe or device cannot be read as scan data)", source=path)
    if max_bytes is not None and st.st_size > max_bytes:
        raise BundleError(f"is {st.st_size} bytes, more than the {max_bytes} bytes documented as the limit", source=path)


@dataclass(frozen=True)
class _Columns:
    """The body of the file by column (stripped text), with the file line of every row for messages."""

    path: Path
    cols: dict[str, list[str]]
    linenos: list[int]

    def fail(self, message: str, row: int, column: str) -> BundleError:
        return BundleError(message, source=self.path, field=f"line {self.linenos[row]}, {column}")

    def numbers(self, name: str, *, integer: bool = False, allow_empty: bool = False) -> np.ndarray:
        """A column as numbers, parsed at once; where that fails, the first bad line is found and named."""
        text = [("nan" if c == "" else c) for c in self.cols[name]] if allow_empty else self.cols[name]
        try:
            out = np.array(text, dtype=np.float64)
        except ValueError:
            values = []
            for k, c in enumerate(text):
                try:
                    values.append(float(c))
                except ValueError:
                    raise self.fail(f"not a number: {c!r}", k, f"column {name}") from None
            out = np.array(values, dtype=np.float64)
        if integer:
            bad = ~np.isfinite(out) | (out != np.trunc(out))
            if bad.any():
                k = int(np.argmax(bad))
                raise self.fail(f"not an integer: {self.cols[name][k]!r}", k, f"column {name}")
        return out


def _csv_rows(path: Path) -> list[list[str]]:
    regular_file(path, MAX_POINTS_BYTES)
    try:
        text = path.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError as exc:
        raise BundleError("not UTF-8 text", source=path) from exc
    reader = csv.reader(text.splitlines())
    try:
        rows = list(reader)
    except csv.Error as exc:
        raise BundleError(f"not readable as CSV ({exc}; a stray quote?)", source=path,
                          field=f"line {reader.line_num}") from exc
    if not rows:
        raise BundleError("empty file; a header row is required", source=path)
    return rows


def _check_header(header: list[str], kind: str, path: Path) -> None:
    if len(set(header)) != len(header):
        dup = sorted({h for h in header if header.count(h) > 1})
        raise BundleError(f"duplicate column(s) {', '.join(dup)}", source=path, field="line 1")
    xcol, ycol = _xy_columns(kind)
    for need in ("id", xcol, ycol):
        if need not in header:
            raise BundleError(f"required column {need!r} missing (coordinates kind {kind!r})", source=path, field="line 1")
    if ("row" in header) != ("col" in header):
        raise BundleError("columns row and col go together; one is missing", source=path, field="line 1")
    other = _xy_columns("angles" if kind == "surface" else "surface")
    unknown = [h for h in header if h not in KNOWN_COLUMNS or h in other]
    if unknown:
        h = unknown[0]
        if h in other:
            why = f"belongs to coordinates kind {'angles' if kind == 'surface' else 'surface'}, this scan is {kind!r}"
        else:
            known = sorted(KNOWN_COLUMNS - set(other))
            near = difflib.get_close_matches(h, known, n=1, cutoff=0.6)
            why = f"unknown column{f'; did you mean {near[0]!r}?' if near else ''} (known: {', '.join(known)})"
        raise BundleError(why, source=path, field=f"line 1, column {h}")


def _xy_columns(kind: str) -> tuple[str, str]:
    return ("x", "y") if kind == "surface" else ("ax", "ay")


def _columns(header: list[str], rows: list[list[str]], path: Path) -> _Columns:
    linenos = [i for i, r in enumerate(rows[1:], start=2) if any(c.strip() for c in r)]
    body = [rows[i - 1] for i in linenos]
    if not body:
        raise BundleError("no point rows after the header", source=path)
    for ln, r in zip(linenos, body):
        if len(r) != len(header):
            raise BundleError(f"has {len(r)} fields, header has {len(header)}", source=path, field=f"line {ln}")
    cols = {h: [c.strip() for c in column] for h, column in zip(header, zip(*body))}
    return _Columns(path, cols, linenos)


def _point_ids(c: _Columns) -> np.ndarray:
    ids = np.array(c.cols["id"], dtype=object)
    seen: dict[str, int] = {}
    for k, pid in enumerate(ids):
        if not pid:
            raise c.fail("empty point id", k, "column id")
        if pid in seen:
            raise c.fail(f"duplicate point id {pid!r} (first on line {seen[pid]})", k, "column id")
        seen[pid] = c.linenos[k]
    return ids


def _coordinates(c: _Columns, kind: str, unit_scale: float) -> np.ndarray:
    """x, y (or ax, ay) in the file's unit, finite and within the documented range."""
    xcol, ycol = _xy_columns(kind)
    xy = np.column_stack([c.numbers(xcol), c.numbers(ycol)])
    bad = ~np.isfinite(xy).all(axis=1)
    if bad.any():
        raise c.fail("coordinates must be finite", int(np.argmax(bad)), f"columns {xcol}/{ycol}")
    limit, what = (MAX_ANGLE_DEG, "degrees") if kind == "angles" else (MAX_SURFACE_M / unit_scale, "coordinate units")
    far = (np.abs(xy) > limit).any(axis=1)
    if far.any():
        raise c.fail(f"coordinate beyond {limit:g} {what} (documented range)", int(np.argmax(far)),
                     f"columns {xcol}/{ycol}")
    return xy


def _grid(c: _Columns) -> tuple[np.ndarray, np.ndarray]:
    """row, col: whole numbers ≥ 0, one point per cell, spanning no more cells than a grid would."""
    row, col = c.numbers("row", integer=True).astype(np.int64), c.numbers("col", integer=True).astype(np.int64)
    if (row < 0).any() or (col < 0).any():
        raise c.fail("grid indices must be >= 0", int(np.argmax((row < 0) | (col < 0))), "columns row/col")
    cells = (int(row.max() - row.min()) + 1) * (int(col.max() - col.min()) + 1)
    if cells > CELLS_PER_POINT * len(row) + 4096:
        raise c.fail(f"row/col span {cells} grid cells for {len(row)} points (at most {CELLS_PER_POINT} per point); "
                     "the indices are not a grid", int(np.argmax(np.maximum(row - row.min(), col - col.min()))),
                     "columns row/col")
    key = row * (col.max() + 1) + col
    uniq, first = np.unique(key, return_index=True)
    if len(uniq) != len(key):
        dup = int(np.setdiff1d(np.arange(len(key)), first)[0])
        raise c.fail(f"grid cell ({row[dup]}, {col[dup]}) used twice", dup, "columns row/col")
    return row, col


def _valid(c: _Columns) -> np.ndarray:
    valid = np.ones(len(c.linenos), dtype=bool)
    for k, s in enumerate(c.cols.get("valid", ())):
        if s not in ("0", "1", ""):
            raise c.fail(f"must be 1 or 0, got {s!r}", k, "column valid")
        valid[k] = s != "0"
    return valid


def _signal_level(c: _Columns) -> np.ndarray:
    level = c.numbers("signal_level", allow_empty=True)
    out = np.isfinite(level) & ((level < 0) | (level > 1))
    if out.any():
        raise c.fail("must lie in 0..1", int(np.argmax(out)), "column signal_level")
    return level
