"""Reader for scan bundles, format ``scan-bundle/1`` (see docs/scan-bundle.md).

The reader validates everything the format asks for and stops at the first
problem with one line naming the file, the line or field, and what is wrong.
Velocity records and spectra are memory-mapped, never loaded whole.
"""

from __future__ import annotations

import datetime as dt
import re
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from overlay.errors import BundleError, BundleWarning
from overlay.io.points import MAX_ANGLE_DEG, MAX_SURFACE_M, read_points, regular_file
from overlay.io.tomlio import Fields, load_toml
from overlay.units import LENGTH_TO_M, VELOCITY_TO_MPS

FORMAT = "scan-bundle/1"
SCAN_ID = re.compile(r"^[A-Za-z0-9._-]+$")
MAX_SAMPLES = 1 << 24  # samples per record (5.5 minutes at 51.2 kHz)
MAX_SHOTS = 1024
SURVEYED_YEARS = (1950, 2200)


@dataclass(frozen=True)
class Target:
    """A control target as the scanner saw it, with its drawing position if known."""

    name: str
    scanner: tuple[float, float]
    drawing: tuple[float, float] | None = None


@dataclass(frozen=True)
class Geometry:
    """Where source and head stood; drives the automatic gate and angle scans."""

    source_distance_m: float | None = None
    head_distance_m: float | None = None
    air_temperature_c: float = 20.0


@dataclass
class Scan:
    """One scan as read from its bundle: coordinates, payload and metadata.

    ``xy`` holds surface coordinates in metres (kind "surface") or mirror
    angles in degrees (kind "angles").  ``payload`` says which of
    ``records``, ``spectra`` or ``ver_db`` carries the signal.
    """

    path: Path
    scan_id: str
    kind: str
    point_ids: np.ndarray
    xy: np.ndarray
    valid: np.ndarray
    payload: str
    unit_scale: float = 1.0  # bundle coordinate unit → m (surface scans)
    element: str | None = None
    surveyed: dt.datetime | None = None
    note: str = ""
    row: np.ndarray | None = None
    col: np.ndarray | None = None
    signal_level: np.ndarray | None = None
    ver_db: np.ndarray | None = None
    peak_hz: np.ndarray | None = None
    records: np.ndarray | None = None
    sample_rate_hz: float | None = None
    velocity_scale: float = 1.0
    trigger_s: float = 0.0
    gate_s: tuple[float, float] | None = None
    spectra: np.ndarray | None = None
    frequencies: np.ndarray | None = None
    band_hz: tuple[float, float] | None = None
    geometry: Geometry = field(default_factory=Geometry)
    targets: list[Target] = field(default_factory=list)

    @property
    def n_points(self) -> int:
        return len(self.point_ids)

    @property
    def has_grid(self) -> bool:
        return self.row is not None

    @property
    def n_samples(self) -> int | None:
        return None if self.records is None else int(self.records.shape[-1])

    @property
    def n_shots(self) -> int:
        return 1 if self.records is None or self.records.ndim == 2 else int(self.records.shape[1])


def read_bundle(folder: str | Path) -> Scan:
    """Read and validate one scan bundle folder; raise ``BundleError`` on the first problem."""
    folder = Path(folder)
    if not folder.is_dir():
        raise BundleError("scan bundle folder not found", source=folder)
    manifest_path = folder / "scan.toml"
    doc = Fields(load_toml(manifest_path, BundleError), "", manifest_path, BundleError)
    fmt = doc.string("format", required=True)
    if fmt != FORMAT:
        raise doc.fail("format", f"unsupported format {fmt!r}; this reader knows {FORMAT!r}")
    scan_id, element, surveyed, note = _scan_table(doc)
    kind, unit_scale = _coordinates_table(doc)
    points_path = folder / "points.csv"
    table = read_points(points_path, kind, unit_scale)
    scan = Scan(
        path=folder,
        scan_id=scan_id,
        kind=kind,
        point_ids=table["id"],
        xy=table["xy"] * unit_scale,
        valid=table["valid"],
        payload=_payload_kind(folder, table),
        unit_scale=unit_scale,
        element=element,
        surveyed=surveyed,
        note=note,
        row=table.get("row"),
        col=table.get("col"),
        signal_level=table.get("signal_level"),
        ver_db=table.get("ver_db"),
        peak_hz=table.get("peak_hz"),
    )
    if "peak_hz" in table and "ver_db" not in table:
        raise BundleError("column peak_hz goes with ver_db; ver_db is missing", source=points_path, field="peak_hz")
    _read_payload(scan, doc, folder)
    scan.geometry = _geometry(doc)
    scan.band_hz = _band(doc, scan)
    scan.targets = _targets(doc, kind, unit_scale)
    doc.seen.update({"geometry", "targets", "band"})
    doc.reject_unknown()
    return scan


