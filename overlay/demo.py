"""Generate the demo site from its scenario: scan bundles from physics, a truth file, drawings and assets.

The records are what a vibrometer would see under a swept tone burst:

* before the sound arrives, instrument noise only;
* sound concrete answers weakly and flatly (pressure over a point impedance);
* concrete over a delamination answers as a thin clamped plate of the cover
  thickness: a damped resonance at the plate frequency (overlay.zones.plate), its
  amplitude following the plate's fundamental mode shape across the defect;
* once the echo from the soffit reaches the head, the head itself is shaken
  and the record is spoiled (this is why the gate exists);
* a few dropouts (dead channel) and records corrupted to NaN.

The truth file holds each defect's outline in the drawing frame, its depth,
its plate frequency, and the area the contour at each class level should
have, from the same physics without noise.  See docs/demo-site.md.
"""

from __future__ import annotations

import json
import math
import shutil
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from overlay.errors import SiteFileError
from overlay.io.site import read_site
from overlay.io.tomlio import load_toml
from overlay.outputs import dxf_save
from overlay.signal.gate import speed_of_sound
from overlay.zones.plate import (
    aci318_modulus_pa,
    clamped_lambda,
    clamped_mode_shape,
    plate_frequency,
)

SCENARIO_DIR = Path(__file__).resolve().parent.parent / "demo_site"


def scenario_folder() -> Path:
    """The demo scenario folder of this source tree (demo_site/ beside the package)."""
    if not (SCENARIO_DIR / "scenario.toml").is_file():
        raise SiteFileError("demo scenario not found; run from a source checkout (pip install -e .)", source=SCENARIO_DIR)
    return SCENARIO_DIR


def generate(dest: Path, scenario_dir: Path | None = None) -> Path:
    """Write the demo site into ``dest`` and return the path of its site file."""
    scenario_dir = scenario_dir or scenario_folder()
    sc = load_toml(scenario_dir / "scenario.toml", SiteFileError)
    dest.mkdir(parents=True, exist_ok=True)
    site_path = dest / "site.toml"
    shutil.copyfile(scenario_dir / "site.toml", site_path)
    rng = np.random.default_rng(int(sc["seed"]))
    acq = sc["acquisition"]
    con = sc["concrete"]
    modulus = aci318_modulus_pa(con["fc_mpa"])

    fs, n = float(acq["sample_rate_hz"]), int(acq["n_samples"])
    c = speed_of_sound(acq["air_temperature_c"])
    t_arrive = acq["trigger_s"] + acq["source_distance_m"] / c
    t_echo = t_arrive + acq["head_distance_m"] / c
    t = np.arange(n) / fs
    h0 = acq["pressure_pa"] / acq["healthy_impedance"]
    sweep = _sweep(t - t_arrive, *acq["sweep_hz"], acq["sweep_s"])
    echo = _sweep(t - t_echo, *acq["sweep_hz"], acq["sweep_s"]) * acq["echo_gain"]
    gate = (math.ceil(t_arrive * fs - 1e-9), math.floor(t_echo * fs + 1e-9))
    band = tuple(acq["band_hz"])
    e_healthy = _band_energy(h0 * sweep[gate[0] : gate[1]], fs, band)
    noise_var = e_healthy / 10 ** (acq["noise_snr_db"] / 10) / (2 * (band[1] - band[0]) / fs)
    sigma = math.sqrt(noise_var)
    e_noise = noise_var * 2 * (band[1] - band[0]) / fs

    defects = [_defect(d, sc, modulus, sweep, fs) for d in sc["defects"]]

    truth: dict[str, Any] = {
        "scenario": sc["structure"]["name"],
        "structure": sc["structure"]["id"],
        "spacing_m": acq["spacing_m"],
        "gate_s": [gate[0] / fs, gate[1] / fs],
        "modulus_pa": modulus,
        "scans": [],
        "defects": [],
    }
    scans_dir = dest / "scans"
    if scans_dir.exists():
        shutil.rmtree(scans_dir)
    for s in sc["scans"]:
        info = _write_scan(scans_dir / s["id"], s, sc, defects, t, sweep, echo, h0, sigma, rng)
        truth["scans"].append(info)

    write_asbuilt_dxf(dest / "as-built.dxf", sc["structure"])
    write_assets(dest / "assets.gpkg", sc["structure"])
    levels = [(c.name, c.threshold_db) for c in read_site(site_path).zones.classes]
    seg_h = h0 * sweep[gate[0] : gate[1]]
    for d in defects:
        scan_id = next((s["id"] for s in truth["scans"] if d["id"] in s["defects"]), None)
        ver_curve = _ver_curve(seg_h, h0 * d["response"][gate[0] : gate[1]], fs, band, e_healthy, e_noise)
        truth["defects"].append(_defect_truth(d, scan_id, ver_curve, levels, band, acq["spacing_m"]))
    (dest / "truth.json").write_text(json.dumps(truth, indent=1))
    write_sounding(dest, sc, truth)
    return site_path


