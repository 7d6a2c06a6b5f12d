"""The plain-text run report: what was read, how it was fitted, what was found, and the cautions."""

from __future__ import annotations

from collections import defaultdict
from typing import TYPE_CHECKING

from .cautions import cautions_text

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
        reasons = defaultdict(int)
        for r in s.invalid_reason:
            if r:
                reasons[r] += 1
        if reasons:
            out.append("  invalid points: " + ", ".join(f"{k} {v}" for k, v in sorted(reasons.items())))
        out.append(f"  scanner -> drawing ({'passed' if s.fit_passed else 'MISFIT ACCEPTED BY OVERRIDE'}):")
        out += ["    " + line for line in s.fit.report(unit)]
    out += ["", "zones:"]
    if not result.zones:
        out.append("  none above the lowest class level")
    out.append(f"  {'zone':<24} {'element':<14} {'class':<10} {'area m2':>8} {'VERmax dB':>9} {'peak Hz':>8} {'conf':>5}")
    for z in result.zones:
        out.append(
            f"  {z.zone_id:<24} {z.element:<14} {z.class_name:<10} {z.area_m2:8.3f} {z.ver_max_db:9.1f} "
            f"{z.peak_hz:8.0f} {z.confidence:5.2f}"
        )
    totals: dict[tuple[str, str], float] = defaultdict(float)
    for z in result.zones:
        totals[(z.element, z.class_name)] += z.area_m2
    if totals:
        out += ["", "affected area per element and class (m2):"]
        for (element, cls), area in sorted(totals.items()):
            out.append(f"  {element:<14} {cls:<10} {area:8.3f}")
    if result.warnings:
        out += ["", "warnings:"] + [f"  {w}" for w in result.warnings]
    return "\n".join(out) + "\n"