def _scan_table(doc: Fields) -> tuple[str, str | None, dt.datetime | None, str]:
    """[scan]: id, element, surveyed, note."""
    scan_t = doc.table_of("scan")
    if scan_t is None:
        raise doc.fail("scan", "table is required")
    scan_id = scan_t.string("id", required=True)
    assert scan_id is not None
    if not SCAN_ID.match(scan_id):
        raise scan_t.fail("id", f"must match [A-Za-z0-9._-]+, got {scan_id!r}")
    out = (scan_id, scan_t.string("element"), _surveyed(scan_t), scan_t.string("note", "") or "")
    scan_t.reject_unknown()
    return out


def _coordinates_table(doc: Fields) -> tuple[str, float]:
    """[coordinates]: the kind, and metres per file unit (1 for angles, always degrees)."""
    coords = doc.table_of("coordinates")
    if coords is None:
        raise doc.fail("coordinates", "table is required")
    kind = coords.choice("kind", ("surface", "angles"))
    unit_scale = 1.0
    if kind == "surface":
        unit_scale = LENGTH_TO_M[coords.choice("unit", tuple(LENGTH_TO_M), default="m")]
    elif coords.has("unit"):
        raise coords.fail("unit", 'applies to kind "surface" only; angles are always degrees')
    coords.reject_unknown()
    return kind, unit_scale


def _payload_kind(folder: Path, table: dict[str, np.ndarray]) -> str:
    """Exactly one payload: velocity records, spectra, or VER values in points.csv."""
    present = [f for f in ("records.npy", "spectra.npy") if (folder / f).exists()]
    present += ["ver_db column"] if "ver_db" in table else []
    if len(present) == 0:
        raise BundleError(
            "no payload: give records.npy, spectra.npy with frequencies.npy, or a ver_db column in points.csv",
            source=folder,
        )
    if len(present) > 1:
        raise BundleError(f"more than one payload ({', '.join(present)}); keep exactly one", source=folder)
    return {"records.npy": "records", "spectra.npy": "spectra"}.get(present[0], "ver")


def _read_payload(scan: Scan, doc: Fields, folder: Path) -> None:
    if scan.payload == "records":
        _read_records(scan, doc, folder / "records.npy", scan.n_points)
    elif doc.has("records"):
        raise doc.fail("records", "table given but records.npy is missing")
    if scan.payload == "spectra":
        _read_spectra(scan, doc, folder / "spectra.npy", folder / "frequencies.npy", scan.n_points)
    elif doc.has("spectra"):
        raise doc.fail("spectra", "table given but spectra.npy is missing")
    if scan.payload == "ver":
        assert scan.ver_db is not None
        finite = np.isfinite(scan.ver_db)
        if (~finite & scan.valid).any():
            bad = scan.point_ids[~finite & scan.valid]
            warnings.warn(
                f"{folder / 'points.csv'}: ver_db: {len(bad)} point(s) without a finite value marked invalid "
                f"({_few(bad)})",
                BundleWarning,
                stacklevel=3,
            )
        scan.valid = scan.valid & finite