def _defect(d: dict, sc: dict, modulus: float, sweep: np.ndarray, fs: float) -> dict[str, Any]:
    """A scenario defect with its plate frequency (equivalent circle, clamped edge) and its response."""
    acq, con = sc["acquisition"], sc["concrete"]
    a, b = d["semi_axes"]
    radius = math.sqrt(a * b)
    f0 = plate_frequency(radius, d["depth_m"], modulus, con["density"], con["poisson"], clamped_lambda() ** 2)
    w0 = 2 * math.pi * f0
    gain = acq["participation"] * acq["healthy_impedance"] / (2 * con["damping"] * w0 * con["density"] * d["depth_m"])
    response = _resonance(sweep, fs, f0, con["damping"], gain)
    return {**d, "radius_m": radius, "f0": f0, "gain": gain, "response": response}


def _ver_curve(seg_h: np.ndarray, seg_d: np.ndarray, fs: float, band: tuple, e_healthy: float,
               e_noise: float) -> np.ndarray:
    """VER in dB against the share 0..1 of the defect's full response (the mode shape's value), on 401 steps."""
    phis = np.linspace(0.0, 1.0, 401)
    energies = np.array([_band_energy(seg_h + p * seg_d, fs, band) for p in phis]) + e_noise
    return 10 * np.log10(energies / (e_healthy + e_noise))


def _defect_truth(d: dict, scan_id: str | None, ver_curve: np.ndarray, levels: list[tuple[str, float]],
                  band: tuple, spacing_m: float) -> dict[str, Any]:
    """What the truth file says of one defect, with the contour area each class level should give."""
    phis = np.linspace(0.0, 1.0, len(ver_curve))
    rho = np.linspace(0.0, 1.0, 2001)
    shape = clamped_mode_shape(rho)
    predicted = {}
    for name, level in levels:
        if ver_curve[-1] < level:
            predicted[name] = 0.0
            continue
        phi_l = float(np.interp(level, ver_curve, phis)) if np.all(np.diff(ver_curve) > 0) else float(phis[np.argmax(ver_curve >= level)])
        rho_l = float(np.interp(phi_l, shape[::-1], rho[::-1]))
        predicted[name] = math.pi * d["semi_axes"][0] * d["semi_axes"][1] * rho_l**2
    band_ok = 1.05 * band[0] <= d["f0"] <= 0.95 * band[1]
    detectable = bool(band_ok and d["radius_m"] >= 2 * spacing_m and ver_curve[-1] >= levels[0][1] + 3)
    return {
        "id": d["id"],
        "scan_id": scan_id,
        "center": d["center"],
        "semi_axes": d["semi_axes"],
        "rotation_deg": d["rotation_deg"],
        "depth_m": d["depth_m"],
        "radius_m": d["radius_m"],
        "area_m2": math.pi * d["semi_axes"][0] * d["semi_axes"][1],
        "plate_frequency_hz": d["f0"],
        "peak_ver_db": float(ver_curve[-1]),
        "detectable": detectable,
        "predicted_contour_area_m2": predicted,
        "outline": ellipse(d["center"], d["semi_axes"], d["rotation_deg"]).tolist(),
    }


