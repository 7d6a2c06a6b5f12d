"""The site file (TOML, ``overlay-site/1``): read and checked into ``overlay.settings.Site``.

See docs/site-file.md for every field.  Paths in the file are relative to it.  Each table has its own
reader; ``read_site`` checks what spans tables (merge needs elements and a map, control points name
targets).
"""

from __future__ import annotations

import difflib
import glob
from pathlib import Path
from typing import Any

from overlay.assets.elements import is_geopackage_file
from overlay.assets.merge import KEEP_BACKUPS, check_layer_name
from overlay.errors import SiteFileError
from overlay.io.bundle import target_names
from overlay.io.tomlio import Fields, load_toml
from overlay.quantities import area_field
from overlay.settings import (
    LABEL_HEIGHT_MM,
    NOTE_HEIGHT_MM,
    REPAIR_MARGIN_M,
    SHEETS,
    TOLERANCE_M,
    AlignmentSpec,
    DxfStyle,
    Elements,
    EnergySpec,
    MapFrame,
    MergeSpec,
    Monument,
    OutputSpec,
    QualitySpec,
    RegistrationSpec,
    RepairSpec,
    ScanEntry,
    Site,
    ZoneClass,
    ZoneSpec,
)
from overlay.signal.energy import DEFAULT_PERCENTILE, REFERENCES
from overlay.units import LENGTH_TO_M
from overlay.zones.plate import aci318_modulus_pa
from overlay.zones.zone import Concrete

FORMAT = "overlay-site/1"
MAX_MARGIN_M = 2.0  # a cutting margin beyond this is a unit mistake (mm for m), not a margin
MODEL_CHOICES = ("auto", "similarity", "affine", "projective")
SCALE_RANGE = (0.9, 1.1)  # a declared map scale outside this is a unit mistake, not a projection's scale factor


def read_site(path: str | Path) -> Site:
    """Read and validate a site file; raise ``SiteFileError`` naming the field on the first problem."""
    path = Path(path)
    doc = Fields(load_toml(path, SiteFileError), "", path, SiteFileError)
    fmt = doc.string("format", required=True)
    if fmt != FORMAT:
        raise doc.fail("format", f"unsupported format {fmt!r}; this version reads {FORMAT!r}")
    s = _table(doc, "site", required=True)
    name = s.string("name", required=True) or ""
    structure = s.string("structure", "") or ""
    unit = s.choice("drawing_unit", tuple(LENGTH_TO_M), default="m")
    s.reject_unknown()

    site = Site(
        path=path,
        name=name,
        structure=structure,
        drawing_unit=unit,
        scans=_scans(doc, path),
        control_points=_control_points(doc),
        registration=_registration(doc),
        energy=_energy(doc),
        quality=_quality(doc),
        zones=_zones(doc, path),
        concrete=_concrete(doc),
        repair=_repair(doc),
        map=_map(doc),
        elements=_elements(doc, path),
        alignment=_alignment(doc),
        dxf=_dxf(doc, path),
        merge=_merge(doc),
        outputs=_outputs(doc),
    )
    doc.reject_unknown()
    _check_across_tables(site, doc)
    _check_control_points(site.control_points, site.scans, path)
    return site


def _check_across_tables(site: Site, doc: Fields) -> None:
    """What one table asks of another: a merge needs the asset register and a map; 'region' needs regions."""
    if site.merge is not None:
        if site.elements is None:
            raise doc.fail("merge", "needs [elements] naming the owner's asset GeoPackage and layer")
        if site.map is None:
            raise doc.fail("merge", "needs a [map] frame: findings go into the owner's GIS in its CRS")
        if site.elements.source is not None and not is_geopackage_file(site.elements.source):
            raise doc.fail("merge", f"the [elements] source {site.elements.source.name} is not a GeoPackage; "
                           "findings are merged into a GeoPackage or a PostgreSQL database")
        check_layer_name(site.merge.findings_layer, site.elements.layer, source=str(site.path))
    if site.energy.reference == "region":
        missing = [str(e.bundle) for e in site.scans if e.healthy_region is None]
        if missing:
            raise SiteFileError(f"'region' needs healthy_region on every scan; missing for {', '.join(missing)}",
                                source=site.path, field="energy.reference")


