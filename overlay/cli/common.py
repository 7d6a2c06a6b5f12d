"""Options and helpers shared by the commands."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import TYPE_CHECKING

if TYPE_CHECKING:  # the library is imported when a command runs, not to parse its arguments
    from overlay.settings import Site


def add_output_options(p: argparse.ArgumentParser, default_out: str, *, overwrite_option: bool = True) -> None:
    p.add_argument("--out", metavar="DIR", type=Path, default=Path(default_out), help=f"folder for the outputs (default: {default_out})")
    if overwrite_option:
        p.add_argument("--overwrite", action="store_true", help="replace outputs of an earlier run in the same folder")
    p.add_argument("--accept-misfit", action="store_true",
                   help="go on when a target fit exceeds the tolerance (recorded in the outputs)")
    p.add_argument("-q", "--quiet", action="store_true",
                   help="print only the paths written, one per line (errors still go to stderr)")
    p.add_argument("--no-pictures", action="store_true", help="skip the pictures and the HTML report")
    p.add_argument("--pdf", action="store_true", default=None,
                   help="print the site report to PDF, or fail (default: when headless Chromium is installed)")
    p.add_argument("--no-pdf", dest="pdf", action="store_false", help="no PDF of the site report")
    p.add_argument("-j", "--jobs", type=int, default=1, metavar="N", help="scans and pictures processed in N parallel processes (default 1)")
    p.add_argument("--dask", metavar="ADDRESS", default=None,
                   help="run the scans on the Dask scheduler at ADDRESS (optional extra 'dask')")
    p.add_argument("--cache", metavar="DIR", type=Path, default=None,
                   help="cache of per-scan results (default: OUT/.overlay-cache); reruns recompute changed scans only")
    p.add_argument("--no-cache", action="store_true", help="recompute every scan and keep no cache")
    p.add_argument("--strict", action="store_true", help="stop at the first scan that fails (default: report it, go on)")
    p.add_argument("--no-merge", action="store_true",
                   help="do not write findings into the owner's asset GeoPackage even if the site file says so")
    p.add_argument("--replace-findings", action="store_true",
                   help="let the merge remove more earlier findings of a scan than it adds (the zones really went)")


def read_site_as_told(path: Path, args: argparse.Namespace) -> Site:
    """The site file with the command line's overrides applied (a new value; the settings stay frozen)."""
    import dataclasses

    from overlay.io.site import read_site

    site = read_site(path)
    if args.accept_misfit:
        site = dataclasses.replace(site, registration=dataclasses.replace(site.registration, accept_misfit=True))
    return site


def run_and_write(site: Site, out: Path, args: argparse.Namespace, *, overwrite: bool) -> int:
    """The main job (overlay.job.run) with progress bars, the failures, the report and the summary; exit code."""
    from tqdm import tqdm

    from overlay.campaign import summary
    from overlay.job import RunOptions, run
    from overlay.outputs.report_text import run_report

    tqdm.monitor_interval = 0  # no monitor thread: the outputs are written beside a forked process (overlay.processes)
    hide = True if args.quiet else None  # None: tqdm shows bars on a terminal only
    scans = tqdm(total=len(site.scans), desc="scans ", unit="scan", disable=hide, file=sys.stderr, position=0)
    single = args.jobs <= 1 and not args.dask
    points = tqdm(total=0, desc="points", unit="pt", disable=hide if single else True, file=sys.stderr, position=1,
                  unit_scale=True)
    drawn = tqdm(total=0, desc="pictures", unit="png", disable=True if hide or args.no_pictures else None,
                 file=sys.stderr, position=2)

    def on_done(scan_id: str, how: str) -> None:
        scans.set_postfix_str(f"{scan_id} {how}")
        scans.update(1)

    options = RunOptions(overwrite=overwrite, pictures=not args.no_pictures, pdf=args.pdf, jobs=args.jobs,
                         dask_address=args.dask, cache_dir=None if args.no_cache else (args.cache or out / ".overlay-cache"),
                         strict=args.strict, merge=not args.no_merge, replace_findings=args.replace_findings)
    try:
        c, written = run(site, out, options, on_done=on_done, progress=points.update if single else None,
                         drawn=drawn.update)
    finally:
        points.close()
        scans.close()
        drawn.close()
    for f in c.failures:  # one line per failed scan, as for any error, and its evidence below it
        print(f"overlay: error: {f.message}", file=sys.stderr)
        for line in f.details:
            print(f"    {line}", file=sys.stderr)
    if written is None or c.result is None:
        return c.exit_code or 3
    m = written.merge
    if args.quiet:
        for p in written.paths.values():
            print(p)
        if m is not None:
            print(m.target)
        return c.exit_code
    print(run_report(c.result))
    print("written:")
    for p in written.paths.values():
        print(f"  {p}")
    if m is not None:
        print(f"merged into {m.target} layer {m.layer}: {m.added} row(s) of this run"
              f" ({m.replaced} earlier row(s) of the same scans replaced, {m.kept} other row(s) kept)"
              + (f"; backup {m.backup}" if m.backup else ""))
    print(summary(c))
    return c.exit_code