def write_sounding(dest: Path, sc: dict, truth: dict) -> None:
    """The engineer's hammer sounding of spans ``[sounding].spans``, from the same truth, imperfect as
    sounding is: a hollow smaller than ``min_area_m2`` or deeper than ``max_depth_m`` rings sound; an
    outline is traced ``margin_m`` (± ``wobble_m``) outside the real edge; ``flip_share`` of the point
    verdicts are wrong.  Two files: the traced areas as a GeoPackage layer in the map CRS, and a grid of
    verdict points as a CSV in the drawing frame."""
    import csv as csv_module

    import geopandas as gpd
    import shapely
    from shapely.geometry import Polygon

    from overlay.geometry.crs import from_placement

    cfg, st = sc["sounding"], sc["structure"]
    rng = np.random.default_rng(int(sc["seed"]) + 1)  # its own stream: the scans stay as they were
    xs = np.concatenate([[0.0], np.cumsum(st["spans_m"])])
    spans = [shapely.box(xs[k - 1], 0.0, xs[k], st["deck_width_m"]) for k in cfg["spans"]]
    area_sounded = shapely.union_all(spans)
    panels = [(aid, shapely.Polygon(outline)) for aid, _, _, outline in deck_panels(st)]

    def element_at(x: float, y: float) -> str:
        return next((aid for aid, poly in panels if poly.covers(shapely.Point(x, y))), "")

    heard = _traced_hollows(truth["defects"], area_sounded, cfg, rng, element_at)
    to_map = from_placement(tuple(st["origin"]), st["bearing_deg"], 1.0, "m")
    rows = [{"element": e, "date": cfg["date"], "note": f"traced hollow ({did})"} for _, e, did in heard]
    path = dest / "sounding.gpkg"
    path.unlink(missing_ok=True)
    gpd.GeoDataFrame(rows, geometry=[to_map.apply_geometry(g) for g, _, _ in heard], crs=st["crs"]).to_file(
        path, layer="hollow_areas", driver="GPKG", VERSION="1.3")  # a version the GIS of long-term distributions read
    hollow_heard = shapely.union_all([g for g, _, _ in heard]) if heard else Polygon()
    lines = _verdict_points(sc, area_sounded, hollow_heard, cfg, rng, element_at)
    with (dest / "sounding-points.csv").open("w", newline="") as fh:
        w_ = csv_module.writer(fh)
        w_.writerow(["x", "y", "verdict", "element", "date"])
        w_.writerows(sorted(set(lines)))


def _traced_hollows(defects: list[dict], area_sounded: Any, cfg: dict, rng: np.random.Generator,
                    element_at: Callable[[float, float], str]) -> list[tuple[Any, str, str]]:
    """(traced outline, element, defect id) of each hollow the hammer hears: grown by the margin, wobbling."""
    import shapely
    from shapely.geometry import Polygon

    heard = []
    for d in defects:
        outline = Polygon(d["outline"])
        if not area_sounded.contains(outline.centroid):
            continue
        if d["area_m2"] < cfg["min_area_m2"] or d["depth_m"] > cfg["max_depth_m"]:
            continue  # the hammer does not hear it
        angles = np.linspace(0, 2 * np.pi, 48, endpoint=False)
        c = outline.centroid
        grown = outline.buffer(cfg["margin_m"])
        ring = []
        for a in angles:  # a traced line wobbles around the grown outline
            far = shapely.LineString([(c.x, c.y), (c.x + 5 * np.cos(a), c.y + 5 * np.sin(a))]).intersection(grown.exterior)
            p = far if far.geom_type == "Point" else shapely.get_parts(far)[0]
            k = 1.0 + rng.uniform(-1, 1) * cfg["wobble_m"] / max(p.distance(c), 1e-9)
            ring.append((c.x + (p.x - c.x) * k, c.y + (p.y - c.y) * k))
        heard.append((Polygon(ring), element_at(c.x, c.y), d["id"]))
    return heard


def _verdict_points(sc: dict, area_sounded: Any, hollow_heard: Any, cfg: dict, rng: np.random.Generator,
                    element_at: Callable[[float, float], str]) -> list[tuple[float, float, str, str, str]]:
    """A grid of hollow/sound verdicts over the sounded scans, ``flip_share`` of them wrong."""
    import shapely

    step = cfg["point_spacing_m"]
    lines = []
    for scan in sc["scans"]:
        if "size" not in scan:  # the oblique angle scan lies on span 3, outside the sounding
            continue
        cx, cy = scan["center"]
        w, h = scan["size"]
        if not area_sounded.contains(shapely.Point(cx, cy)):
            continue
        for x in np.arange(cx - w / 2 + step / 2, cx + w / 2, step):
            for y in np.arange(cy - h / 2 + step / 2, cy + h / 2, step):
                hollow = hollow_heard.contains(shapely.Point(x, y))
                if rng.uniform() < cfg["flip_share"]:
                    hollow = not hollow
                lines.append((round(float(x), 3), round(float(y), 3), "hollow" if hollow else "sound",
                              element_at(float(x), float(y)), cfg["date"]))
    return lines


