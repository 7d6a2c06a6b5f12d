"""``overlay run SITE.toml``: the main job on a site file."""

from __future__ import annotations

import argparse
from pathlib import Path

from overlay.cli.common import add_output_options, read_site_as_told, run_and_write


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("run", help="turn the scans of a site file into DXF, GeoPackage and quantities",
                       description="Read every scan bundle listed in SITE, find screening zones, register them into "
                       "the drawing frame and the map CRS, and write the outputs the site file asks for.")
    p.add_argument("site", type=Path, metavar="SITE.toml", help="site file (format overlay-site/1)")
    add_output_options(p, "overlay-out")
    p.set_defaults(func=execute)


def execute(args: argparse.Namespace) -> int:

    site = read_site_as_told(args.site, args)
    return run_and_write(site, args.out, args, overwrite=args.overwrite)
