"""Universal File Format importer (read with pyuff): nodes from datasets 15 / 2411, function data
from dataset 58 (time responses or power spectral densities) → a scan bundle.

Dataset 58 fields used (record R, field F, as pyuff names them): function type (R6 F1), response
node and direction (R6 F6, F7), abscissa spacing, minimum and increment (R7 F3–F5), ordinate
units label (R9 F6), and the data.  Only the response direction normal to the surface is taken
(``direction``, default 3 = Z).  Function type codes used: 1 time response, 9 power spectral
density (from memory of the dataset 58 description — checked against pyuff's writer in the tests).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from overlay.errors import BundleError
from overlay.importers import Imported
from overlay.units import LENGTH_TO_M, VELOCITY_TO_MPS
from overlay.zones.grid import infer_grid

TIME, PSD = 1, 9


def _label(rec: dict) -> str:
    return str(rec.get("ordinate_axis_units_lab", "") or "").strip().lower()


def declared_grid(xy: np.ndarray, shape: tuple[int, int], source: Path) -> tuple[np.ndarray, np.ndarray]:
    """row/col of a curvilinear grid whose nodes, in node-number order, fill ``shape`` row by row.

    Checked, not trusted: every step to a row or column neighbour must be within 3× the median
    step, else the declared shape does not fit the nodes.
    """
    rows, cols = shape
    if rows * cols != len(xy):
        raise BundleError(f"grid shape {rows} x {cols} = {rows * cols} nodes, the file has {len(xy)}", source=source,
                          field="--grid-shape")
    g = xy.reshape(rows, cols, 2)
    steps = np.concatenate([np.hypot(*np.diff(g, axis=0).reshape(-1, 2).T), np.hypot(*np.diff(g, axis=1).reshape(-1, 2).T)])
    med = float(np.median(steps))
    if not med > 0 or steps.max() > 3 * med or steps.min() < med / 3:
        raise BundleError(f"nodes in node-number order do not form a {rows} x {cols} grid (steps {steps.min():.4g}.."
                          f"{steps.max():.4g}, median {med:.4g})", source=source, field="--grid-shape")
    rr, cc = np.mgrid[0:rows, 0:cols]
    return rr.ravel(), cc.ravel()


def grid_indices(xy: np.ndarray) -> tuple[np.ndarray, np.ndarray] | None:
    """row/col of nodes forming a (possibly rotated) regular grid, found along their principal axes."""
    c = xy - xy.mean(axis=0)
    _, _, vt = np.linalg.svd(c, full_matrices=False)
    for basis in (np.eye(2), vt.T):
        g = infer_grid(np.round(c @ basis, 9))
        if g is not None:
            r, q = np.nonzero(g.index >= 0)
            rows = np.empty(len(xy), dtype=np.int64)
            cols = np.empty(len(xy), dtype=np.int64)
            rows[g.index[r, q]], cols[g.index[r, q]] = r, q
            return rows, cols
    return None


class UffImporter:
    name = "uff"
    description = "Universal File Format: nodes (datasets 15, 2411) and function data (dataset 58), via pyuff"

    def add_arguments(self, parser: Any) -> None:
        """The UFF importer's own command-line options (``overlay import uff --help``)."""
        parser.add_argument("--direction", type=int, default=3,
                            help="response direction normal to the surface (default 3 = Z)")
        parser.add_argument("--grid-shape", dest="grid_shape", nargs=2, type=int, metavar=("ROWS", "COLS"),
                            help="the nodes, in node-number order, fill a (curvilinear) grid row by row; checked")

    def read(self, paths: list[Path], options: dict[str, Any]) -> Imported:
        sets = _datasets(paths)
        direction = int(options.get("direction", 3))
        nodes = _nodes(sets, LENGTH_TO_M[options.get("length_unit", "m")], paths[0])
        funcs, kind = _functions(sets, direction, paths[0])
        label, scale = _ordinate(funcs, kind, options.get("velocity_unit"))
        x0, inc, m = _abscissa(funcs)
        ids = sorted(nodes)
        values, have, dropped = _values(funcs, ids, m, scale, direction, bool(options.get("allow_partial")))
        xy = np.array([nodes[n] for n in ids])
        shape = options.get("grid_shape")
        grid = declared_grid(xy, tuple(shape), paths[0]) if shape else grid_indices(xy)
        out = Imported(
            scan_id=str(options.get("scan_id") or paths[0].stem), ids=[f"N{n}" for n in ids], xy=xy, valid=have,
            row=grid[0] if grid else None, col=grid[1] if grid else None,
            band_hz=tuple(options.get("band_hz") or (400.0, 8000.0)), dropped=dropped,
        )
        if kind == TIME:
            out.records, out.sample_rate_hz = values.astype(np.float32), 1.0 / inc
            gate = options.get("gate_s")
            out.gate_s = tuple(gate) if gate else (0.0, m * inc)
        else:
            out.spectra, out.frequencies = values, x0 + inc * np.arange(m)
        out.found = [f"{len(ids)} nodes, {int(have.sum())} with a direction-{direction} record",
                     f"grid: {'%d rows x %d cols' % (grid[0].max() + 1, grid[1].max() + 1) if grid else 'none (scattered nodes)'}",
                     (f"time records of {m} samples at {1.0 / inc:g} Hz" if kind == TIME else
                      f"PSD of {m} lines, {x0:g}..{x0 + inc * (m - 1):g} Hz"),
                     f"ordinate unit {label or '(none)'} -> m/s"]
        if "length_unit" not in options:
            out.assumed.append("node coordinates in metres (--length-unit)")
        if not options.get("band_hz"):
            out.assumed.append("analysis band 400..8000 Hz (--band)")
        if options.get("velocity_unit") is None and not label:
            out.assumed.append("velocity unit m/s")
        if kind == TIME and not options.get("gate_s"):
            out.assumed.append(f"gate = the whole record, 0..{m * inc * 1e3:g} ms (--gate START END, seconds)")
        missing = int((~have).sum()) - len(dropped)
        if missing:
            out.found.append(f"{missing} node(s) without function data: marked invalid")
        return out