def ellipse(center: list[float], semi_axes: list[float], rotation_deg: float, n: int = 96) -> np.ndarray:
    """Closed outline of an ellipse, drawing frame."""
    th = np.linspace(0, 2 * np.pi, n, endpoint=False)
    a, b = semi_axes
    r = math.radians(rotation_deg)
    u, v = a * np.cos(th), b * np.sin(th)
    pts = np.column_stack([center[0] + u * math.cos(r) - v * math.sin(r), center[1] + u * math.sin(r) + v * math.cos(r)])
    return np.vstack([pts, pts[:1]])


def _sweep(tau: np.ndarray, f_lo: float, f_hi: float, duration: float) -> np.ndarray:
    """Linear swept tone burst with short raised-cosine ends; zero outside [0, duration]."""
    k = (f_hi - f_lo) / duration
    inside = (tau >= 0) & (tau <= duration)
    x = np.where(inside, np.sin(2 * np.pi * (f_lo * tau + 0.5 * k * tau**2)), 0.0)
    ramp = 0.0005
    env = np.clip(np.minimum(tau, duration - tau) / ramp, 0, 1)
    return x * (0.5 - 0.5 * np.cos(np.pi * env))


def _resonance(drive: np.ndarray, fs: float, f0: float, zeta: float, gain: float) -> np.ndarray:
    """Velocity of a damped mode driven by ``drive``; ``gain`` is its magnitude at resonance."""
    m = 4 * len(drive)
    spec = np.fft.rfft(drive, m)
    w = 2 * np.pi * np.fft.rfftfreq(m, 1 / fs)
    w0 = 2 * np.pi * f0
    h = gain * (2j * zeta * w0 * w) / (w0**2 - w**2 + 2j * zeta * w0 * w)
    return np.fft.irfft(spec * h, m)[: len(drive)]


def _band_energy(x: np.ndarray, fs: float, band: tuple[float, float]) -> float:
    """Mean-square in band of a Hann-windowed periodogram (the demo's own small estimator)."""
    n = len(x)
    w = 0.5 - 0.5 * np.cos(2 * np.pi * np.arange(n) / n)
    p = np.abs(np.fft.rfft((x - x.mean()) * w)) ** 2 * 2 / (fs * np.sum(w**2))
    f = np.fft.rfftfreq(n, 1 / fs)
    sel = (f >= band[0]) & (f <= band[1])
    return float(p[sel].sum() * fs / n)


@dataclass
class _Layout:
    """Where a simulated scan's points and targets are: bundle coordinates, drawing frame, incidence."""

    rows: np.ndarray
    cols: np.ndarray
    scanner: np.ndarray  # bundle coordinates: metres (surface) or degrees (angles)
    drawing: np.ndarray
    cos_incidence: np.ndarray
    target_scanner: np.ndarray  # true scanner coordinates of the targets
    target_drawing: np.ndarray


def _rotation(deg: float) -> np.ndarray:
    th = math.radians(deg)
    return np.array([[math.cos(th), -math.sin(th)], [math.sin(th), math.cos(th)]])


def _surface_layout(s: dict, acq: dict) -> _Layout:
    """A regular grid on the surface; the head stands below the scan centre at the standoff."""
    sp = acq["spacing_m"]
    w, h = s["size"]
    ncol, nrow = int(round(w / sp)) + 1, int(round(h / sp)) + 1
    offset = np.array([1.5, 0.8])  # the scanner's own origin is not the scan centre
    rr, cc = np.mgrid[0:nrow, 0:ncol]
    local = np.column_stack([(cc.ravel() * sp - w / 2), (rr.ravel() * sp - h / 2)])
    rot = _rotation(s["scanner_rotation_deg"])
    standoff = acq["head_distance_m"]
    corners = np.array([[-w / 2 + 0.05, -h / 2 + 0.05], [w / 2 - 0.05, -h / 2 + 0.05],
                        [w / 2 - 0.05, h / 2 - 0.05], [-w / 2 + 0.05, h / 2 - 0.05]])
    return _Layout(rr.ravel(), cc.ravel(), local + offset, np.asarray(s["center"]) + local @ rot.T,
                   standoff / np.sqrt(standoff**2 + np.sum(local**2, axis=1)),
                   corners + offset, np.asarray(s["center"]) + corners @ rot.T)


