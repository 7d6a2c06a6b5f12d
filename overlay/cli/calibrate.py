"""``overlay calibrate SITE.toml --sounding FILE``: how the scans agree with hammer sounding."""

from __future__ import annotations

import argparse
from pathlib import Path


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "calibrate", help="measure the scans' agreement with hammer sounding and suggest class levels",
        description="Run the site's scans (cached), read the engineer's sounding results — traced hollow areas "
        "(GeoPackage/GeoJSON polygons, or closed polylines on a DXF layer) or points with a verdict hollow/sound "
        "(CSV with x, y, verdict, element, date, or a point layer) — and write how the two agree by area and by "
        "point over a sweep of VER levels, with suggested class levels. Nothing in the site file is changed.")
    p.add_argument("site", type=Path, metavar="SITE.toml", help="site file (format overlay-site/1)")
    p.add_argument("--sounding", type=Path, required=True, metavar="FILE", help="the sounding results (see above)")
    p.add_argument("--layer", default=None, help="layer of a GIS file or DXF drawing that holds the sounding")
    p.add_argument("--frame", choices=("drawing", "map"), default="drawing",
                   help="coordinates of a CSV or DXF: the drawing frame (default) or the site's map CRS "
                   "(a GIS layer with a CRS is always taken as map coordinates)")
    p.add_argument("--date", default=None, help="survey date YYYY-MM-DD of a DXF sounding (a drawing has no field for it)")
    p.add_argument("--elements", default=None, metavar="E1,E2,…",
                   help="the elements the sounding covered (default: those it names; traced areas name only the "
                   "elements where a hollow was found)")
    p.add_argument("--out", type=Path, default=Path("calibration"), metavar="DIR",
                   help="folder for the calibration outputs (default: calibration)")
    p.add_argument("--overwrite", action="store_true", help="replace the outputs of an earlier calibration")
    p.add_argument("--accept-misfit", action="store_true", help="go on when a target fit exceeds the tolerance")
    p.add_argument("--cache", metavar="DIR", type=Path, default=None,
                   help="cache of per-scan results (default: OUT/.overlay-cache)")
    p.add_argument("-q", "--quiet", action="store_true", help="print only the paths written")
    p.set_defaults(func=execute)


def execute(args: argparse.Namespace) -> int:
    from overlay.calibration.calibrate import calibrate
    from overlay.calibration.report import output_names, write_all
    from overlay.calibration.sounding import read_sounding
    from overlay.campaign import run_campaign
    from overlay.cli.common import read_site_as_told
    from overlay.outputs.staging import Staged
    from overlay.outputs.write import (
        check_not_inputs,
        check_out_dir,
        check_targets,
        run_inputs,
    )

    site = read_site_as_told(args.site, args)
    check_out_dir(args.out)
    c = run_campaign(site, cache_dir=args.cache or args.out / ".overlay-cache", strict=True)
    assert c.result is not None
    result = c.result
    sounding = read_sounding(args.sounding, result, layer=args.layer, frame=args.frame, date=args.date)
    covered = {e.strip() for e in args.elements.split(",") if e.strip()} if args.elements else None
    unknown = sorted((covered or set()) - {s.element for s in result.scans})
    if unknown:
        from overlay.errors import UsageError

        raise UsageError(f"--elements names {', '.join(unknown)}, which no scan of the site has "
                         f"(scanned: {', '.join(sorted({s.element for s in result.scans if s.element}))})")
    cal = calibrate(result, sounding, sounded=covered)
    names = output_names(site.outputs.basename)
    if not cal.tables:
        names.pop("roc")  # traced areas only: no verdict points, no ROC curve
    finals = {k: args.out / v for k, v in names.items()}
    check_targets(list(finals.values()), overwrite=args.overwrite)
    check_not_inputs(list(finals.values()), [*run_inputs(site), args.sounding])
    staged = Staged(finals.values())
    try:
        write_all({k: staged[p] for k, p in finals.items()}, result, cal)
        staged.publish()
    except BaseException:
        staged.undo()
        raise
    staged.finish()
    if not args.quiet:
        print(f"agreement of {len(result.scans)} scan(s) with {args.sounding.name}: AUC "
              f"{'-' if cal.auc != cal.auc else f'{cal.auc:.3f}'}, {cal.n_points} sounding point(s) on the scans"
              + (f", traced areas over {cal.looked_at_m2:.2f} m2" if cal.class_area else ""))
        best = cal.suggestions[0] if cal.suggestions else None
        if best is not None and best.youden_db is not None:
            print(f"best agreement at {best.youden_db:g} dB (95 % {best.youden_interval[0]:g}-"
                  f"{best.youden_interval[1]:g} dB) — a suggestion; the site file is unchanged")
        print("written:")
    for p in finals.values():
        print(p if args.quiet else f"  {p}")
    return 0
