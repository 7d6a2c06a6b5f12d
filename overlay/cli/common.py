"""Options and helpers shared by the commands."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Callable

from tqdm import tqdm

from ..outputs import write_outputs
from ..pipeline import RunResult, run_site
from ..report import run_report
from ..site import Site


def add_output_options(p: argparse.ArgumentParser, default_out: str) -> None:
    p.add_argument("--out", metavar="DIR", type=Path, default=Path(default_out), help=f"folder for the outputs (default: {default_out})")
    p.add_argument("--overwrite", action="store_true", help="replace outputs of an earlier run in the same folder")
    p.add_argument("--accept-misfit", action="store_true",
                   help="go on when a target fit exceeds the tolerance (recorded in the outputs)")
    p.add_argument("-q", "--quiet", action="store_true", help="print only the output paths")


def run_and_write(site: Site, out: Path, *, overwrite: bool, quiet: bool) -> tuple[RunResult, dict[str, Path]]:
    """Process the site with a progress bar (on a terminal only), write outputs, print the report."""
    total = len(site.scans)
    bar = tqdm(total=total, desc="scans", unit="scan", disable=None if not quiet else True, file=sys.stderr)
    on_scan: Callable[[str], None] = lambda sid: (bar.set_postfix_str(sid), bar.update(1))  # noqa: E731
    try:
        result = run_site(site, on_scan=on_scan)
    finally:
        bar.close()
    paths = write_outputs(result, out, overwrite=overwrite)
    if not quiet:
        print(run_report(result))
    print("written:")
    for p in paths.values():
        print(f"  {p}")
    return result, paths