def _band(doc: Fields, scan: Scan) -> tuple[float, float] | None:
    """[band] hz: within Nyquist and the spectra's frequencies; required unless VER is given."""
    band = doc.table_of("band")
    if band is None:
        if scan.payload != "ver":
            raise doc.fail("band", "table with hz = [low, high] is required unless ver_db is given")
        return None
    lo, hi = band.pair("hz", required=True) or (0.0, 0.0)
    if not 0 <= lo < hi:
        raise band.fail("hz", f"must be [low, high] with 0 <= low < high, got [{lo:g}, {hi:g}]")
    if scan.sample_rate_hz is not None and hi > scan.sample_rate_hz / 2:
        raise band.fail("hz", f"upper edge {hi:g} Hz is above the Nyquist frequency {scan.sample_rate_hz / 2:g} Hz")
    if scan.frequencies is not None and (hi < scan.frequencies[0] or lo > scan.frequencies[-1]):
        raise band.fail("hz", "lies outside frequencies.npy")
    band.reject_unknown()
    return lo, hi


def target_names(folder: Path) -> set[str]:
    """The names of a bundle's control targets, read from its manifest alone ({} when unreadable:
    the full reader then reports the problem)."""
    try:
        doc = load_toml(Path(folder) / "scan.toml", BundleError)
    except BundleError:
        return set()
    raw = doc.get("targets", [])
    return {t["name"] for t in raw if isinstance(t, dict) and isinstance(t.get("name"), str)} if isinstance(raw, list) else set()


def _surveyed(scan_t: Fields) -> dt.datetime | None:
    value = scan_t.raw("surveyed")
    if value is None:
        return None
    if isinstance(value, (dt.datetime, dt.date)) and not SURVEYED_YEARS[0] <= value.year <= SURVEYED_YEARS[1]:
        raise scan_t.fail("surveyed", f"year {value.year} is outside {SURVEYED_YEARS[0]}..{SURVEYED_YEARS[1]}")
    if isinstance(value, dt.datetime):
        return value if value.tzinfo else value.replace(tzinfo=dt.timezone.utc)
    if isinstance(value, dt.date):
        return dt.datetime(value.year, value.month, value.day, tzinfo=dt.timezone.utc)
    raise scan_t.fail("surveyed", f"must be a TOML date or datetime, got {value!r}")


def _load_npy(path: Path) -> np.ndarray:
    """The array memory-mapped, after checking that the file is exactly as long as its header says."""
    regular_file(path)
    try:
        arr = np.load(path, mmap_mode="r", allow_pickle=False)
    except Exception as exc:  # numpy raises ValueError / OSError / EOFError for bad (or truncated) files
        raise BundleError(f"not a readable .npy array ({exc})", source=path) from exc
    size, need = path.stat().st_size, int(getattr(arr, "offset", 0)) + int(arr.nbytes)
    if isinstance(arr, np.memmap) and size != need:
        raise BundleError(f"is {size} bytes but its header {arr.shape} {arr.dtype} needs {need}; the file is longer "
                          "than its array", source=path)
    return arr


def _check_float(arr: np.ndarray, path: Path) -> None:
    if arr.dtype not in (np.float32, np.float64):
        raise BundleError(f"dtype must be float32 or float64, got {arr.dtype}", source=path)


def _read_records(scan: Scan, doc: Fields, path: Path, n: int) -> None:
    rec = _load_npy(path)
    _check_float(rec, path)
    if rec.ndim not in (2, 3):
        raise BundleError(f"shape must be (points, samples) or (points, shots, samples), got {rec.shape}", source=path)
    if rec.shape[0] != n:
        raise BundleError(f"has {rec.shape[0]} points on its first axis, points.csv has {n}", source=path)
    if rec.shape[-1] < 8 or (rec.ndim == 3 and rec.shape[1] < 1):
        raise BundleError(f"too few samples per record: shape {rec.shape}", source=path)
    if rec.shape[-1] > MAX_SAMPLES or (rec.ndim == 3 and rec.shape[1] > MAX_SHOTS):
        raise BundleError(f"shape {rec.shape} is beyond the documented limits ({MAX_SAMPLES} samples, {MAX_SHOTS} shots "
                          "per point); a tone-burst record is far shorter", source=path)
    t = doc.table_of("records")
    if t is None:
        raise doc.fail("records", "table is required when records.npy is present")
    scan.records = rec
    scan.sample_rate_hz = t.number("sample_rate_hz", required=True, positive=True)
    scan.velocity_scale = VELOCITY_TO_MPS[t.choice("velocity_unit", tuple(VELOCITY_TO_MPS))]
    scan.trigger_s = t.number("trigger_s", 0.0, minimum=0.0) or 0.0
    gate = t.pair("gate_s")
    if gate is not None:
        if not 0 <= gate[0] < gate[1]:
            raise t.fail("gate_s", f"must be [start, end] with 0 <= start < end, got [{gate[0]:g}, {gate[1]:g}]")
        scan.gate_s = gate
    t.reject_unknown()


