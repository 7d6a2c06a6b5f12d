"""The plain-text run report: what was read, how it was fitted, what was found, and the cautions.

Every number a person reads here comes from the same rows as the CSV and the HTML report
(overlay.quantities); units are said once per column; an unknown value prints as "-", never
as "nan" or "None".  Depths are in metres everywhere.
"""

from __future__ import annotations

import math
from collections import defaultdict
from typing import TYPE_CHECKING, Iterable

from overlay.cautions import cautions_text
from overlay.quantities import (
    asset_rows,
    class_columns,
    defect_rows,
    element_rows,
    zone_rows,
)

if TYPE_CHECKING:
    from overlay.geometry.transforms import Similarity
    from overlay.job import RunResult
    from overlay.scan import ScanResult

ID_SCHEME = ("zone ids are <scan id>.<class>.<nn>, numbered by position within the scan and class; a zone "
             "seen by several overlapping scans is united into one that keeps the first id with '+n' for n more "
             "scans' zones (its provenance lists them); a defect's id is the id of its lowest-class zone")


def fmt(value: object, spec: str = "", unit: str = "") -> str:
    """A value for a person: formatted, with its unit, and '-' when unknown."""
    if value is None or value == "" or (isinstance(value, float) and not math.isfinite(value)):
        return "-"
    if isinstance(value, bool):
        return "yes" if value else "no"
    text = format(value, spec) if spec else str(value)
    return f"{text} {unit}".rstrip()


def span(low: object, high: object, spec: str, unit: str) -> str:
    if low in ("", None) or (isinstance(low, float) and not math.isfinite(low)):
        return "-"
    return f"{format(low, spec)}-{format(high, spec)} {unit}"


def dims(length: object, width: object) -> str:
    """A rectangle's sides for a person: "0.93 x 0.84 m", or "-"."""
    return "-" if length in ("", None) else f"{length:.2f} x {width:.2f} m"


def settings_lines(result: "RunResult") -> list[tuple[str, str]]:
    """The run's settings as a person reads them: a label and a value with its unit."""
    s = result.site
    ref = {"auto": "auto (the local sound field where it spans more than 1 dB, else the percentile)"}.get(s.energy.reference,
                                                                                                       s.energy.reference)
    return [
        ("drawing unit", s.drawing_unit),
        ("reference", f"{ref}, percentile {s.energy.percentile:g}"),
        ("incidence correction", "on" if s.energy.incidence_correction else "off"),
        ("quality floors", f"signal level {s.quality.min_signal_level:g}, SNR "
                           f"{'off' if s.quality.min_snr_db is None else f'{s.quality.min_snr_db:g} dB'}"),
        ("classes", ", ".join(f"{c.name} >= {c.threshold_db:g} dB" for c in s.zones.classes)),
        ("smallest zone", f"{s.zones.min_area_m2:g} m2"),
        ("concrete", f"E {s.concrete.modulus_pa / 1e9:.1f} GPa, density {s.concrete.density:g} kg/m3, "
                     f"Poisson's ratio {s.concrete.poisson:g}"),
        ("repair", f"margin {s.repair.margin_m:g} m, {s.repair.footprint} footprints, priced on the "
                   f"{'defect outline' if s.repair.basis == 'outline' else 'lowest class contour'}"),
        ("registration tolerance", f"{s.registration.tolerance_m * 1000:g} mm on the structure"),
        ("misfit accepted by override", "yes" if s.registration.accept_misfit else "no"),
        ("map CRS", result.crs.to_string() if result.crs else "none (drawing frame only)"),
        ("scans", str(len(result.scans))),
        ("zones (class contours)", str(len(result.zones))),
        ("class levels from a calibration", calibration_summary(result) or "none named in the site file"),
    ]


def calibration_summary(result: "RunResult") -> str | None:
    """Which calibration the site's class levels come from (file, its hash, when, against what, AUC)."""
    d = recorded_calibration(result)
    if d is None:
        return None
    return (f"{d['file']} (sha256 {d['file_sha256'][:12]}), made {d['made']} against the sounding {d['sounding']} "
            f"of {', '.join(d['sounding_dates']) or 'an unknown date'}: AUC {fmt(d['auc'], '.3f')}, "
            f"{d['n_points']} sounding points")


def recorded_calibration(result: "RunResult") -> dict | None:
    from overlay.calibration.calibrate import read_calibration

    return read_calibration(result.site.zones.calibration) if result.site.zones.calibration is not None else None


def calibration_rows(data: dict) -> list[dict[str, object]]:
    """The agreement at each class level, by point and by area, as a calibration recorded it."""
    areas = {a["class"]: a for a in data.get("class_areas", [])}
    rows = []
    for t in data.get("class_levels", []):
        a = areas.get(t["class"], {})
        rows.append({"class": t["class"], "level_db": t["level_db"], "sensitivity": t["sensitivity"],
                     "sensitivity_95": t["sensitivity_95"], "specificity": t["specificity"],
                     "specificity_95": t["specificity_95"], "kappa": t["kappa"], "iou": a.get("iou"),
                     "found": a.get("found")})
    return rows