def _registration(doc: Fields) -> RegistrationSpec:
    reg = _table(doc, "registration")
    spec = RegistrationSpec(
        tolerance_m=reg.number("tolerance_m", TOLERANCE_M, positive=True) or TOLERANCE_M,
        accept_misfit=_bool(reg, "accept_misfit", RegistrationSpec.accept_misfit),
        model=reg.choice("model", MODEL_CHOICES, default=RegistrationSpec.model),
    )
    reg.reject_unknown({"tolerance": "tolerance_m, in metres on the structure (it was in drawing units)"})
    return spec


def _energy(doc: Fields) -> EnergySpec:
    en = _table(doc, "energy")
    reference = en.choice("reference", REFERENCES, default=EnergySpec.reference)
    percentile = en.number("percentile", DEFAULT_PERCENTILE, minimum=0.0) or 0.0
    if percentile > 100:
        raise en.fail("percentile", f"must lie in 0..100, got {percentile:g}")
    spec = EnergySpec(reference, percentile, _bool(en, "incidence_correction", EnergySpec.incidence_correction))
    en.reject_unknown()
    return spec


def _quality(doc: Fields) -> QualitySpec:
    qt = _table(doc, "quality")
    min_level = qt.number("min_signal_level", QualitySpec.min_signal_level, minimum=0.0) or 0.0
    if min_level > 1:
        raise qt.fail("min_signal_level", f"must lie in 0..1, got {min_level:g}")
    spec = QualitySpec(min_level, qt.number("min_snr_db"))
    qt.reject_unknown()
    return spec


def _zones(doc: Fields, path: Path) -> ZoneSpec:
    zt = _table(doc, "zones")
    min_area = zt.number("min_area_m2", ZoneSpec.min_area_m2, minimum=0.0) or 0.0
    classes = _classes(zt)
    calibration = None
    if zt.string("calibration") is not None:
        from overlay.calibration.calibrate import read_calibration

        calibration = path.parent / (zt.string("calibration") or "")
        if not calibration.is_file():
            raise zt.fail("calibration", f"file not found: {calibration}")
        read_calibration(calibration)  # a file that is not a calibration is refused now, not after the run
    zt.reject_unknown()
    return ZoneSpec(classes, min_area, calibration)


def _repair(doc: Fields) -> RepairSpec:
    rp = _table(doc, "repair")
    margin = rp.number("margin_m", REPAIR_MARGIN_M, minimum=0.0, maximum=MAX_MARGIN_M)
    spec = RepairSpec(
        margin_m=margin if margin is not None else REPAIR_MARGIN_M,
        footprint=rp.choice("footprint", ("aligned", "rotated"), default=RepairSpec.footprint),
        basis=rp.choice("basis", ("outline", "contour"), default=RepairSpec.basis),
    )
    rp.reject_unknown()
    return spec


def _outputs(doc: Fields) -> OutputSpec:
    out = _table(doc, "outputs")
    basename = out.string("basename", OutputSpec.basename) or OutputSpec.basename
    if any(c in basename for c in '/\\:*?"<>|') or basename.startswith("."):
        raise out.fail("basename", f"must be a plain file name stem, got {basename!r}")
    formats = out.raw("formats", list(OutputSpec.formats))
    if not isinstance(formats, list) or not all(isinstance(f, str) for f in formats) or not formats:
        raise out.fail("formats", f"must be a non-empty list of exporter names, got {formats!r}")
    out.reject_unknown()
    return OutputSpec(basename, tuple(formats))


def _control_points(doc: Fields) -> dict[str, tuple[float, float]]:
    cps: dict[str, tuple[float, float]] = {}
    cp = doc.table_of("control_points")
    if cp is not None:
        for key in list(cp.table):
            value = cp.pair(key)
            assert value is not None
            cps[key] = value
    return cps


def _table(doc: Fields, key: str, *, required: bool = False) -> Fields:
    t = doc.table_of(key)
    if t is None:
        if required:
            raise doc.fail(key, "table is required")
        t = Fields({}, key, doc.source, SiteFileError)
    return t


