"""What a run is told: the site file's content as frozen settings, one spec per table of the file.

``overlay.io.site`` reads and checks the file; everything else reads these.  A command-line override
makes a new value with ``dataclasses.replace`` — nothing changes a setting in place.  Every field is
described in docs/site-file.md.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from overlay.assets.merge import KEEP_BACKUPS
from overlay.signal.energy import DEFAULT_PERCENTILE
from overlay.zones.zone import Concrete

DEFAULT_CLASSES = (("watch", 6.0), ("suspect", 10.0), ("probable", 15.0))
DEFAULT_FORMATS = ("dxf", "gpkg", "quantities-csv")
# common practice (from memory; docs/references.md, Inspection practice): a repair outline extends 150 mm beyond the
# sounded area; UFGS 03 93 10 asks at least 25 mm for the saw cut
REPAIR_MARGIN_M = 0.15
TOLERANCE_M = 0.02  # worst control-target residual allowed: 20 mm on the structure, whatever the drawing unit
SHEETS = ("A0", "A1", "A2", "A3", "A4")
# lettering heights on paper: 2.5 mm for labels, 1.8 mm for notes — the two smallest nominal heights of
# ISO 3098-1 (1.8, 2.5, 3.5, 5, 7, 10 … mm; from memory), common drafting practice for what must stay legible
LABEL_HEIGHT_MM = 2.5
NOTE_HEIGHT_MM = 1.8


@dataclass(frozen=True)
class ZoneClass:
    name: str
    threshold_db: float


@dataclass(frozen=True)
class RegistrationSpec:
    """[registration]: how well the scanner-to-drawing fit must match the control points."""

    tolerance_m: float = TOLERANCE_M  # on the structure, whatever the drawing unit
    accept_misfit: bool = False  # the engineer's override, recorded in every output
    model: str = "auto"


@dataclass(frozen=True)
class EnergySpec:
    """[energy]: what the vibration energy ratio is measured against."""

    reference: str = "auto"
    percentile: float = DEFAULT_PERCENTILE
    incidence_correction: bool = True


@dataclass(frozen=True)
class QualitySpec:
    """[quality]: floors below which a point is not used."""

    min_signal_level: float = 0.0
    min_snr_db: float | None = None


@dataclass(frozen=True)
class ZoneSpec:
    """[zones]: the class levels, the smallest zone kept, and the calibration the levels come from."""

    classes: tuple[ZoneClass, ...] = tuple(ZoneClass(n, t) for n, t in DEFAULT_CLASSES)
    min_area_m2: float = 0.01
    calibration: Path | None = None  # overlay calibrate's JSON, recorded by every run


@dataclass(frozen=True)
class RepairSpec:
    """[repair]: how a zone becomes a priced repair area."""

    margin_m: float = REPAIR_MARGIN_M
    footprint: str = "aligned"
    basis: str = "outline"


@dataclass(frozen=True)
class OutputSpec:
    """[outputs]: the files' name stem and the exporters that write them."""

    basename: str = "overlay"
    formats: tuple[str, ...] = DEFAULT_FORMATS


@dataclass(frozen=True)
class Monument:
    name: str
    drawing: tuple[float, float]
    map: tuple[float, float]


@dataclass(frozen=True)
class MapFrame:
    """[map]: where the drawing sits in a projected CRS: declared placement or monuments."""

    crs: str
    origin: tuple[float, float] | None = None
    bearing_deg: float = 90.0
    scale: float = 1.0
    monuments: tuple[Monument, ...] = ()
    tolerance_m: float = 0.05


@dataclass(frozen=True)
class Elements:
    """[elements]: where the element outlines (for area shares) come from: a layer of a GIS file
    (``source``) or a table of the owner's PostgreSQL/PostGIS database (``database``: a libpq connection
    string, URI or ``service=name``, never with a password; ``schema``)."""

    source: Path | None
    layer: str | None = None
    id_field: str = "asset_id"
    database: str | None = None
    schema: str = "public"

    @property
    def where(self) -> str:
        """The asset register as messages name it."""
        if self.database is not None:
            from overlay.assets.postgis import describe_database

            return describe_database(self.database)
        return str(self.source)


@dataclass(frozen=True)
class DxfStyle:
    """[dxf]: how zones are drawn: our layer prefix, colours (ACI), the sheet and plot scale that size every
    text, fill, and an optional base drawing."""

    base: Path | None = None
    base_unit: str | None = None  # for a base drawing whose $INSUNITS says nothing
    prefix: str = "OVL"
    colours: tuple[tuple[str, int], ...] = ()
    sheet: str = "A3"
    plot_scale: int | None = None  # 1:N; None: the smallest usual scale at which the structure fits the sheet
    label_height_mm: float = LABEL_HEIGHT_MM
    note_height_mm: float = NOTE_HEIGHT_MM
    text_style: str = "OVL-TEXT"
    font: str = "DejaVuSans.ttf"
    fill: str = "SOLID"
    fill_transparency: float = 0.6
    reuse_layers: bool = False


@dataclass(frozen=True)
class MergeSpec:
    """[merge]: where findings go in the owner's asset register ([elements] names it and its asset layer)."""

    findings_layer: str = "acoustic_findings"
    method: str = "acoustic non-contact scan, vibration energy ratio"
    backup: bool = True
    keep_backups: int = KEEP_BACKUPS  # besides the oldest (the owner's original), the newest N backups


@dataclass(frozen=True)
class AlignmentSpec:
    """[alignment]: a reference line for stations: vertices in the drawing or map frame, and its start."""

    points: tuple[tuple[float, float], ...]
    frame: str = "drawing"
    start_station_m: float = 0.0


@dataclass(frozen=True)
class ScanEntry:
    """One [[scans]] entry: the bundle and what the site file adds to it."""

    bundle: Path
    element: str | None = None
    healthy_region: tuple[tuple[float, float], ...] | None = None
    healthy_region_frame: str = "drawing"
    head_xy: tuple[float, float] | None = None
    model: str | None = None
    tilt_deg: tuple[float, float] | None = None


@dataclass(frozen=True)
class Site:
    """The whole site file: [site] at the top, then one spec per table."""

    path: Path
    name: str
    structure: str
    drawing_unit: str
    scans: tuple[ScanEntry, ...]
    control_points: dict[str, tuple[float, float]] = field(default_factory=dict)
    registration: RegistrationSpec = RegistrationSpec()
    energy: EnergySpec = EnergySpec()
    quality: QualitySpec = QualitySpec()
    zones: ZoneSpec = ZoneSpec()
    concrete: Concrete = field(default_factory=Concrete)
    repair: RepairSpec = RepairSpec()
    map: MapFrame | None = None
    elements: Elements | None = None
    alignment: AlignmentSpec | None = None
    dxf: DxfStyle = DxfStyle()
    merge: MergeSpec | None = None
    outputs: OutputSpec = OutputSpec()

    @property
    def folder(self) -> Path:
        return self.path.parent
