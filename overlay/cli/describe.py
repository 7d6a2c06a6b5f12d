"""``overlay describe BUNDLE``: a readable summary of one scan bundle, without processing it."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import TYPE_CHECKING

if TYPE_CHECKING:  # the command's own imports wait until it runs: `overlay --help` starts at once
    from overlay.io.bundle import Scan


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("describe", help="summarise one scan bundle (points, grid, dropouts, band, gate, targets)")
    p.add_argument("bundle", type=Path, metavar="BUNDLE", help="scan bundle folder (format scan-bundle/1)")
    p.set_defaults(func=execute)


def summary(scan: Scan) -> str:
    """The bundle in a dozen lines."""
    import numpy as np

    from overlay.signal.gate import choose_gate
    from overlay.zones.grid import scan_grid
    unit = "m" if scan.kind == "surface" else "deg"
    lo, hi = scan.xy.min(axis=0), scan.xy.max(axis=0)
    lines = [
        f"scan {scan.scan_id}  element {scan.element or '-'}  surveyed {scan.surveyed or '-'}",
        f"  folder      {scan.path}",
        f"  coordinates {scan.kind}, x {lo[0]:.3f}..{hi[0]:.3f} {unit}, y {lo[1]:.3f}..{hi[1]:.3f} {unit}",
        f"  points      {scan.n_points}, flagged invalid {int((~scan.valid).sum())}",
    ]
    if scan.note:
        lines.insert(1, f"  note        {scan.note}")
    if scan.has_grid or scan.row is None:
        try:
            g = scan_grid(scan)
            holes = int((g.index < 0).sum())
            lines.append(f"  grid        {g.shape[0]} rows x {g.shape[1]} cols, spacing {g.spacing():.4f} {unit}, "
                         f"{holes} empty node(s)")
        except Exception as exc:  # describe must still show the rest
            lines.append(f"  grid        none ({exc})")
    lines.append(f"  payload     {scan.payload}")
    if scan.records is not None and scan.sample_rate_hz is not None and scan.n_samples is not None:
        lines.append(f"  records     {scan.records.shape} {scan.records.dtype}, {scan.n_shots} shot(s), "
                     f"{scan.sample_rate_hz:g} Hz, {scan.n_samples / scan.sample_rate_hz * 1e3:.2f} ms")
        try:
            gate = choose_gate(scan)
            lines.append(f"  gate        {gate.describe()}")
        except Exception as exc:
            lines.append(f"  gate        unusable: {exc}")
    if scan.spectra is not None and scan.frequencies is not None:
        lines.append(f"  spectra     {scan.spectra.shape}, {scan.frequencies[0]:g}..{scan.frequencies[-1]:g} Hz")
    if scan.ver_db is not None:
        v = scan.ver_db[np.isfinite(scan.ver_db)]
        lines.append(f"  ver_db      {v.min():.1f}..{v.max():.1f} dB" if v.size else "  ver_db      no finite value")
    if scan.band_hz:
        lines.append(f"  band        {scan.band_hz[0]:g}..{scan.band_hz[1]:g} Hz")
    lines.append(f"  targets     {len(scan.targets)}: " + ", ".join(
        f"{t.name}{'' if t.drawing else ' (no drawing coordinates)'}" for t in scan.targets))
    return "\n".join(lines)


def execute(args: argparse.Namespace) -> int:
    from overlay.io.bundle import read_bundle

    print(summary(read_bundle(args.bundle)))
    return 0
