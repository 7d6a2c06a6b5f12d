"""The plain-text run report: what was read, how it was fitted, what was found, and the cautions."""

from __future__ import annotations

from collections import defaultdict
from typing import TYPE_CHECKING

from .cautions import cautions_text
from .exporters.quantities_csv import quantity_rows

if TYPE_CHECKING:
    from .pipeline import RunResult


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
        f"classes: {', '.join(f'{c.name} >= {c.threshold_db:g} dB' for c in site.classes)} "
        "(nested: a higher class lies inside the lower one; do not add their areas)",
        f"drawing unit: {unit}; map CRS: {result.crs.to_string() if result.crs else 'none (drawing frame only)'}",
    ]
    if result.to_map is not None:
        t = result.to_map
        out.append(f"drawing -> map: scale {t.scale:.9f}, rotation {t.rotation_deg:.6f} deg")
    if result.map_scale is not None:
        k, areal = result.map_scale
        placed = result.to_map.scale / result.unit_m if result.to_map is not None else 1.0
        out.append(f"map projection at the site: point scale {k:.6f}, areal scale {areal:.6f} (an area measured in the "
                   f"CRS is the ground area x {areal:.6f} when the placement carries the projection scale; this "
                   f"placement's scale is {placed:.6f}); areas in this report are surface m2")
    if site.alignment is not None:
        a = site.alignment
        out.append(f"alignment: {len(a.points)} vertices in the {a.frame} frame, start station {a.start_station_m:g} m")
    if result.map_fit is not None:
        out += ["drawing -> map fit from monuments:"] + ["  " + line for line in result.map_fit.report("m")]
    for s in result.scans:
        out += [
            "",
            f"scan {s.scan_id} ({s.element or 'no element'}), surveyed {s.surveyed or 'unknown'}",
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
        out.append(f"  scanner -> drawing: {s.fit_describe}, tolerance {site.tolerance_m * 1000:g} mm, {verdict}:")
        out += ["    " + line for line in s.fit.report(unit)]
    out += ["", "zones (area: class contour; outline: estimated defect outline):"]
    if not result.zones:
        out.append("  none above the lowest class level")
    out.append(f"  {'zone':<20} {'element':<12} {'class':<9} {'area m2':>8} {'outline':>8} {'VERmax':>6} "
               f"{'peak Hz':>7} {'depth mm':>11} {'conf':>5} {'station m':>10} {'offset m':>8}")
    for z in result.zones:
        depth = f"{z.depth_low_m * 1e3:.0f}-{z.depth_high_m * 1e3:.0f}" if z.depth_low_m == z.depth_low_m else "-"
        out.append(
            f"  {z.zone_id:<20} {z.element:<12} {z.class_name:<9} {z.area_m2:8.3f} {z.outline_area_m2:8.3f} "
            f"{z.ver_max_db:6.1f} {z.peak_hz:7.0f} {depth:>11} {z.confidence:5.2f} {z.station_m:10.2f} {z.offset_m:8.2f}"
        )
    rows = [r for r in quantity_rows(result) if r["row_kind"] == "element_total"]
    if rows:
        out += ["", f"repair quantities per element and class (basis: {site.basis}, margin {site.margin_m:g} m, "
                f"{site.footprint} footprints; each defect once per class; do not add classes):"]
        out.append(f"  {'element':<12} {'class':<9} {'defects':>7} {'affected m2':>11} {'share %':>8} "
                   f"{'footprint m2':>12} {'volume m3':>15}")
        for r in rows:
            vol = f"{r['volume_low_m3']}-{r['volume_high_m3']}" if r["volume_low_m3"] != "" else "-"
            out.append(f"  {r['element']:<12} {r['class']:<9} {r['n_defects']:>7} {r['affected_area_m2']:>11} "
                       f"{r['element_share_pct'] if r['element_share_pct'] != '' else '-':>8} {r['footprint_area_m2']:>12} {vol:>15}")
        out.append("  depths are order-of-magnitude estimates (thin plate between clamped and simply supported edges)")
    if result.warnings:
        out += ["", "warnings:"] + [f"  {w}" for w in result.warnings]
    return "\n".join(out) + "\n"
