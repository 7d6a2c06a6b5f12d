"""Scans built independently of the demo generator and of the tool's own plate model.

The demo is generated from the same clamped-circular-plate physics the outline model assumes, so
passing on it proves little.  Here a defect's vibration shape is the first (or second) mode of a
clamped plate of any outline, computed by finite differences — not by the tool's Bessel or beam
functions — or a flat-topped plateau that is no mode at all; the incident sound field varies
smoothly across the scan (a plane ramp or a loudspeaker's beam) and scales every point's energy,
the defect's included; each point's energy carries log-normal scatter.  Bundles are written as
one-sided PSDs (``spectra.npy``) so the tool's reference and energy stages run on them.

The truth of each case: the true hollow (its polygon) and, for each class level, the area where
the noise-free energy against the *local* sound field reaches the level (the "analytic level
set", integrated on the fine grid of the mode computation).
"""

from __future__ import annotations

import math
import textwrap
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import scipy.interpolate
import scipy.sparse
import scipy.sparse.linalg
import shapely
import shapely.affinity
from shapely.geometry import Polygon

SEED = 20260514
FINE = 0.004  # m: the grid of the mode computation


# --- clamped plate modes by finite differences ----------------------------------------------------

def fd_clamped_modes(mask: np.ndarray, h: float, k: int = 1) -> tuple[np.ndarray, list[np.ndarray]]:
    """The ``k`` lowest eigenvalues κ (Δ²w = κ·w) and modes of a clamped plate occupying ``mask``.

    13-point biharmonic stencil on a square grid of step ``h``; nodes outside the plate are zero
    (w = 0, and with two rows of zeros beyond the edge, a zero slope: clamped).
    """
    idx = -np.ones(mask.shape, dtype=np.int64)
    idx[mask] = np.arange(mask.sum())
    rows, cols, vals = [], [], []
    stencil = [((0, 0), 20.0)] + [((dy, dx), -8.0) for dy, dx in ((1, 0), (-1, 0), (0, 1), (0, -1))] \
        + [((dy, dx), 2.0) for dy, dx in ((1, 1), (1, -1), (-1, 1), (-1, -1))] \
        + [((dy, dx), 1.0) for dy, dx in ((2, 0), (-2, 0), (0, 2), (0, -2))]
    ny, nx = mask.shape
    ys, xs = np.nonzero(mask)
    for (dy, dx), c in stencil:
        yy, xx = ys + dy, xs + dx
        ok = (yy >= 0) & (yy < ny) & (xx >= 0) & (xx < nx)
        ok[ok] &= mask[yy[ok], xx[ok]]
        rows.append(idx[ys[ok], xs[ok]])
        cols.append(idx[yy[ok], xx[ok]])
        vals.append(np.full(ok.sum(), c / h**4))
    a = scipy.sparse.csr_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))),
                                shape=(mask.sum(), mask.sum()))
    # a fixed start vector: ARPACK's default is random, and the second mode of a symmetric plate is a
    # degenerate pair, so any mix of the two is an eigenvector — the case must be the same every run
    w, v = scipy.sparse.linalg.eigsh(a, k=k, sigma=0.0, which="LM", v0=np.linspace(1.0, 2.0, a.shape[0]))
    order = np.argsort(w)
    modes = []
    for j in order:
        m = np.zeros(mask.shape)
        m[mask] = v[:, j]
        m /= m[np.unravel_index(np.argmax(np.abs(m)), m.shape)]
        modes.append(m)
    return w[order], modes


def fd_lambda2(shape: Polygon, length: float, h: float = FINE) -> float:
    """λ² = ω·L²·sqrt(ρh/D) of the clamped fundamental, from the finite-difference eigenvalue."""
    x0, y0, x1, y1 = shape.bounds
    gx = np.arange(x0 - 2 * h, x1 + 2 * h, h)
    gy = np.arange(y0 - 2 * h, y1 + 2 * h, h)
    xx, yy = np.meshgrid(gx, gy)
    mask = shapely.contains_xy(shape, xx, yy)
    kappa, _ = fd_clamped_modes(mask, h, 1)
    return float(math.sqrt(kappa[0]) * length**2)


# --- the cases -------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Defect:
    shape: str  # "circle", "square", "rect2", "ellipse2"
    centre: tuple[float, float]
    size: float  # m: diameter (circle), side (square), short side or short axis (rect2, ellipse2)
    angle_deg: float = 0.0
    response: str = "modal"  # "modal", "flat", "double"
    gain_db: float = 20.0  # peak of the energy over the local sound field

    def polygon(self) -> Polygon:
        s = self.size
        if self.shape == "circle":
            p = shapely.Point(0, 0).buffer(s / 2, quad_segs=64)
        elif self.shape == "square":
            p = shapely.box(-s / 2, -s / 2, s / 2, s / 2)
        elif self.shape == "rect2":
            p = shapely.box(-s, -s / 2, s, s / 2)
        else:
            p = shapely.affinity.scale(shapely.Point(0, 0).buffer(s / 2, quad_segs=64), 2.0, 1.0)
        p = shapely.affinity.rotate(p, self.angle_deg, origin=(0, 0))
        return shapely.affinity.translate(p, *self.centre)