def _read_spectra(scan: Scan, doc: Fields, path: Path, freqs_path: Path, n: int) -> None:
    spec = _load_npy(path)
    _check_float(spec, path)
    if spec.ndim != 2:
        raise BundleError(f"shape must be (points, frequencies), got {spec.shape}", source=path)
    if spec.shape[0] != n:
        raise BundleError(f"has {spec.shape[0]} points on its first axis, points.csv has {n}", source=path)
    if not freqs_path.exists():
        raise BundleError("file not found (required with spectra.npy)", source=freqs_path)
    freqs = np.asarray(_load_npy(freqs_path), dtype=np.float64)
    if freqs.ndim != 1 or len(freqs) != spec.shape[1]:
        raise BundleError(f"shape must be ({spec.shape[1]},) to match spectra.npy, got {freqs.shape}", source=freqs_path)
    if not np.isfinite(freqs).all() or (np.diff(freqs) <= 0).any() or len(freqs) < 3:
        raise BundleError("must be finite, strictly increasing Hz values (at least 3)", source=freqs_path)
    t = doc.table_of("spectra")
    if t is None:
        raise doc.fail("spectra", "table is required when spectra.npy is present")
    scale = VELOCITY_TO_MPS[t.choice("velocity_unit", tuple(VELOCITY_TO_MPS))]
    scan.spectra, scan.frequencies, scan.velocity_scale = spec, freqs, scale
    t.reject_unknown()


def _geometry(doc: Fields) -> Geometry:
    g = doc.table_of("geometry")
    if g is None:
        return Geometry()
    geo = Geometry(
        source_distance_m=g.number("source_distance_m", positive=True),
        head_distance_m=g.number("head_distance_m", positive=True),
        air_temperature_c=g.number("air_temperature_c", 20.0, minimum=-60.0) or 0.0,
    )
    if (g.number("air_temperature_c") or 0.0) > 60:
        raise g.fail("air_temperature_c", "must lie in -60..60 °C")
    g.reject_unknown()
    return geo


def _targets(doc: Fields, kind: str, unit_scale: float) -> list[Target]:
    raw = doc.raw("targets", [])
    if not isinstance(raw, list):
        raise doc.fail("targets", "must be an array of tables [[targets]]")
    out: list[Target] = []
    names: set[str] = set()
    for i, item in enumerate(raw):
        t = Fields(item, f"targets[{i}]", doc.source, BundleError)
        name = t.string("name", required=True)
        assert name is not None
        if name in names:
            raise t.fail("name", f"duplicate target name {name!r}")
        names.add(name)
        scanner = t.pair("scanner", required=True)
        assert scanner is not None
        limit, what = (MAX_ANGLE_DEG, "degrees") if kind == "angles" else (MAX_SURFACE_M / unit_scale, "coordinate units")
        if not max(abs(scanner[0]), abs(scanner[1])) <= limit:
            raise t.fail("scanner", f"coordinate beyond {limit:g} {what} (documented range)")
        if kind == "surface":
            scanner = (scanner[0] * unit_scale, scanner[1] * unit_scale)
        out.append(Target(name=name, scanner=scanner, drawing=t.pair("drawing")))
        t.reject_unknown()
    return out


def _few(ids: np.ndarray, k: int = 5) -> str:
    shown = ", ".join(str(i) for i in ids[:k])
    return shown + (f" and {len(ids) - k} more" if len(ids) > k else "")
