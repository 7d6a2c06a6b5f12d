"""``overlay demo``: generate the demo site from physics and run the main job on it."""

from __future__ import annotations

import argparse
from pathlib import Path

from overlay.cli.common import add_output_options, read_site_as_told, run_and_write


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("demo", help="generate the demo overpass and run the main job on it",
                       description="Generate the invented demo site (scan bundles, truth file, as-built DXF, asset "
                       "GeoPackage) into OUT/site, then run it into OUT/results. Reruns replace both.")
    add_output_options(p, "demo-out", overwrite_option=False)  # a rerun always replaces the demo's folder
    p.set_defaults(func=execute)


def execute(args: argparse.Namespace) -> int:
    from overlay.demo import generate

    out: Path = args.out
    site_path = generate(out / "site")
    if not args.quiet:
        print(f"demo site generated in {site_path.parent}")
    site = read_site_as_told(site_path, args)
    return run_and_write(site, out / "results", args, overwrite=True)
