"""Options and helpers shared by the commands."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from tqdm import tqdm

from ..merge import merge_findings
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
    p.add_argument("--no-pictures", action="store_true", help="skip the previews, zone sheets and HTML site report")
    p.add_argument("--no-merge", action="store_true",
                   help="do not write findings into the owner's asset GeoPackage even if the site file says so")


def run_and_write(site: Site, out: Path, *, overwrite: bool, quiet: bool, merge: bool = True, pictures: bool = True
                  ) -> tuple[RunResult, dict[str, Path]]:
    """Process the site with a progress bar (on a terminal only), write outputs, print the report."""
    hide = True if quiet else None  # None: tqdm shows bars on a terminal only
    scans = tqdm(total=len(site.scans), desc="scans ", unit="scan", disable=hide, file=sys.stderr, position=0)
    points = tqdm(total=0, desc="points", unit="pt", disable=hide, file=sys.stderr, position=1, unit_scale=True)

    def on_scan(scan_id: str, n_points: int) -> None:
        scans.set_postfix_str(scan_id)
        scans.update(1)
        points.total = (points.total or 0) + n_points
        points.refresh()

    try:
        result = run_site(site, on_scan=on_scan, progress=points.update)
    finally:
        points.close()
        scans.close()
    paths = write_outputs(result, out, overwrite=overwrite, pictures=pictures)
    if not quiet:
        print(run_report(result))
    print("written:")
    for p in paths.values():
        print(f"  {p}")
    if site.merge is not None and merge:
        m = merge_findings(result)
        print(f"merged into {m.target} layer {m.layer}: {m.added} row(s) of this run"
              f" ({m.replaced} earlier row(s) of the same scans replaced, {m.kept} other row(s) kept)"
              + (f"; backup {m.backup}" if m.backup else ""))
    return result, paths
