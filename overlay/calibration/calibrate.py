"""Calibrate the class levels against sounding: agreement over a sweep of VER levels and suggested levels.

Takes a run's scans (their VER maps in the drawing frame) and the engineer's sounding
(overlay.calibration.sounding) and measures, at every level of the sweep, how the two agree by area and by
point (overlay.calibration.agreement).  It suggests levels and says what they rest on — it never changes a
site file: the engineer pastes the suggested ``[zones.classes]`` if they agree.

Suggested levels, from the point sweep:

* the level with the largest Youden's J (sensitivity + specificity − 1), with a bootstrap 95 %
  interval — where the scan and the hammer agree best;
* the highest level at which the scans still find ``TARGET_SENSITIVITY`` of the hollow points —
  a lowest class that misses little;
* the lowest level at which ``TARGET_SPECIFICITY`` of the sound points read below it — a highest
  class with few false alarms.

Per element as well, where an element has at least ``MIN_EACH`` hollow and ``MIN_EACH`` sound points.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import shapely
from shapely.geometry.base import BaseGeometry

from overlay.calibration.agreement import (
    AreaAgreement,
    Counts,
    area_agreement,
    auc,
    best_youden,
    bootstrap_level,
    reaching_sensitivity,
    reaching_specificity,
    roc,
    sweep,
    wilson,
)

if TYPE_CHECKING:
    from overlay.calibration.sounding import Sounding
    from overlay.job import RunResult
    from overlay.scan import ScanResult

LEVELS = tuple(float(v) for v in np.arange(2.0, 20.0 + 1e-9, 0.5))
TARGET_SENSITIVITY = 0.9
TARGET_SPECIFICITY = 0.95
MIN_EACH = 10
FORMAT = "overlay-calibration/1"


@dataclass(frozen=True)
class Suggestion:
    """Suggested levels from one set of points (the site, or one element) and what they rest on."""

    scope: str
    n_hollow: int
    n_sound: int
    youden_db: float | None
    youden_interval: tuple[float, float]
    youden_sensitivity: tuple[float, float, float]  # value, Wilson low, high
    youden_specificity: tuple[float, float, float]
    sensitive_db: float | None  # highest level still finding TARGET_SENSITIVITY of the hollow points
    specific_db: float | None  # lowest level at which TARGET_SPECIFICITY of the sound points read below it


@dataclass
class Calibration:
    """Everything a calibration found, ready for its report and its JSON."""

    site: str
    sounding: str
    sounding_sha256: str
    sounding_dates: tuple[str, ...]
    made: str
    elements: tuple[str, ...]
    looked_at_m2: float
    area: list[AreaAgreement] = field(default_factory=list)  # the sweep, by area (traced polygons)
    class_area: list[tuple[str, AreaAgreement]] = field(default_factory=list)  # at the site's class levels
    outline_area: AreaAgreement | None = None  # the estimated defect outlines (what is priced) against the traced areas
    tables: list[Counts] = field(default_factory=list)  # the sweep, by point
    class_tables: list[tuple[str, float, Counts]] = field(default_factory=list)
    n_points: int = 0
    n_outside: int = 0  # sounding points outside every scan: left out
    auc: float = float("nan")
    roc_fpr: list[float] = field(default_factory=list)
    roc_tpr: list[float] = field(default_factory=list)
    suggestions: list[Suggestion] = field(default_factory=list)
    disagreements: list[tuple[str, str, BaseGeometry]] = field(default_factory=list)  # (kind, element, area)
    point_xy: np.ndarray | None = None  # the sounding points on the scans, drawing frame
    point_ver: np.ndarray | None = None  # the VER each reads
    point_hollow: np.ndarray | None = None  # the sounding's verdict
    point_elements: tuple[str, ...] = ()
    scan_hollow: BaseGeometry = field(default_factory=shapely.Polygon)  # VER ≥ the lowest class level, looked-at area
    traced: BaseGeometry = field(default_factory=shapely.Polygon)  # the traced hollow areas, looked-at area

    def to_json(self) -> dict[str, Any]:
        """The figures a later run records and its report shows (no geometry)."""
        return {
            "format": FORMAT, "site": self.site, "sounding": self.sounding, "sounding_sha256": self.sounding_sha256,
            "sounding_dates": list(self.sounding_dates), "made": self.made, "elements": list(self.elements),
            "looked_at_m2": self.looked_at_m2, "auc": _num(self.auc), "n_points": self.n_points,
            "n_outside": self.n_outside, "roc": {"fpr": self.roc_fpr, "tpr": self.roc_tpr},
            "class_levels": [{"class": c, "level_db": lvl, **_counts(t)} for c, lvl, t in self.class_tables],
            "class_areas": [{"class": c, **_area(a)} for c, a in self.class_area],
            "outline_area": _area(self.outline_area) if self.outline_area is not None else None,
            "suggestions": [{**asdict(s), "youden_interval": list(s.youden_interval),
                             "youden_sensitivity": list(s.youden_sensitivity),
                             "youden_specificity": list(s.youden_specificity)} for s in self.suggestions],
        }


def _num(v: float) -> float | None:
    return None if v != v else round(float(v), 6)


def _counts(t: Counts) -> dict[str, Any]:
    lo_se, hi_se = wilson(t.tp, t.tp + t.fn)
    lo_sp, hi_sp = wilson(t.tn, t.tn + t.fp)
    return {"tp": t.tp, "fp": t.fp, "fn": t.fn, "tn": t.tn, "sensitivity": _num(t.sensitivity),
            "sensitivity_95": [_num(lo_se), _num(hi_se)], "specificity": _num(t.specificity),
            "specificity_95": [_num(lo_sp), _num(hi_sp)], "kappa": _num(t.kappa)}


def _area(a: AreaAgreement) -> dict[str, Any]:
    return {"level_db": _num(a.level_db), "both_m2": round(a.both_m2, 6), "either_m2": round(a.either_m2, 6),
            "scan_only_m2": round(a.scan_only_m2, 6), "sounding_only_m2": round(a.sounding_only_m2, 6),
            "iou": _num(a.iou), "found": _num(a.found)}


def file_sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


# --- reading the scans --------------------------------------------------------------------------------

class ScanField:
    """One scan's VER in the drawing frame, ready to contour at any level and to read at any point."""

    def __init__(self, scan: "ScanResult"):
        from overlay.zones.grid import ScatterGrid, grid_from_indices

        self.scan = scan
        ok = scan.valid & np.isfinite(scan.ver_db)
        self.ok = ok
        if scan.grid_rc is not None and (scan.grid_rc[:, 0] >= 0).all():
            self.grid: Any = grid_from_indices(scan.point_xy, scan.grid_rc[:, 0], scan.grid_rc[:, 1])
        else:
            self.grid = ScatterGrid(scan.point_xy)
        self.values = self.grid.contour_values(scan.ver_db, ok)

    def hollow(self, level: float) -> BaseGeometry:
        """Where the scan reads VER ≥ level, within its extent."""
        from overlay.zones.contour import level_polygons

        polys = level_polygons(self.grid, self.values, level)
        return shapely.intersection(shapely.union_all(polys), self.scan.extent) if polys else shapely.Polygon()

    def read(self, xy: np.ndarray) -> np.ndarray:
        """VER at ``xy`` (linear between the scan's valid points); NaN outside the scan's extent."""
        from scipy.interpolate import LinearNDInterpolator

        out = np.full(len(xy), np.nan)
        inside = shapely.contains_xy(self.scan.extent, xy[:, 0], xy[:, 1]) if len(xy) else np.zeros(0, bool)
        if inside.any() and self.ok.sum() >= 3:
            f = LinearNDInterpolator(self.scan.point_xy[self.ok], self.scan.ver_db[self.ok])
            out[inside] = f(xy[inside])
        return out