@dataclass(frozen=True)
class Case:
    name: str
    defects: tuple[Defect, ...]
    spacing: float = 0.02
    width: float = 1.2
    height: float = 1.0
    field_db: float = 0.0  # span of the incident field across the scan
    field: str = "plane"  # "plane" or "beam"
    noise_db: float = 0.5
    seed: int = SEED
    notes: str = ""


@dataclass
class Truth:
    polygons: list[Polygon]
    level_areas: dict[float, list[float]] = field(default_factory=dict)  # class level → per defect, m²


def _shape_field(d: Defect) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(xx, yy, w) on the fine grid: the defect's vibration shape, 0 outside, max 1."""
    poly = d.polygon()
    x0, y0, x1, y1 = poly.bounds
    gx = np.arange(x0 - 3 * FINE, x1 + 3 * FINE, FINE)
    gy = np.arange(y0 - 3 * FINE, y1 + 3 * FINE, FINE)
    xx, yy = np.meshgrid(gx, gy)
    mask = shapely.contains_xy(poly, xx, yy)
    if d.response == "flat":
        inside = shapely.points(xx[mask], yy[mask])
        dist = shapely.distance(inside, poly.exterior)
        rim = 0.12 * d.size
        w = np.zeros(mask.shape)
        t = np.clip(dist / rim, 0, 1)
        w[mask] = t * t * (3 - 2 * t)  # a plateau with a smooth rim: not a plate mode
        return xx, yy, w
    _, modes = fd_clamped_modes(mask, FINE, 2 if d.response == "double" else 1)
    return xx, yy, np.abs(modes[-1])


def energy_ratio(case: Case, xy: np.ndarray) -> np.ndarray:
    """E / E_field at points ``xy``: 1 + Σ G·w² over the defects (noise-free)."""
    out = np.ones(len(xy))
    for d in case.defects:
        xx, yy, w = _shape_field(d)
        f = scipy.interpolate.RegularGridInterpolator((yy[:, 0], xx[0]), w, bounds_error=False, fill_value=0.0)
        out += (10 ** (d.gain_db / 10) - 1) * f(np.column_stack([xy[:, 1], xy[:, 0]])) ** 2
    return out


def field_db(case: Case, xy: np.ndarray) -> np.ndarray:
    """The incident sound level across the scan, dB, spanning ``case.field_db`` over the scan."""
    if case.field_db == 0:
        return np.zeros(len(xy))
    if case.field == "plane":
        raw = xy[:, 0] * math.cos(0.5) + xy[:, 1] * math.sin(0.5)
    else:  # a loudspeaker 2.5 m off the scan's left edge, aimed at its lower left: spreading and a beam
        src = np.array([-0.3, -0.2, 2.5])
        r = np.sqrt((xy[:, 0] - src[0]) ** 2 + (xy[:, 1] - src[1]) ** 2 + src[2] ** 2)
        off_axis = np.arccos(src[2] / r)
        raw = -20 * np.log10(r) - 12 * (off_axis / math.radians(30)) ** 2
    raw = raw - raw.min()
    return raw / raw.max() * case.field_db


def truth(case: Case, levels: tuple[float, ...]) -> Truth:
    t = Truth([d.polygon() for d in case.defects])
    for level in levels:
        areas = []
        for d in case.defects:
            xx, yy, w = _shape_field(d)
            ratio = 1 + (10 ** (d.gain_db / 10) - 1) * w**2
            areas.append(float((10 * np.log10(ratio) >= level).sum() * FINE * FINE))
        t.level_areas[level] = areas
    return t


def write_case(case: Case, folder: Path) -> Path:
    """The case as a spectra bundle: band energy = field × energy ratio × scatter; a peak for each defect."""
    rng = np.random.default_rng(case.seed)
    nx, ny = int(round(case.width / case.spacing)) + 1, int(round(case.height / case.spacing)) + 1
    rr, cc = np.mgrid[0:ny, 0:nx]
    xy = np.column_stack([cc.ravel(), rr.ravel()]) * case.spacing
    e_field = 1e-8 * 10 ** (field_db(case, xy) / 10)
    ratio = energy_ratio(case, xy)
    scatter = 10 ** (rng.normal(0.0, case.noise_db, len(xy)) / 10)
    energy = e_field * ratio * scatter
    freqs = np.arange(0.0, 10000.0 + 1, 25.0)
    band = (freqs >= 400) & (freqs <= 8000)
    flat = np.where(band, 1.0, 0.05)
    peak_hz = 2500.0
    lorentz = 1.0 / (1.0 + ((freqs - peak_hz) / 60.0) ** 2)

    trapezoid = getattr(np, "trapezoid", None) or np.trapz  # numpy 2 renamed it

    def per_band(p: np.ndarray) -> np.ndarray:
        return p / trapezoid(p[band], freqs[band])

    sound = energy / ratio  # the sound concrete's part spreads over the band, the excess rings at the peak
    psd = sound[:, None] * per_band(flat)[None, :] + (energy - sound)[:, None] * per_band(lorentz)[None, :]
    folder.mkdir(parents=True, exist_ok=True)
    np.save(folder / "spectra.npy", psd.astype(np.float64))
    np.save(folder / "frequencies.npy", freqs)
    lines = ["id,row,col,x,y"] + [f"P{k},{r},{c},{x:.4f},{y:.4f}" for k, (r, c, (x, y)) in
                                 enumerate(zip(rr.ravel(), cc.ravel(), xy))]
    (folder / "points.csv").write_text("\n".join(lines) + "\n")
    w, h = (nx - 1) * case.spacing, (ny - 1) * case.spacing
    body = (f'format = "scan-bundle/1"\n\n[scan]\nid = "{case.name}"\nelement = "EL-V"\n\n'
            '[coordinates]\nkind = "surface"\nunit = "m"\n\n[spectra]\nvelocity_unit = "m/s"\n\n'
            "[band]\nhz = [400.0, 8000.0]\n\n")
    for name, (x, y) in {"A": (0, 0), "B": (w, 0), "C": (w, h), "D": (0, h)}.items():
        body += f'[[targets]]\nname = "{name}"\nscanner = [{x}, {y}]\ndrawing = [{x + 10.0}, {y + 20.0}]\n\n'
    (folder / "scan.toml").write_text(body)
    return folder