def _bool(t: Fields, key: str, default: bool) -> bool:
    v = t.raw(key, default)
    if not isinstance(v, bool):
        raise t.fail(key, f"must be true or false, got {v!r}")
    return v


def _classes(zt: Fields) -> tuple[ZoneClass, ...]:
    raw = zt.raw("classes")
    if raw is None:
        return ZoneSpec.classes
    if not isinstance(raw, list) or not raw:
        raise zt.fail("classes", "must be a non-empty array of tables [[zones.classes]]")
    out: list[ZoneClass] = []
    for i, item in enumerate(raw):
        c = Fields(item, f"zones.classes[{i}]", zt.source, SiteFileError)
        name = c.string("name", required=True) or ""
        if not name.replace("-", "").replace("_", "").isalnum():
            raise c.fail("name", f"must be letters, digits, - or _, got {name!r}")
        out.append(ZoneClass(name, c.number("threshold_db", required=True) or 0.0))
        c.reject_unknown()
    names = [c.name for c in out]
    if len({area_field(n) for n in names}) != len(names):
        raise zt.fail("classes", f"class names must be unique (case and '-'/'_' aside: they name GIS fields), got {names}")
    levels = [c.threshold_db for c in out]
    if levels != sorted(levels) or len(set(levels)) != len(levels):
        raise zt.fail("classes", f"thresholds must rise strictly from class to class, got {levels}")
    return tuple(out)


def _scans(doc: Fields, path: Path) -> tuple[ScanEntry, ...]:
    raw = doc.raw("scans")
    if not isinstance(raw, list) or not raw:
        raise doc.fail("scans", "at least one [[scans]] entry with a bundle path is required")
    out: list[ScanEntry] = []
    for i, item in enumerate(raw):
        t = Fields(item, f"scans[{i}]", path, SiteFileError)
        pattern = t.string("bundle", required=True) or ""
        extra: dict[str, Any] = {
            "element": t.string("element"),
            "healthy_region": _region(t),
            "healthy_region_frame": t.choice("healthy_region_frame", ("drawing", "scanner"), default="drawing"),
            "head_xy": t.pair("head_xy"),
            "model": t.choice("model", MODEL_CHOICES, default="auto") if t.has("model") else None,
            "tilt_deg": t.pair("tilt_deg"),
        }
        full = path.parent / pattern
        if glob.has_magic(pattern):
            found = sorted(Path(p) for p in glob.glob(str(full)) if Path(p).is_dir())
            if not found:
                raise t.fail("bundle", f"pattern {pattern!r} matches no folder")
            out.extend(ScanEntry(p, **extra) for p in found)
        else:
            out.append(ScanEntry(full, **extra))
        t.reject_unknown()
    return tuple(out)


def _concrete(doc: Fields) -> Concrete:
    c = doc.table_of("concrete")
    if c is None:
        return Concrete()
    if c.has("modulus_gpa") and c.has("fc_mpa"):
        raise c.fail("modulus_gpa", "give modulus_gpa or fc_mpa (ACI 318 relation), not both")
    if c.has("fc_mpa"):
        modulus = aci318_modulus_pa(c.number("fc_mpa", positive=True) or 30.0)
    else:
        modulus = (c.number("modulus_gpa", Concrete().modulus_pa / 1e9, positive=True) or 0.0) * 1e9
    density = c.number("density", 2400.0, positive=True) or 2400.0
    poisson = c.number("poisson", 0.2, minimum=0.0) or 0.0
    if poisson >= 0.5:
        raise c.fail("poisson", f"must lie in 0..0.5, got {poisson:g}")
    c.reject_unknown()
    return Concrete(modulus, density, poisson)