def interval(value: object, bounds: object) -> str:
    """A proportion with its 95 % interval: "0.83 (0.70-0.91)"."""
    if value is None:
        return "-"
    lo, hi = bounds if isinstance(bounds, (list, tuple)) else (None, None)
    return f"{value:.2f}" + (f" ({lo:.2f}-{hi:.2f})" if lo is not None and hi is not None else "")


def calibration_section(result: "RunResult") -> list[str]:
    d = recorded_calibration(result)
    if d is None:
        return []
    out = ["", "AGREEMENT WITH SOUNDING (the calibration the class levels come from; sounding is a reference, "
           "not the truth)", "  " + (calibration_summary(result) or "")]
    for r in calibration_rows(d):
        out.append(f"  {r['class']:<10} {r['level_db']:>5g} dB  sensitivity {interval(r['sensitivity'], r['sensitivity_95'])}"
                   f"  specificity {interval(r['specificity'], r['specificity_95'])}  kappa {fmt(r['kappa'], '.2f')}"
                   f"  area IoU {fmt(r['iou'], '.2f')}  sounded area found {fmt(r['found'], '.2f')}")
    return out


def placement_text(t: "Similarity", drawing_unit_m: float) -> str:
    """drawing → map in the words of the site file: scale and the bearing of the drawing's +x axis."""
    bearing = (90.0 - t.rotation_deg) % 360.0
    return (f"{t.scale / drawing_unit_m:.6f} map m per drawing m, the drawing's +x axis at bearing {bearing:.2f} deg "
            "(clockwise from grid north)")


def fit_text(s: "ScanResult", drawing_unit: str, drawing_unit_m: float) -> str:
    """The scanner → drawing fit in plain words: scale and rotation where the model has them."""
    p = s.fit.transform.params()
    if "scale" in p and "rotation_deg" in p and s.fit.model == "similarity":
        per_m = p["scale"] * drawing_unit_m  # drawing metres per working unit (metres on the surface)
        scale = f"{per_m:.6f} m" if drawing_unit_m == 1.0 else f"{p['scale']:.6g} {drawing_unit} ({per_m:.6f} m)"
        return (f"scale {scale} of drawing per m of surface, rotation {p['rotation_deg']:.2f} deg "
                "(counter-clockwise, the scanner's x axis to the drawing's)")
    return f"{s.fit.model} fit; its parameters are in the runs table (fit_params)"


def table(header: list[tuple[str, int, str]], rows: Iterable[list[str]]) -> list[str]:
    """Fixed-width columns: (title, width, '<' or '>')."""
    out = ["  " + " ".join(f"{t:{a}{w}}" for t, w, a in header)]
    for r in rows:
        out.append("  " + " ".join(f"{c:{a}{w}}" for c, (_, w, a) in zip(r, header)))
    return out


def run_report(result: "RunResult") -> str:
    """A readable report of a run, the cautions first."""
    site = result.site
    unit = site.drawing_unit
    out = [
        f"overlay {result.tool_version} - run {result.started}",
        f"site: {site.name} {site.structure}".rstrip(),
        "",
        "CAUTIONS",
        cautions_text("  ! "),
        "",
        f"classes: {', '.join(f'{c.name} >= {c.threshold_db:g} dB' for c in site.zones.classes)} "
        "(nested: a higher class lies inside the lower one; do not add their areas)",
        ID_SCHEME,
        f"drawing unit: {unit}; map CRS: {result.crs.to_string() if result.crs else 'none (drawing frame only)'}",
    ]
    if result.to_map is not None:
        out.append(f"drawing -> map: {placement_text(result.to_map, result.unit_m)}")
    if result.map_scale is not None:
        k, areal = result.map_scale
        out.append(f"map projection at the site: point scale {k:.6f}, areal scale {areal:.6f} (areas in this report "
                   "are surface m2, not map areas)")
    if site.alignment is not None:
        a = site.alignment
        out.append(f"alignment: {len(a.points)} vertices in the {a.frame} frame, start station {a.start_station_m:g} m")
    if result.map_fit is not None:
        out += ["drawing -> map fit from monuments:"] + ["  " + line for line in result.map_fit.report("m")]
    for s in result.scans:
        out += scan_section(s, result)
    out += quantities_section(result)
    out += calibration_section(result)
    out += zone_section(result)
    if result.warnings:
        out += ["", "warnings:"] + [f"  {w}" for w in result.warnings]
    return "\n".join(out) + "\n"