_Set = tuple[Path, int, dict]  # the file, the dataset's place in it, pyuff's dictionary


def _datasets(paths: list[Path]) -> list[_Set]:
    import pyuff

    sets: list[_Set] = []
    for p in paths:
        if not p.is_file():
            raise BundleError("file not found", source=p)
        try:
            data = pyuff.UFF(str(p)).read_sets()
        except Exception as exc:  # pyuff raises plain exceptions for malformed files
            raise BundleError(f"not a readable Universal File ({exc})", source=p) from exc
        data = data if isinstance(data, list) else [data]
        sets += [(p, k, d) for k, d in enumerate(data)]
    return sets


def _nodes(sets: list[_Set], length: float, first: Path) -> dict[int, tuple[float, float]]:
    """Node number → (x, y) in metres, from datasets 15 and 2411; a node defined twice is refused."""
    nodes: dict[int, tuple[float, float]] = {}
    for p, k, d in sets:
        if d.get("type") in (15, 2411):
            for n, x, y in zip(d["node_nums"], d["x"], d["y"]):
                n = int(n)
                if n in nodes:
                    raise BundleError(f"node {n} defined twice", source=p, field=f"dataset {d['type']} (set {k})")
                nodes[n] = (float(x) * length, float(y) * length)
    if not nodes:
        raise BundleError("no node coordinates (datasets 15 or 2411)", source=first)
    return nodes


def _functions(sets: list[_Set], direction: int, first: Path) -> tuple[list[_Set], int]:
    """The dataset-58 records in the response direction, and their one function type (time or PSD)."""
    funcs = [(p, k, d) for p, k, d in sets if d.get("type") == 58 and abs(int(d.get("rsp_dir", 0))) == direction]
    if not funcs:
        raise BundleError(f"no dataset 58 with response direction {direction}", source=first)
    kinds = {int(d["func_type"]) for _, _, d in funcs}
    if not kinds <= {TIME, PSD} or len(kinds) != 1:
        raise BundleError(f"function types {sorted(kinds)}: one kind is needed, {TIME} (time response) or "
                          f"{PSD} (power spectral density)", source=funcs[0][0], field="dataset 58 R6 F1")
    return funcs, kinds.pop()


def _ordinate(funcs: list[_Set], kind: int, unit_opt: str | None) -> tuple[str, float]:
    """The records' ordinate label and the factor to m/s (or (m/s)²/Hz); one unit for all records."""
    labels = {_label(d) for _, _, d in funcs}
    if len(labels) > 1:
        raise BundleError(f"mixed ordinate units {sorted(labels)} among the function records", source=funcs[0][0],
                          field="dataset 58 R9 F6")
    label = labels.pop() if labels else ""
    psd_unit = label.replace("^2/hz", "").replace("2/hz", "").replace("²/hz", "").strip("() ")
    unit = unit_opt or (label if kind == TIME else psd_unit)
    if unit not in VELOCITY_TO_MPS:
        raise BundleError(f"ordinate unit {label!r} is not a velocity this importer knows (m/s, mm/s); "
                          "give --velocity-unit", source=funcs[0][0], field="dataset 58 R9 F6")
    return label, VELOCITY_TO_MPS[unit] if kind == TIME else VELOCITY_TO_MPS[unit] ** 2


def _abscissa(funcs: list[_Set]) -> tuple[float, float, int]:
    """Start, step and length shared by every record (evenly spaced only)."""
    spacing = {(int(d.get("abscissa_spacing", 1)), float(d["abscissa_min"]), float(d["abscissa_inc"]), len(d["data"]))
               for _, _, d in funcs}
    if any(s[0] != 1 for s in spacing):
        raise BundleError("uneven abscissa spacing; only evenly spaced function data can be imported",
                          source=funcs[0][0], field="dataset 58 R7 F3")
    if len(spacing) > 1:
        raise BundleError(f"inconsistent abscissa among the function records: {sorted(spacing)[:3]}",
                          source=funcs[0][0], field="dataset 58 R7 F4/F5")
    _, x0, inc, m = spacing.pop()
    return x0, inc, m


def _values(funcs: list[_Set], ids: list[int], m: int, scale: float, direction: int,
            allow_partial: bool) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """One row per node (zeros where none), which nodes have one, and what was dropped and why."""
    pos = {n: i for i, n in enumerate(ids)}
    values = np.zeros((len(ids), m), dtype=np.float64)
    have = np.zeros(len(ids), dtype=bool)
    dropped: list[str] = []
    for p, k, d in funcs:
        n = int(d["rsp_node"])
        if n not in pos:
            raise BundleError(f"response node {n} has no coordinates", source=p, field=f"dataset 58 (set {k}) R6 F6")
        if have[pos[n]]:
            raise BundleError(f"second record for node {n}, direction {direction}", source=p, field=f"dataset 58 (set {k})")
        v = np.real(np.asarray(d["data"], dtype=np.complex128))
        if not np.isfinite(v).all():
            if not allow_partial:
                raise BundleError(f"non-finite values in the record of node {n} (use --allow-partial to drop it)",
                                  source=p, field=f"dataset 58 (set {k}) R12")
            dropped.append(f"node {n}: non-finite values")
            continue
        values[pos[n]] = v * scale
        have[pos[n]] = True
    return values, have, dropped