def _elements(doc: Fields, path: Path) -> Elements | None:
    e = doc.table_of("elements")
    if e is None:
        return None
    source, database = e.string("source"), e.string("database")
    if (source is None) == (database is None):
        raise e.fail("source", "give either source (a GIS file) or database (a PostgreSQL connection), not "
                     + ("both" if source is not None else "neither"))
    id_field = e.string("id_field", "asset_id") or "asset_id"
    if database is not None:
        from overlay.assets.postgis import check_conninfo

        problem = check_conninfo(database)
        if problem:
            raise e.fail("database", problem)
        layer = e.string("layer")
        if layer is None:
            raise e.fail("layer", "required with database: the asset table's name")
        out = Elements(None, layer, id_field, database, e.string("schema", "public") or "public")
    else:
        full = path.parent / (source or "")
        if not full.is_file():
            raise e.fail("source", f"file not found: {full}")
        if e.string("schema") is not None:
            raise e.fail("schema", "only with database (a GIS file has no schemas)")
        out = Elements(full, e.string("layer"), id_field)
    e.reject_unknown()
    return out


def _dxf(doc: Fields, path: Path) -> DxfStyle:
    d = doc.table_of("dxf")
    if d is None:
        return DxfStyle()
    base = d.string("base")
    full = None
    if base is not None:
        full = path.parent / base
        if not full.is_file():
            raise d.fail("base", f"file not found: {full}")
    prefix = d.string("prefix", "OVL") or "OVL"
    if not prefix.replace("-", "").replace("_", "").isalnum():
        raise d.fail("prefix", f"must be letters, digits, - or _, got {prefix!r}")
    colours = d.raw("colours", {}) or {}
    if not isinstance(colours, dict) or not all(isinstance(v, int) and 1 <= v <= 255 for v in colours.values()):
        raise d.fail("colours", "must be a table of class name = ACI colour number (1..255)")
    transparency = d.number("fill_transparency", 0.6, minimum=0.0) or 0.0
    if transparency > 1:
        raise d.fail("fill_transparency", f"must lie in 0..1, got {transparency:g}")
    scale = d.raw("plot_scale")
    if scale is not None and (isinstance(scale, bool) or not isinstance(scale, int) or not 1 <= scale <= 100000):
        raise d.fail("plot_scale", f"must be a whole number N for 1:N (1..100000), got {scale!r}")
    label_mm = d.number("label_height_mm", LABEL_HEIGHT_MM, positive=True) or LABEL_HEIGHT_MM
    note_mm = d.number("note_height_mm", NOTE_HEIGHT_MM, positive=True) or NOTE_HEIGHT_MM
    if label_mm < LABEL_HEIGHT_MM or note_mm < NOTE_HEIGHT_MM:
        raise d.fail("label_height_mm" if label_mm < LABEL_HEIGHT_MM else "note_height_mm",
                     f"text under {LABEL_HEIGHT_MM:g} mm (labels) or {NOTE_HEIGHT_MM:g} mm (notes) on paper does not "
                     "stay legible in print")
    style = DxfStyle(
        base=full,
        base_unit=d.choice("base_unit", tuple(LENGTH_TO_M), default="m") if d.has("base_unit") else None,
        prefix=prefix,
        colours=tuple(sorted(colours.items())),
        sheet=d.choice("sheet", SHEETS, default="A3"),
        plot_scale=scale,
        label_height_mm=label_mm,
        note_height_mm=note_mm,
        text_style=d.string("text_style", "OVL-TEXT") or "OVL-TEXT",
        font=d.string("font", "DejaVuSans.ttf") or "DejaVuSans.ttf",
        fill=d.string("fill", "SOLID") or "SOLID",
        fill_transparency=transparency,
        reuse_layers=_bool(d, "reuse_layers", False),
    )
    d.reject_unknown({"text_height_m": "label_height_mm and note_height_mm, heights on paper (text follows the plot "
                                       "scale)"})
    return style


def _merge(doc: Fields) -> MergeSpec | None:
    m = doc.table_of("merge")
    if m is None:
        return None
    layer = m.string("findings_layer", "acoustic_findings") or "acoustic_findings"
    if not layer.replace("_", "").isalnum():
        raise m.fail("findings_layer", f"must be letters, digits or _, got {layer!r}")
    keep = m.raw("keep_backups", KEEP_BACKUPS)
    if isinstance(keep, bool) or not isinstance(keep, int) or keep < 0:
        raise m.fail("keep_backups", f"must be a whole number >= 0, got {keep!r}")
    spec = MergeSpec(layer, m.string("method", MergeSpec.method) or MergeSpec.method, _bool(m, "backup", True), keep)
    m.reject_unknown()
    return spec