def scan_section(s: "ScanResult", result: "RunResult") -> list[str]:
    site = result.site
    out = [
        "",
        f"scan {s.scan_id} ({s.element or 'no element'}), surveyed {s.surveyed or 'not recorded'}",
        f"  points {s.n_points}, valid {int(s.valid.sum())}, spacing {s.spacing_m:.3f} m, payload {s.payload}",
    ]
    if s.gate is not None:
        out.append(f"  gate {s.gate.describe()}")
    if s.reference is not None:
        out.append(f"  reference {s.reference.describe()}")
    out.append(f"  incidence correction {s.incidence}")
    reasons: dict[str, int] = defaultdict(int)
    for r in s.invalid_reason:
        if r:
            reasons[r] += 1
    if reasons:
        out.append("  invalid points: " + ", ".join(f"{k} {v}" for k, v in sorted(reasons.items())))
    verdict = "passed" if s.fit_passed else "MISFIT ACCEPTED BY OVERRIDE"
    out.append(f"  scanner -> drawing: {s.fit_summary}, tolerance {site.registration.tolerance_m * 1000:g} mm, {verdict}")
    out.append(f"    {fit_text(s, site.drawing_unit, result.unit_m)}")
    out += ["    " + line for line in s.fit.report(site.drawing_unit)]
    return out


def quantities_section(result: "RunResult") -> list[str]:
    site = result.site
    out = ["", f"repair quantities by element, each defect once at the highest class it reaches (basis {site.repair.basis}: "
           f"{'the estimated defect outline' if site.repair.basis == 'outline' else 'the lowest class contour'}; margin "
           f"{site.repair.margin_m:g} m, {site.repair.footprint} footprints):"]
    totals = element_rows(result)
    if not totals:
        return out + ["  no defect above the lowest class level"]
    out += table([("element", 12, "<"), ("class", 9, "<"), ("defects", 7, ">"), ("affected", 11, ">"),
                  ("share", 8, ">"), ("footprint", 11, ">"), ("volume", 17, ">")],
                 ([str(r["element"]), str(r["class"]), str(r["n_defects"]), fmt(r["affected_area_m2"], ".4f", "m2"),
                   fmt(r["element_share_pct"], ".3f", "%"), fmt(r["footprint_area_m2"], ".4f", "m2"),
                   span(r["volume_low_m3"], r["volume_high_m3"], ".4f", "m3")] for r in totals))
    assets = asset_rows(result)
    if assets:
        out += ["", "per asset of the owner's register (outlines cut by the asset outlines; footprint and volume "
                "shared out by area):"]
        out += table([("asset", 12, "<"), ("class", 9, "<"), ("defects", 7, ">"), ("affected", 11, ">"),
                      ("share", 8, ">"), ("footprint", 11, ">"), ("volume", 17, ">")],
                     ([str(r["element"]), str(r["class"]), str(r["n_defects"]), fmt(r["affected_area_m2"], ".4f", "m2"),
                       fmt(r["element_share_pct"], ".3f", "%"), fmt(r["footprint_area_m2"], ".4f", "m2"),
                       span(r["volume_low_m3"], r["volume_high_m3"], ".4f", "m3")] for r in assets))
    cols = class_columns(site.zones.classes)
    out += ["", "defects (contour areas of every class beside the priced outline):"]
    out += table([("defect", 18, "<"), ("element", 12, "<"), ("class", 9, "<"), ("affected", 10, ">"),
                  ("outline from", 12, "<"), *[(f"{c.name} contour", 15, ">") for c in site.zones.classes],
                  ("footprint L x W", 15, ">"), ("depth", 13, ">"), ("peak", 8, ">"), ("conf.", 5, ">")],
                 ([str(r["defect_id"]), str(r["element"]), str(r["class"]), fmt(r["affected_area_m2"], ".4f", "m2"),
                   str(r["outline_basis"] or "-"), *[fmt(r[c], ".4f", "m2") for c in cols],
                   dims(r["footprint_length_m"], r["footprint_width_m"]),
                   span(r["depth_low_m"], r["depth_high_m"], ".3f", "m"), fmt(r["peak_hz"], ".0f", "Hz"),
                   fmt(r["confidence"], ".2f")]
                  for r in defect_rows(result.zones, site.zones.classes, site.repair.basis)))
    out.append("  depths are order-of-magnitude estimates (thin plate between clamped and simply supported edges)")
    return out


def zone_section(result: "RunResult") -> list[str]:
    out = ["", "class contours (information: a defect has a zone in every class it reaches; outline = its defect's):"]
    if not result.zones:
        return out + ["  none above the lowest class level"]
    by_id = {z.zone_id: z for z in result.zones}
    return out + table(
        [("zone", 20, "<"), ("element", 12, "<"), ("class", 9, "<"), ("contour", 10, ">"), ("outline", 10, ">"),
         ("VER max", 8, ">"), ("peak", 8, ">"), ("conf.", 5, ">"), ("station", 11, ">"), ("offset", 8, ">")],
        ([str(r["zone_id"]), str(r["element"]), str(r["class"]), fmt(r["contour_area_m2"], ".4f", "m2"),
          fmt(r["outline_area_m2"], ".4f", "m2"), fmt(by_id[str(r["zone_id"])].ver_max_db, ".1f", "dB"),
          fmt(r["peak_hz"], ".0f", "Hz"), fmt(r["confidence"], ".2f"),
          fmt(by_id[str(r["zone_id"])].station_m, ".2f", "m"), fmt(by_id[str(r["zone_id"])].offset_m, ".2f", "m")]
         for r in zone_rows(result)))