def calibrate(result: "RunResult", sounding: "Sounding", now: dt.datetime | None = None,
              sounded: set[str] | None = None) -> Calibration:
    """The agreement of a run's scans with a sounding, over the sweep and at the site's class levels.

    ``sounded``: the elements the sounding covered (default: those it names — traced areas name only
    the elements where the hammer found a hollow, so give them all when it found none somewhere)."""
    site = result.site
    u2 = result.unit_m ** 2
    covered = sounded if sounded else sounding.elements
    scans = [s for s in result.scans if s.element in covered] or list(result.scans)
    fields = [ScanField(s) for s in scans]
    looked_at = shapely.union_all([s.extent for s in scans])
    cal = Calibration(site=f"{site.name} {site.structure}".strip(), sounding=sounding.source.name,
                      sounding_sha256=file_sha256(sounding.source), sounding_dates=sounding.dates,
                      made=(now or dt.datetime.now(dt.timezone.utc)).strftime("%Y-%m-%dT%H:%M:%SZ"),
                      elements=tuple(sorted(covered)), looked_at_m2=looked_at.area * u2)
    class_levels = [(c.name, c.threshold_db) for c in site.zones.classes]
    lowest = class_levels[0][1]
    if sounding.polygons:
        traced = shapely.union_all(list(sounding.polygons))
        hollow_at = {lvl: shapely.union_all([f.hollow(lvl) for f in fields]) for lvl in
                     sorted(set(LEVELS) | {lvl for _, lvl in class_levels})}
        cal.area = [area_agreement(lvl, hollow_at[lvl], traced, looked_at, u2) for lvl in LEVELS]
        cal.class_area = [(c, area_agreement(lvl, hollow_at[lvl], traced, looked_at, u2)) for c, lvl in class_levels]
        outlines = shapely.union_all([z.defect for z in result.zones if z.defect_id == z.zone_id
                                      and set(z.scan_id.split(";")) & {s.scan_id for s in scans}])
        cal.outline_area = area_agreement(float("nan"), outlines, traced, looked_at, u2)
        cal.scan_hollow = shapely.intersection(hollow_at[lowest], looked_at)
        cal.traced = shapely.intersection(traced, looked_at)
        cal.disagreements = _disagreements(cal.scan_hollow, cal.traced, scans)
    else:
        cal.scan_hollow = shapely.intersection(shapely.union_all([f.hollow(lowest) for f in fields]), looked_at)
    if len(sounding.points):
        ver = np.full(len(sounding.points), np.nan)
        for f in fields:
            ver = np.fmax(ver, f.read(sounding.points))  # where scans overlap, the highest reading (as the mosaic)
        inside = np.isfinite(ver)
        cal.n_points, cal.n_outside = int(inside.sum()), int((~inside).sum())
        v, h = ver[inside], sounding.hollow[inside]
        cal.point_xy, cal.point_ver, cal.point_hollow = sounding.points[inside], v, h
        cal.point_elements = tuple(e for e, ok in zip(sounding.point_elements, inside) if ok)
        cal.tables = sweep(LEVELS, v, h)
        cal.class_tables = [(c, lvl, sweep([lvl], v, h)[0]) for c, lvl in class_levels]
        cal.auc = auc(v, h)
        fpr, tpr, _ = roc(v, h)
        cal.roc_fpr, cal.roc_tpr = [round(float(x), 6) for x in fpr], [round(float(x), 6) for x in tpr]
        cal.suggestions = [suggest("site", v, h)]
        for e in sorted(set(cal.point_elements)):
            mine = np.array([x == e for x in cal.point_elements])
            if (h[mine]).sum() >= MIN_EACH and (~h[mine]).sum() >= MIN_EACH:
                cal.suggestions.append(suggest(e, v[mine], h[mine]))
    return cal