def _alignment(doc: Fields) -> AlignmentSpec | None:
    a = doc.table_of("alignment")
    if a is None:
        return None
    pts = _pairs(a, "points", 2, "a polyline")
    assert pts is not None
    spec = AlignmentSpec(pts, a.choice("frame", ("drawing", "map"), default="drawing"), a.number("start_station_m", 0.0) or 0.0)
    a.reject_unknown()
    return spec


def _pairs(t: Fields, key: str, minimum: int, what: str) -> tuple[tuple[float, float], ...] | None:
    """A list of at least ``minimum`` [x, y] number pairs, or None when absent."""
    raw = t.raw(key)
    if raw is None:
        return None
    ok = isinstance(raw, list) and len(raw) >= minimum and all(
        isinstance(p, list) and len(p) == 2 and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in p)
        for p in raw)
    if not ok:
        raise t.fail(key, f"must be {what}: a list of at least {minimum} [x, y] pairs")
    return tuple((float(x), float(y)) for x, y in raw)


def _region(t: Fields) -> tuple[tuple[float, float], ...] | None:
    return _pairs(t, "healthy_region", 3, "a polygon")


def _map(doc: Fields) -> MapFrame | None:
    m = doc.table_of("map")
    if m is None:
        return None
    crs = m.raw("crs")
    if crs is None:
        raise m.fail("crs", "is required (EPSG code, 'EPSG:n' or WKT)")
    if isinstance(crs, int) and not isinstance(crs, bool):
        crs = f"EPSG:{crs}"
    if not isinstance(crs, str):
        raise m.fail("crs", f"must be an EPSG code or text, got {crs!r}")
    origin = m.pair("origin")
    bearing = m.number("bearing_deg", 90.0) or 0.0
    if not -360.0 <= bearing <= 360.0:
        raise m.fail("bearing_deg", f"must lie in -360..360 degrees, got {bearing:g}")
    scale = m.number("scale", 1.0, positive=True) or 1.0
    if not SCALE_RANGE[0] <= scale <= SCALE_RANGE[1]:
        raise m.fail("scale", f"must lie in {SCALE_RANGE[0]:g}..{SCALE_RANGE[1]:g} (map metres per drawing metre; "
                     f"drawing_unit converts mm), got {scale:g}")
    tol = m.number("tolerance_m", 0.05, positive=True) or 0.05
    monuments: list[Monument] = []
    for i, item in enumerate(m.raw("monuments", []) or []):
        t = Fields(item, f"map.monuments[{i}]", doc.source, SiteFileError)
        d, mp = t.pair("drawing", required=True), t.pair("map", required=True)
        assert d is not None and mp is not None
        monuments.append(Monument(t.string("name", f"M{i + 1}") or "", d, mp))
        t.reject_unknown()
    if origin is None and not monuments:
        raise m.fail("origin", "give either origin (+ bearing_deg, scale) or [[map.monuments]]")
    if origin is not None and monuments:
        raise m.fail("monuments", "give either origin or monuments, not both")
    m.reject_unknown()
    return MapFrame(crs, origin, bearing, scale, tuple(monuments), tol)


def _check_control_points(cps: dict[str, tuple[float, float]], scans: tuple[ScanEntry, ...], path: Path) -> None:
    """Every [control_points] name must be a target of some bundle: a misspelt name would leave its
    target without drawing coordinates and change the fit."""
    if not cps:
        return
    known: set[str] = set()
    for e in scans:
        known |= target_names(e.bundle)
    for name in cps:
        if name not in known:
            near = difflib.get_close_matches(name, sorted(known), n=1, cutoff=0.6)
            hint = f"; did you mean {near[0]!r}?" if near else ""
            raise SiteFileError(f"names no target of any bundle{hint}", source=path, field=f"control_points.{name}")