def _angles_layout(s: dict, acq: dict) -> _Layout:
    """A grid of mirror angles; beams from the head onto the soffit, whose normal is tilted by
    ``tilt_deg`` from the boresight (an oblique scan).  The demo's own ray geometry."""
    (ax0, ax1), (ay0, ay1) = s["angles_deg"]
    step = s["angle_step_deg"]
    axs = np.arange(ax0, ax1 + step / 2, step)
    ays = np.arange(ay0, ay1 + step / 2, step)
    rr, cc = np.mgrid[0 : len(ays), 0 : len(axs)]
    angles = np.column_stack([axs[cc.ravel()], ays[rr.ravel()]])
    tilt = math.radians(s["tilt_deg"])
    rx = np.array([[1, 0, 0], [0, math.cos(tilt), -math.sin(tilt)], [0, math.sin(tilt), math.cos(tilt)]])
    n, e1, e2 = rx[:, 2], rx[:, 0], rx[:, 1]
    p0 = np.array([0.0, 0.0, s["standoff_m"]])

    def hit(a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        d = np.column_stack([np.tan(np.radians(a[:, 0])), np.tan(np.radians(a[:, 1])), np.ones(len(a))])
        p = d * ((p0 @ n) / (d @ n))[:, None] - p0
        return np.column_stack([p @ e1, p @ e2]), np.abs(d @ n) / np.linalg.norm(d, axis=1)

    local, cos = hit(angles)
    rot = _rotation(s["scanner_rotation_deg"])
    # six targets round the edge of the scanned patch, located on the surface and seen back as angles
    lo, hi = local.min(axis=0), local.max(axis=0)
    mid = 0.5 * (lo + hi)
    inset = 0.1
    t_local = np.array([[lo[0] + inset, lo[1] + inset], [hi[0] - inset, lo[1] + inset], [hi[0] - inset, mid[1]],
                        [hi[0] - inset, hi[1] - inset], [lo[0] + inset, hi[1] - inset], [lo[0] + inset, mid[1]]])
    pts = p0 + t_local[:, :1] * e1 + t_local[:, 1:] * e2
    t_angles = np.degrees(np.column_stack([np.arctan(pts[:, 0] / pts[:, 2]), np.arctan(pts[:, 1] / pts[:, 2])]))
    return _Layout(rr.ravel(), cc.ravel(), angles, np.asarray(s["center"]) + local @ rot.T, cos,
                   t_angles, np.asarray(s["center"]) + t_local @ rot.T)


def _write_scan(folder: Path, s: dict, sc: dict, defects: list[dict], t: np.ndarray, sweep: np.ndarray,
                echo: np.ndarray, h0: float, sigma: float, rng: np.random.Generator) -> dict[str, Any]:
    acq = sc["acquisition"]
    folder.mkdir(parents=True, exist_ok=True)
    kind = s.get("kind", "surface")
    lay = _angles_layout(s, acq) if kind == "angles" else _surface_layout(s, acq)
    inside = [d for d in defects if _covers(lay.drawing, d)]
    rec, valid, level, n_drop = _records(lay, inside, acq, t, sweep, echo, h0, sigma, rng)
    vscale = 1000.0 if s["velocity_unit"] == "mm/s" else 1.0
    np.save(folder / "records.npy", (rec * vscale).astype(np.float32))

    uscale = 1000.0 if s.get("unit") == "mm" else 1.0
    cx, cy = ("ax", "ay") if kind == "angles" else ("x", "y")
    lines = [f"id,row,col,{cx},{cy},valid,signal_level"]
    for i in range(len(lay.drawing)):
        x, y = lay.scanner[i] * uscale
        lines.append(f"P{lay.rows[i]:03d}-{lay.cols[i]:03d},{lay.rows[i]},{lay.cols[i]},{x:.5f},{y:.5f},{valid[i]},{level[i]:.3f}")
    (folder / "points.csv").write_text("\n".join(lines) + "\n")
    (folder / "scan.toml").write_text(_manifest(s, acq, kind) + "\n".join(_targets(lay, s, acq, kind, uscale, rng)))
    return {"id": s["id"], "element": s["element"], "kind": kind, "defects": [d["id"] for d in inside],
            "n_points": len(lay.drawing), "dropouts": int(n_drop), "nan_points": int(acq["nan_points"])}


def _records(lay: _Layout, inside: list[dict], acq: dict, t: np.ndarray, sweep: np.ndarray, echo: np.ndarray, h0: float,
             sigma: float, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
    """Velocity records (m/s): the sweep, each defect's response weighted by its mode shape, seen along the
    beam, a late echo, noise; dropouts (weak, marked invalid) and a few records damaged by NaN."""
    n_pts = len(lay.drawing)
    coeffs = np.zeros((n_pts, len(inside)))
    for k, d in enumerate(inside):
        coeffs[:, k] = clamped_mode_shape(_ell_radius(lay.drawing, d))
    waves = np.stack([d["response"] for d in inside]) if inside else np.zeros((0, len(t)))
    rec = h0 * (sweep[None, :] + coeffs @ waves)
    rec *= lay.cos_incidence[:, None]  # the beam sees the normal motion times cos θ
    rec += h0 * echo[None, :] * rng.uniform(0.8, 1.2, size=(n_pts, 1))
    rec += rng.normal(0.0, sigma, size=rec.shape)
    valid = np.ones(n_pts, dtype=int)
    level = rng.uniform(0.6, 1.0, n_pts)
    n_drop = max(1, int(round(acq["dropout_share"] * n_pts)))
    drop = rng.choice(n_pts, n_drop, replace=False)
    valid[drop] = 0
    level[drop] = 0.03
    rec[drop] = rng.normal(0.0, sigma * 0.05, size=(n_drop, len(t)))
    healthy_idx = np.setdiff1d(np.arange(n_pts), drop)
    corrupt = rng.choice(healthy_idx, int(acq["nan_points"]), replace=False)
    rec[corrupt, len(t) // 3 : len(t) // 3 + 5] = np.nan
    return rec, valid, level, n_drop


def _targets(lay: _Layout, s: dict, acq: dict, kind: str, uscale: float, rng: np.random.Generator) -> list[str]:
    """[[targets]] entries: as the scanner saw them and as surveyed, each with its own measuring noise."""
    out = []
    noise = acq["target_angle_noise_deg"] if kind == "angles" else acq["target_noise_m"]
    for k, (true_s, true_d) in enumerate(zip(lay.target_scanner, lay.target_drawing), start=1):
        seen = (true_s + rng.normal(0, noise, 2)) * uscale
        surveyed = true_d + rng.normal(0, acq["survey_noise_m"], 2)
        name = f"{s['id'].replace('-', '')}-T{k}"
        out.append(
            f'[[targets]]\nname = "{name}"\nscanner = [{seen[0]:.5f}, {seen[1]:.5f}]\n'
            f"drawing = [{surveyed[0]:.4f}, {surveyed[1]:.4f}]\n"
        )
    return out


def _manifest(s: dict, acq: dict, kind: str) -> str:
    coords = 'kind = "angles"' if kind == "angles" else f'kind = "surface"\nunit = "{s["unit"]}"'
    head = s.get("standoff_m", acq["head_distance_m"])
    return f'''format = "scan-bundle/1"

[scan]
id = "{s['id']}"
element = "{s['element']}"
surveyed = {s['surveyed'].strftime('%Y-%m-%dT%H:%M:%SZ')}
note = "demo scan generated by overlay demo"

[coordinates]
{coords}

[records]
sample_rate_hz = {acq['sample_rate_hz']}
velocity_unit = "{s['velocity_unit']}"
trigger_s = {acq['trigger_s']}

[geometry]
source_distance_m = {acq['source_distance_m']}
head_distance_m = {head}
air_temperature_c = {acq['air_temperature_c']}

[band]
hz = [{acq['band_hz'][0]}, {acq['band_hz'][1]}]

'''


def _ell_radius(xy: np.ndarray, d: dict) -> np.ndarray:
    r = math.radians(d["rotation_deg"])
    dx, dy = xy[:, 0] - d["center"][0], xy[:, 1] - d["center"][1]
    u = dx * math.cos(r) + dy * math.sin(r)
    v = -dx * math.sin(r) + dy * math.cos(r)
    return np.sqrt((u / d["semi_axes"][0]) ** 2 + (v / d["semi_axes"][1]) ** 2)


def _covers(drawing: np.ndarray, d: dict) -> bool:
    """The defect's centre lies inside the scanned points' bounding box (with a margin of its size)."""
    lo, hi = drawing.min(axis=0), drawing.max(axis=0)
    c, r = np.asarray(d["center"]), max(d["semi_axes"])
    return bool(np.all(c - r > lo) and np.all(c + r < hi))


def write_asbuilt_dxf(path: Path, st: dict) -> None:
    """The owner's as-built soffit plan: deck edge, support lines, girder centre lines, labels."""
    import ezdxf

    doc = ezdxf.new("R2013", setup=True)
    doc.header["$INSUNITS"] = 6
    for name, colour in (("DECK-EDGE", 7), ("SUPPORT-LINES", 3), ("GIRDER-CL", 5), ("LABELS", 7)):
        doc.layers.add(name, color=colour)
    msp = doc.modelspace()
    length = float(sum(st["spans_m"]))
    width = float(st["deck_width_m"])
    msp.add_lwpolyline([(0, 0), (length, 0), (length, width), (0, width)], close=True, dxfattribs={"layer": "DECK-EDGE"})
    xs = np.concatenate([[0.0], np.cumsum(st["spans_m"])])
    names = ["A1"] + [f"P{i}" for i in range(1, len(xs) - 1)] + ["A2"]
    for x, name in zip(xs, names):
        msp.add_line((x, -0.5), (x, width + 0.5), dxfattribs={"layer": "SUPPORT-LINES", "linetype": "CENTER"})
        msp.add_text(name, height=0.35, dxfattribs={"layer": "LABELS"}).set_placement((x + 0.1, width + 0.6))
    for k, y in enumerate(st["girders_y_m"], start=1):
        msp.add_line((0, y), (length, y), dxfattribs={"layer": "GIRDER-CL", "linetype": "DASHED"})
        msp.add_text(f"G{k}", height=0.25, dxfattribs={"layer": "LABELS"}).set_placement((-1.0, y))
    msp.add_text(f"{st['name']} ({st['id']}) - deck soffit plan, looking up", height=0.4,
                 dxfattribs={"layer": "LABELS"}).set_placement((0, -1.5))
    dxf_save.save(doc, path)


def deck_panels(st: dict) -> list[tuple[str, int, int, list[tuple[float, float]]]]:
    """(asset id, span, bay, outline in drawing frame) of each soffit panel between girders."""
    xs = np.concatenate([[0.0], np.cumsum(st["spans_m"])])
    ys = st["girders_y_m"]
    out = []
    for s in range(len(xs) - 1):
        for b in range(len(ys) - 1):
            x0, x1, y0, y1 = xs[s], xs[s + 1], ys[b], ys[b + 1]
            out.append((f"{st['id'].replace('-', '')}-S{s + 1}-B{b + 1}", s + 1, b + 1,
                        [(x0, y0), (x1, y0), (x1, y1), (x0, y1)]))
    return out


def write_assets(path: Path, st: dict) -> None:
    """The owner's asset register: deck soffit panels as polygons in the map CRS."""
    import geopandas as gpd
    from shapely.geometry import Polygon

    from overlay.geometry.crs import from_placement

    to_map = from_placement(tuple(st["origin"]), st["bearing_deg"], 1.0, "m")
    rows, geoms = [], []
    for asset_id, span, bay, outline in deck_panels(st):
        poly = Polygon(to_map.apply(np.array(outline)))
        rows.append({"asset_id": asset_id, "structure": st["id"], "span": span, "bay": bay,
                     "element_type": "deck soffit panel", "area_m2": round(poly.area, 3)})
        geoms.append(poly)
    for old in [path, *path.parent.glob(f"{path.stem}.before-overlay*{path.suffix}")]:
        old.unlink(missing_ok=True)  # a new invented register: the backups of the previous one go with it
    # written as GeoPackage 1.2, as an asset register of some years' standing would be: the merge must keep it so
    gpd.GeoDataFrame(rows, geometry=geoms, crs=st["crs"]).to_file(path, layer="deck_panels", driver="GPKG", VERSION="1.2")
