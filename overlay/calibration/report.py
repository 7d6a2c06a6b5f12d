"""What `overlay calibrate` writes: the report in text and HTML, the figures as JSON (which a site file
names to record where its class levels come from), a ``[zones.classes]`` snippet, the ROC and
agreement pictures, and a GeoPackage of the disagreements for the follow-up visit.
All written beside their final paths and moved in together (overlay.outputs.staging)."""

from __future__ import annotations

import base64
import html
import json
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import shapely

from overlay.calibration.calibrate import (
    LEVELS,
    TARGET_SENSITIVITY,
    TARGET_SPECIFICITY,
    Calibration,
    suggested_classes,
)
from overlay.cautions import CAUTIONS, cautions_text
from overlay.outputs.report_text import fmt, interval

if TYPE_CHECKING:
    from overlay.job import RunResult

LIMITS = ("Sounding is a reference, not the truth: the hammer misses small and deep hollows, and a traced "
          "outline is drawn generously around what rang hollow. Agreement figures measure the scans against "
          "that reference over the area both looked at; they say how the two methods agree on this structure, "
          "not how right either is.")


def output_names(basename: str) -> dict[str, str]:
    return {"text": f"{basename}-calibration.txt", "html": f"{basename}-calibration.html",
            "json": f"{basename}-calibration.json", "classes": f"{basename}-calibration-classes.toml",
            "gpkg": f"{basename}-disagreements.gpkg", "roc": f"{basename}-calibration-roc.png",
            "map": f"{basename}-calibration-map.png"}


def text_report(result: "RunResult", cal: Calibration) -> str:
    out = [f"overlay {result.tool_version} - calibration against sounding, {cal.made}", f"site: {cal.site}", "",
           "CAUTIONS", cautions_text("  ! "), "", "LIMITS", f"  {LIMITS}", "",
           f"sounding: {cal.sounding} (sha256 {cal.sounding_sha256[:12]}), surveyed "
           f"{', '.join(cal.sounding_dates) or 'on an unknown date'}, elements {', '.join(cal.elements)}",
           f"area looked at by both (the extents of the scans on those elements): {cal.looked_at_m2:.3f} m2"]
    if cal.class_area:
        out += ["", "BY AREA (traced hollow areas against VER >= level)",
                f"  {'class':<10} {'level':>7} {'both m2':>9} {'either m2':>10} {'scans only':>11} "
                f"{'sounding only':>14} {'IoU':>6} {'found':>6}"]
        rows = [(c, f"{a.level_db:>4g} dB", a) for c, a in cal.class_area]
        if cal.outline_area is not None:
            rows.append(("outlines", "priced", cal.outline_area))
        for c, lvl, a in rows:
            out.append(f"  {c:<10} {lvl:>7} {a.both_m2:>9.4f} {a.either_m2:>10.4f} {a.scan_only_m2:>11.4f} "
                       f"{a.sounding_only_m2:>14.4f} {fmt(a.iou, '.2f'):>6} {fmt(a.found, '.2f'):>6}")
        out.append("  (outlines: the estimated defect outlines the quantities are priced on; a class contour at an "
                   "absolute VER level lies inside the defect's edge, where the vibration fades)")
    if cal.tables:
        out += ["", f"BY POINT ({cal.n_points} sounding points on the scans, {cal.n_outside} outside every scan "
                "left out; 95 % Wilson intervals)",
                f"  AUC {fmt(cal.auc, '.3f')} (0.5: no better than chance, 1: every hollow point reads higher than "
                "every sound one)"]
        for c, lvl, t in cal.class_tables:
            out.append(f"  {c:<10} {lvl:>4g} dB  hollow {t.tp}/{t.tp + t.fn} found, sound {t.tn}/{t.tn + t.fp} "
                       f"clear; sensitivity {interval(t.sensitivity, _w(t.tp, t.fn))}, specificity "
                       f"{interval(t.specificity, _w(t.tn, t.fp))}, kappa {fmt(t.kappa, '.2f')}")
        out += ["", "SUGGESTED LEVELS (a suggestion: nothing is changed in the site file)"]
        for s in cal.suggestions:
            if s.youden_db is None:
                out.append(f"  {s.scope}: none ({s.n_hollow} hollow and {s.n_sound} sound points)")
                continue
            out.append(f"  {s.scope} ({s.n_hollow} hollow, {s.n_sound} sound points): best agreement at "
                       f"{s.youden_db:g} dB (bootstrap 95 % {s.youden_interval[0]:g}-{s.youden_interval[1]:g} dB; "
                       f"sensitivity {interval(s.youden_sensitivity[0], s.youden_sensitivity[1:])}, specificity "
                       f"{interval(s.youden_specificity[0], s.youden_specificity[1:])}); finds "
                       f"{TARGET_SENSITIVITY:.0%} of the hollow points up to {fmt(s.sensitive_db, 'g', 'dB')}; "
                       f"{TARGET_SPECIFICITY:.0%} of the sound points clear from {fmt(s.specific_db, 'g', 'dB')}"
                       + (" — the best level lies at the edge of the sweep and may lie beyond it"
                          if s.youden_db in (LEVELS[0], LEVELS[-1]) else ""))
        out += ["", "LEVEL SWEEP", f"  {'level':>7} {'sens.':>6} {'spec.':>6} {'kappa':>6} {'IoU':>6}"]
        areas = {a.level_db: a for a in cal.area}
        for lvl, t in zip(LEVELS, cal.tables):
            a = areas.get(lvl)
            out.append(f"  {lvl:>4g} dB {fmt(t.sensitivity, '.2f'):>6} {fmt(t.specificity, '.2f'):>6} "
                       f"{fmt(t.kappa, '.2f'):>6} {fmt(a.iou if a else None, '.2f'):>6}")
    out += ["", "the snippet of class levels:", suggested_classes(result, cal)]
    return "\n".join(out) + "\n"