def suggest(scope: str, ver: np.ndarray, hollow: np.ndarray) -> Suggestion:
    """Suggested levels from one set of points (see the module docstring)."""
    tables = sweep(LEVELS, ver, hollow)
    best = best_youden(LEVELS, tables)
    sens = reaching_sensitivity(LEVELS, tables, TARGET_SENSITIVITY)
    spec = reaching_specificity(LEVELS, tables, TARGET_SPECIFICITY)
    nan3 = (float("nan"),) * 3
    if best is None:
        return Suggestion(scope, int(hollow.sum()), int((~hollow).sum()), None, (float("nan"), float("nan")),
                          nan3, nan3, None, None)
    t = tables[best]
    return Suggestion(scope, int(hollow.sum()), int((~hollow).sum()), LEVELS[best], bootstrap_level(LEVELS, ver, hollow),
                      (t.sensitivity, *wilson(t.tp, t.tp + t.fn)), (t.specificity, *wilson(t.tn, t.tn + t.fp)),
                      LEVELS[sens] if sens is not None else None, LEVELS[spec] if spec is not None else None)


def _disagreements(scan_hollow: BaseGeometry, sounded: BaseGeometry, scans: list["ScanResult"]
                   ) -> list[tuple[str, str, BaseGeometry]]:
    """Areas where only one of them says hollow, cut by scan (for the follow-up visit), by kind."""
    out = []
    for kind, g in (("scan only", shapely.difference(scan_hollow, sounded)),
                    ("sounding only", shapely.difference(sounded, scan_hollow))):
        for s in scans:
            piece = shapely.intersection(g, s.extent)
            for part in shapely.get_parts(piece):
                if part.geom_type == "Polygon" and part.area > 0:
                    out.append((kind, s.element, part))
    return out


