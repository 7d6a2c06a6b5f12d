"""``overlay import FORMAT FILE... --out BUNDLE``: instrument exports → a scan bundle, checked.

The options every importer shares are here; an importer adds its own (``add_arguments``), so
``overlay import uff --help`` lists the UFF options and a third-party importer brings its own.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from overlay.errors import UsageError


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("import", help="turn instrument exports (UFF, CSV tables) into a scan bundle", add_help=False,
                       description="Read one or more exported files with an importer plugin (see --list) and write a "
                       "scan-bundle/1 folder; prints what was found and what had to be assumed. "
                       "`overlay import FORMAT --help` lists that importer's own options.")
    p.add_argument("-h", "--help", action="store_true", help="show this help (with FORMAT: that importer's options)")
    p.add_argument("--list", action="store_true", help="list the installed importers, broken ones included")
    p.add_argument("format", nargs="?", metavar="FORMAT", help="importer name: uff, point-table, ver-matrix, ...")
    p.add_argument("rest", nargs=argparse.REMAINDER, metavar="FILE ... --out BUNDLE [options]")
    p.set_defaults(func=execute, usage=p.format_help)


def common_parser(fmt: str) -> argparse.ArgumentParser:
    """The options every importer takes; the importer adds its own."""
    p = argparse.ArgumentParser(prog=f"overlay import {fmt}",
                                description=f"Read exported files with the importer {fmt!r} and write a checked "
                                "scan-bundle/1 folder.")
    p.add_argument("files", nargs="+", type=Path, metavar="FILE")
    p.add_argument("--out", type=Path, metavar="BUNDLE", required=True, help="bundle folder to write")
    p.add_argument("--overwrite", action="store_true", help="replace an existing bundle folder")
    p.add_argument("--scan-id", dest="scan_id", help="scan id (default: the first file's name)")
    p.add_argument("--band", dest="band_hz", nargs=2, type=float, metavar=("LOW", "HIGH"),
                   help="analysis band, Hz (default 400 8000)")
    p.add_argument("--gate", dest="gate_s", nargs=2, type=float, metavar=("START", "END"),
                   help="gate in seconds (time records)")
    p.add_argument("--length-unit", dest="length_unit", choices=("m", "mm"),
                   help="unit of the input coordinates (default m, said if assumed)")
    p.add_argument("--velocity-unit", dest="velocity_unit", choices=("m/s", "mm/s"),
                   help="when the file does not say its velocity unit")
    p.add_argument("--allow-partial", dest="allow_partial", action="store_true",
                   help="import the good records of a partly bad file, report the rest")
    return p


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
    if args.format is None:
        if args.help:
            print(args.usage())
            return 0
        raise UsageError("give FORMAT, at least one FILE and --out BUNDLE (or --list)")
    if args.format not in usable:
        why = next((b.problem for b in broken if b.name == args.format), None)
        raise UsageError(f"importer {args.format!r} is {'broken: ' + why if why else 'unknown'}; "
                         f"available: {', '.join(sorted(usable))}")
    importer = usable[args.format]
    parser = common_parser(args.format)
    if hasattr(importer, "add_arguments"):
        importer.add_arguments(parser.add_argument_group(f"{args.format} options"))
    if args.help or {"-h", "--help"} & set(args.rest):
        parser.print_help()
        return 0
    ns = parser.parse_args(args.rest)
    skip = {"files", "out", "overwrite"}
    options = {k: tuple(v) if isinstance(v, list) else v for k, v in vars(ns).items()
               if k not in skip and v not in (None, {}, False, [])}
    scan = importer.read(list(ns.files), options)
    folder = write_bundle(scan, ns.out, overwrite=ns.overwrite)
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