def _w(k: int, other: int) -> tuple[float, float]:
    from overlay.calibration.agreement import wilson

    return wilson(k, k + other)


def html_report(result: "RunResult", cal: Calibration, pictures: dict[str, bytes]) -> str:
    esc = html.escape

    def img(name: str, alt: str) -> str:
        return (f'<img alt="{esc(alt)}" src="data:image/png;base64,{base64.b64encode(pictures[name]).decode()}">'
                if name in pictures else "")

    rows = []
    areas = dict(cal.class_area)
    for c, lvl, t in cal.class_tables or [(c, a.level_db, None) for c, a in cal.class_area]:
        a = areas.get(c)
        rows.append("<tr>" + "".join(f"<td>{esc(v)}</td>" for v in (
            c, f"{lvl:g} dB", interval(t.sensitivity, _w(t.tp, t.fn)) if t else "-",
            interval(t.specificity, _w(t.tn, t.fp)) if t else "-", fmt(t.kappa, ".2f") if t else "-",
            fmt(a.iou, ".2f") if a else "-", fmt(a.found, ".2f") if a else "-")) + "</tr>")
    head = "".join(f"<th>{h}</th>" for h in ("class", "level", "sensitivity", "specificity", "kappa", "area IoU",
                                              "sounded area found"))
    return "\n".join([
        "<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
        f"<title>{esc(cal.site)} — agreement with sounding</title>",
        "<style>body{font-family:system-ui,sans-serif;max-width:1000px;margin:2em auto;color:#222}"
        "td,th{border:1px solid #ccc;padding:.25em .5em}table{border-collapse:collapse}"
        ".cautions{border:2px solid #D55E00;background:#fff4ec;padding:.6em 1em}img{max-width:100%}"
        "pre{background:#f7f7f7;padding:.6em}</style></head><body>",
        f"<h1>{esc(cal.site)} — agreement with sounding</h1>",
        '<div class="cautions"><strong>Cautions</strong><ul>', *[f"<li>{esc(c)}</li>" for c in CAUTIONS], "</ul></div>",
        f"<p>{esc(LIMITS)}</p>",
        f"<p>Sounding {esc(cal.sounding)} of {esc(', '.join(cal.sounding_dates))}; {cal.n_points} sounding points on the "
        f"scans ({cal.n_outside} outside left out); AUC {esc(fmt(cal.auc, '.3f'))}. Intervals are 95 % Wilson "
        "score intervals.</p>",
        f"<h2>At the site's class levels</h2><table><tr>{head}</tr>{''.join(rows)}</table>",
        img("roc", "ROC curve"), img("map", "map of agreements and disagreements"),
        "<h2>Suggested class levels (not applied)</h2>",
        f"<pre>{esc(suggested_classes(result, cal))}</pre>",
        f"<h2>The whole report</h2><pre>{esc(text_report(result, cal))}</pre>",
        "</body></html>"])