def suggested_classes(result: "RunResult", cal: Calibration) -> str:
    """A ``[[zones.classes]]`` snippet the engineer may paste — or the reason there is none."""
    site = cal.suggestions[0] if cal.suggestions else None
    lines = [f"# suggested by `overlay calibrate` from {cal.sounding} (sha256 {cal.sounding_sha256[:12]}…), "
             f"{cal.made}; AUC {cal.auc:.3f}, {cal.n_points} sounding points",
             "# a suggestion, not applied: check it against the engineer's judgement before pasting"]
    names = [c.name for c in result.site.zones.classes]
    if site is None or site.youden_db is None:
        return "\n".join(lines + ["# no suggestion: the sounding points hold no hollow or no sound verdict"]) + "\n"
    levels = [site.sensitive_db, site.youden_db, site.specific_db] if len(names) == 3 else [site.youden_db]
    if len(names) != 3:
        lines.append(f"# the site has {len(names)} classes; the level of best agreement is {site.youden_db:g} dB")
        return "\n".join(lines) + "\n"
    if any(v is None for v in levels) or not (levels[0] < levels[1] < levels[2]):  # type: ignore[operator]
        lines.append("# no three rising levels (sensitivity 0.9, best agreement, specificity 0.95): "
                     f"{', '.join('none' if v is None else f'{v:g} dB' for v in levels)}; keep the site's levels")
        return "\n".join(lines) + "\n"
    why = [f"still finds {TARGET_SENSITIVITY:.0%} of the hollow points", "best agreement (Youden's J)",
           f"{TARGET_SPECIFICITY:.0%} of the sound points read below it"]
    lines += ["# replace the site's [[zones.classes]] with these, and add to its [zones] table the line",
              f'# calibration = "<path to {result.site.outputs.basename}-calibration.json>"  (runs then record it)']
    for name, level, reason in zip(names, levels, why):
        lines += ["", "[[zones.classes]]", f'name = "{name}"', f"threshold_db = {level:g}  # {reason}"]
    return "\n".join(lines) + "\n"


def read_calibration(path: Path) -> dict[str, Any]:
    """A calibration's JSON as a run records it (checked for its format)."""
    from overlay.errors import SiteFileError

    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise SiteFileError(f"not a calibration file ({exc})", source=path, field="zones.calibration") from exc
    if not isinstance(data, dict) or data.get("format") != FORMAT:
        raise SiteFileError(f"not a calibration file (format is not {FORMAT!r})", source=path,
                            field="zones.calibration")
    data["file_sha256"] = file_sha256(path)
    data["file"] = path.name
    return data