OFFSET = (10.0, 20.0)  # drawing = scanner + OFFSET in the written bundles


def cases() -> list[Case]:
    """The validation set: shapes × sizes × responses, edge cuts, merging pairs, fields of 0/4/8 dB."""
    out: list[Case] = []
    centre = (0.6, 0.5)
    for shape in ("circle", "square", "rect2", "ellipse2"):
        for size, cells in ((0.20, 3), (0.20, 6), (0.30, 10)):  # cells: grid spacings across the defect
            for response in ("modal", "flat", "double"):
                out.append(Case(f"{shape}-{size:g}m-{cells}cells-{response}",
                                (Defect(shape, centre, size, 20.0, response),), spacing=size / cells))
    big = Defect("circle", (0.6, 0.5), 0.22)
    out.append(Case("edge-cut", (Defect("circle", (0.03, 0.5), 0.22),), notes="a third of it beyond the scan edge"))
    out.append(Case("merging-pair", (Defect("circle", (0.5, 0.5), 0.16), Defect("circle", (0.68, 0.5), 0.16)),
                    notes="two hollows 0.02 m apart"))
    for span in (0.0, 4.0, 8.0):
        for kind in ("plane", "beam"):
            out.append(Case(f"field-{kind}-{span:g}dB", (big,), width=2.0, height=1.6, field_db=span, field=kind,
                            spacing=0.04))
            out.append(Case(f"field-{kind}-{span:g}dB-sound", (), width=2.0, height=1.6, field_db=span, field=kind,
                            spacing=0.04, notes="no defect"))
    return out


# --- running a case through the tool ----------------------------------------------------------------

LEVEL = 6.0


def run_case(case: Case, folder: Path, reference: str = "auto") -> dict[str, object]:
    """Write the case, run it with the default settings (and ``reference``), and measure it against its truth."""
    from overlay.io.site import read_site
    from overlay.job import run_site
    from overlay.quantities import defects

    write_case(case, folder / case.name)
    site = folder / f"{case.name}.toml"
    site.write_text(textwrap.dedent(f"""\
        format = "overlay-site/1"
        [site]
        name = "validation"
        drawing_unit = "m"
        [energy]
        reference = "{reference}"
        [[scans]]
        bundle = "{case.name}"
        """))
    result = run_site(read_site(site))
    t = truth(case, (LEVEL,))
    shift = lambda g: shapely.affinity.translate(g, *OFFSET)  # noqa: E731 - into the drawing frame
    true_polys = [shift(p) for p in t.polygons]
    found = defects(result.zones, result.site.zones.classes)
    union_true = shapely.union_all(true_polys) if true_polys else shapely.Polygon()
    real = [d for d in found if d.lowest.contour.intersects(union_true)]
    false_area = sum(d.lowest.area_m2 for d in found if not d.lowest.contour.intersects(union_true))
    row: dict[str, object] = {"case": case.name, "zones": len(found), "false_m2": false_area, "result": result,
                              "reference": result.scans[0].reference.method if result.scans[0].reference else "",
                              "span_db": getattr(result.scans[0].reference, "field_span_db", float("nan"))}
    if real and true_polys:
        contour = sum(d.lowest.area_m2 for d in real)
        level_set = sum(t.level_areas[LEVEL])
        outline = sum(d.lowest.outline_area_m2 for d in real)
        hollow = sum(p.area for p in true_polys)
        row.update(contour_err=contour / level_set - 1 if level_set else float("nan"),
                   outline_err=outline / hollow - 1,
                   centroid_m=float(np.mean([min(d.lowest.contour.centroid.distance(p.centroid) for p in true_polys)
                                             for d in real])),
                   basis=",".join(sorted({d.lowest.outline_basis + (" " + d.lowest.outline_shape if d.lowest.outline_shape else "") for d in real})),
                   misfit=float(np.mean([d.lowest.outline_misfit for d in real])))
    return row