def pictures_of(result: "RunResult", cal: Calibration) -> dict[str, bytes]:
    from overlay.outputs import site_pictures

    out: dict[str, bytes] = {}
    site = cal.suggestions[0] if cal.suggestions else None
    if cal.roc_fpr:
        marks = []
        for name, lvl, t in cal.class_tables:
            marks.append((1 - t.specificity, t.sensitivity, f"{name} {lvl:g} dB"))
        if site is not None and site.youden_db is not None:
            t = cal.tables[LEVELS.index(site.youden_db)]
            marks.append((1 - t.specificity, t.sensitivity, f"best {site.youden_db:g} dB"))
        out["roc"] = site_pictures.roc_curve(cal.roc_fpr, cal.roc_tpr, None if cal.auc != cal.auc else cal.auc,
                                        [m for m in marks if m[0] == m[0] and m[1] == m[1]])
    lowest = result.site.zones.classes[0].threshold_db
    agree = None
    pts = cal.point_xy if cal.point_xy is not None else np.zeros((0, 2))
    if cal.point_ver is not None and cal.point_hollow is not None:
        agree = (cal.point_ver >= lowest) == cal.point_hollow
    out["map"] = site_pictures.agreement_map(result, cal.scan_hollow, cal.traced, pts, agree, lowest)
    return out


def write_disagreements(path: Path, result: "RunResult", cal: Calibration) -> None:
    """The follow-up visit's GeoPackage: disagreement areas, and the sounding points with the VER they read."""
    from overlay.exporters.gpkg import GPKG_VERSION, Layer, to_output_frame, write_layer

    move, crs = to_output_frame(result)
    u2 = result.unit_m ** 2
    lowest = result.site.zones.classes[0].threshold_db
    dis = cal.disagreements
    write_layer(path, Layer("disagreements", {
        "kind": np.array([k for k, _, _ in dis], dtype=object),
        "element": np.array([e for _, e, _ in dis], dtype=object),
        "area_m2": np.array([g.area * u2 for _, _, g in dis], dtype=np.float64),
        "level_db": np.full(len(dis), lowest, dtype=np.float64),
    }, np.array([move(g) for _, _, g in dis], dtype=object), "Polygon"), crs, {"VERSION": GPKG_VERSION})
    pts = cal.point_xy if cal.point_xy is not None else np.zeros((0, 2))
    ver = cal.point_ver if cal.point_ver is not None else np.zeros(0)
    hollow = cal.point_hollow if cal.point_hollow is not None else np.zeros(0, dtype=bool)
    write_layer(path, Layer("sounding_points", {
        "verdict": np.array(["hollow" if h else "sound" for h in hollow], dtype=object),
        "element": np.array(list(cal.point_elements), dtype=object),
        "ver_db": np.asarray(ver, dtype=np.float64),
        "agrees": (np.asarray(ver) >= lowest) == hollow,
    }, np.array([move(shapely.Point(p)) for p in pts], dtype=object), "Point"), crs)


def write_all(staged: dict[str, Path], result: "RunResult", cal: Calibration) -> None:
    """Every calibration output into its temporary path (keys of output_names; "roc" only with points)."""
    pics = pictures_of(result, cal)
    staged["text"].write_text(text_report(result, cal), encoding="utf-8")
    staged["html"].write_text(html_report(result, cal, pics), encoding="utf-8")
    staged["json"].write_text(json.dumps(cal.to_json(), indent=1), encoding="utf-8")
    staged["classes"].write_text(suggested_classes(result, cal), encoding="utf-8")
    staged["map"].write_bytes(pics["map"])
    if "roc" in staged:
        staged["roc"].write_bytes(pics["roc"])
    write_disagreements(staged["gpkg"], result, cal)
