"""``overlay import FORMAT FILE... --out BUNDLE``: instrument exports → a scan bundle, checked."""

from __future__ import annotations

import argparse
from pathlib import Path

from overlay.errors import SiteFileError, UsageError
from overlay.io.tomlio import tomllib


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("import", help="turn instrument exports (UFF, CSV tables) into a scan bundle",
                       description="Read one or more exported files with an importer plugin (see --list) and write a "
                       "scan-bundle/1 folder; prints what was found and what had to be assumed.")
    p.add_argument("format", nargs="?", metavar="FORMAT", help="importer name: uff, point-table, ver-matrix, ...")
    p.add_argument("files", nargs="*", type=Path, metavar="FILE")
    p.add_argument("--out", type=Path, metavar="BUNDLE", help="bundle folder to write")
    p.add_argument("--overwrite", action="store_true", help="replace an existing bundle folder")
    p.add_argument("--list", action="store_true", help="list the installed importers, broken ones included")
    p.add_argument("--scan-id", help="scan id (default: the first file's name)")
    p.add_argument("--band", nargs=2, type=float, metavar=("LOW", "HIGH"), help="analysis band, Hz (default 400 8000)")
    p.add_argument("--gate", nargs=2, type=float, metavar=("START", "END"), help="gate in seconds (time records)")
    p.add_argument("--direction", type=int, default=3, help="UFF response direction normal to the surface (default 3 = Z)")
    p.add_argument("--grid-shape", nargs=2, type=int, metavar=("ROWS", "COLS"),
                   help="UFF: the nodes, in node-number order, fill a (curvilinear) grid row by row; checked")
    p.add_argument("--length-unit", choices=("m", "mm"), help="unit of the input coordinates (default m, said if assumed)")
    p.add_argument("--velocity-unit", choices=("m/s", "mm/s"), help="when the file does not say its velocity unit")
    p.add_argument("--map", action="append", default=[], metavar="KEY=COLUMN",
                   help="point-table: column for id, x, y, ver_db or energy, peak_hz (repeatable)")
    p.add_argument("--mapping", type=Path, metavar="FILE.toml", help="point-table: [columns] key = \"COLUMN\" in a file")
    p.add_argument("--origin", nargs=2, type=float, metavar=("X", "Y"), help="ver-matrix: position of the first value, m")
    p.add_argument("--spacing", type=float, help="ver-matrix: grid spacing, m")
    p.add_argument("--allow-partial", action="store_true", help="import the good records of a partly bad file, report the rest")
    p.set_defaults(func=execute)


def _columns(args: argparse.Namespace) -> dict[str, str]:
    cols: dict[str, str] = {}
    if args.mapping:
        try:
            cols.update(tomllib.loads(args.mapping.read_text()).get("columns", {}))
        except (OSError, tomllib.TOMLDecodeError) as exc:
            raise SiteFileError(f"cannot read the mapping file ({exc})", source=args.mapping) from exc
    for item in args.map:
        if "=" not in item:
            raise UsageError(f"--map wants KEY=COLUMN, got {item!r}")
        k, v = item.split("=", 1)
        cols[k.strip()] = v.strip()
    return cols


def execute(args: argparse.Namespace) -> int:
    from overlay.importers import load_importers, write_bundle
    from overlay.io.bundle import read_bundle

    usable, broken = load_importers()
    if args.list:
        for name, imp in sorted(usable.items()):
            print(f"{name:<14} {imp.description}")
        for b in broken:
            print(f"{b.name:<14} BROKEN ({b.target}): {b.problem}")
        return 0
    if not args.format or not args.files or not args.out:
        raise UsageError("give FORMAT, at least one FILE and --out BUNDLE (or --list)")
    if args.format not in usable:
        why = next((b.problem for b in broken if b.name == args.format), None)
        raise UsageError(f"importer {args.format!r} is {'broken: ' + why if why else 'unknown'}; "
                         f"available: {', '.join(sorted(usable))}")
    options = {k: v for k, v in {
        "scan_id": args.scan_id, "band_hz": tuple(args.band) if args.band else None,
        "gate_s": tuple(args.gate) if args.gate else None, "direction": args.direction,
        "grid_shape": tuple(args.grid_shape) if args.grid_shape else None,
        "length_unit": args.length_unit, "velocity_unit": args.velocity_unit, "columns": _columns(args),
        "origin": tuple(args.origin) if args.origin else None, "spacing": args.spacing,
        "allow_partial": args.allow_partial}.items() if v not in (None, {}, False)}
    scan = usable[args.format].read(list(args.files), options)
    folder = write_bundle(scan, args.out, overwrite=args.overwrite)
    try:
        read_bundle(folder)  # the same checks as for any bundle
    except Exception:
        import shutil

        shutil.rmtree(folder)  # never leave a bundle the reader refuses
        raise
    print(f"bundle {folder} (scan {scan.scan_id})")
    for line in scan.found:
        print(f"  found:   {line}")
    for line in scan.assumed:
        print(f"  assumed: {line}")
    if scan.dropped:
        print(f"  dropped: {len(scan.dropped)} record(s): " + "; ".join(scan.dropped[:5])
              + (" ..." if len(scan.dropped) > 5 else ""))
    return 0
