"""A whole run: the site's scans (overlay.campaign), then what belongs to the site — unique ids, the
map placement and its checks, the mosaic, stations, the owner's assets — and the outputs.

``run`` is the library call the command line wraps: a plugin or a script runs a site the same way.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Callable

import numpy as np
import pyproj

from overlay import __version__
from overlay.assets.elements import (
    AssetTable,
    element_layer,
    read_asset_table,
    split_by_assets,
)
from overlay.cautions import CAUTIONS
from overlay.errors import (
    BundleError,
    RegistrationError,
    Seen,
    SiteFileError,
    collected_warnings,
    warn_again,
)
from overlay.geometry.crs import (
    check_map_crs,
    from_placement,
    site_scale_factor,
    to_crs,
)
from overlay.geometry.fits import Fit, check_fit, fit_points
from overlay.geometry.stations import Alignment
from overlay.geometry.transforms import Similarity
from overlay.io.site import SCALE_RANGE
from overlay.scan import ScanResult
from overlay.settings import Site
from overlay.units import LENGTH_TO_M
from overlay.zones.mosaic import mosaic_zones
from overlay.zones.zone import Zone

if TYPE_CHECKING:
    from overlay.campaign import CampaignResult
    from overlay.outputs.write import Written
    from overlay.view import ResultView


@dataclass
class RunResult:
    """A whole run: site, per-scan results, the map placement and run metadata."""

    site: Site
    scans: list[ScanResult]
    to_map: Similarity | None
    crs: pyproj.CRS | None
    map_fit: Fit | None
    started: str
    tool_version: str = __version__
    cautions: tuple[str, ...] = CAUTIONS
    warnings: list[str] = field(default_factory=list)
    element_areas: dict[str, float] = field(default_factory=dict)
    asset_pieces: list[dict] = field(default_factory=list)  # zones split by the owner's assets (map CRS)
    assets: AssetTable | None = None  # the owner's asset layer as read (the merge checks it is unchanged)
    map_scale: tuple[float, float] | None = None  # (point scale k, areal scale) of the map CRS at the site
    mosaic: list[Zone] = field(default_factory=list)

    @property
    def zones(self) -> list[Zone]:
        """The site's zones: overlapping zones of different scans united (overlay.zones.mosaic)."""
        return self.mosaic

    def view(self) -> "ResultView":
        """The run as frozen, versioned records: what a third-party exporter may rely on (overlay.view)."""
        from overlay.view import result_view

        return result_view(self)

    @property
    def unit_m(self) -> float:
        return LENGTH_TO_M[self.site.drawing_unit]

    def settings(self) -> dict[str, object]:
        s = self.site
        return {
            "drawing_unit": s.drawing_unit,
            "reference": s.energy.reference,
            "percentile": s.energy.percentile,
            "incidence_correction": s.energy.incidence_correction,
            "min_signal_level": s.quality.min_signal_level,
            "min_snr_db": s.quality.min_snr_db,
            "classes": ";".join(f"{c.name}>={c.threshold_db:g}dB" for c in s.zones.classes),
            "min_area_m2": s.zones.min_area_m2,
            "concrete": f"E {s.concrete.modulus_pa / 1e9:.2f} GPa, rho {s.concrete.density:g}, nu {s.concrete.poisson:g}",
            "repair": f"margin {s.repair.margin_m:g} m, {s.repair.footprint} footprint, basis {s.repair.basis}",
            "tolerance_m": s.registration.tolerance_m,
            "accept_misfit": s.registration.accept_misfit,
            "crs": self.crs.to_string() if self.crs else "",
        }


def locate_zones(zones: list[Zone], site: Site, to_map: Similarity | None) -> None:
    """Station and offset of each zone's centroid, and its station range, along the site's alignment."""
    spec = site.alignment
    assert spec is not None
    if spec.frame == "map" and to_map is None:
        raise SiteFileError("alignment in the map frame needs a [map] placement", source=site.path, field="alignment.frame")
    unit = 1.0 if spec.frame == "map" else LENGTH_TO_M[site.drawing_unit]
    line = Alignment.from_points(list(spec.points), spec.start_station_m)
    move = (lambda g: to_map.apply_geometry(g)) if spec.frame == "map" else (lambda g: g)  # type: ignore[union-attr]
    for z in zones:
        c = move(z.contour.centroid)
        st, off = line.station_offset(np.array([[c.x, c.y]]), unit)
        z.station_m, z.offset_m = float(st[0]), float(off[0])
        z.station_from_m, z.station_to_m = line.station_range(move(z.contour), unit)


def map_placement(site: Site, site_xy: np.ndarray) -> tuple[Similarity | None, pyproj.CRS | None, Fit | None]:
    """Drawing → map transform and CRS from the site file, checked with pyproj (a similarity either way)."""
    m = site.map
    if m is None:
        return None, None, None
    src = str(site.path)
    crs = to_crs(m.crs, source=src, field="map.crs")
    fit = None
    if m.origin is not None:
        t = from_placement(m.origin, m.bearing_deg, m.scale, site.drawing_unit)
    else:
        fit = fit_points(
            "similarity",
            np.array([mo.drawing for mo in m.monuments]),
            np.array([mo.map for mo in m.monuments]),
            [mo.name for mo in m.monuments],
            what="monuments",
        )
        check_fit(fit, m.tolerance_m, "m", accept=site.registration.accept_misfit, source=src)
        assert isinstance(fit.transform, Similarity)
        t = fit.transform
        k = t.scale / LENGTH_TO_M[site.drawing_unit]
        if not SCALE_RANGE[0] <= k <= SCALE_RANGE[1]:
            raise RegistrationError(f"the monuments give {k:.6g} map metres per drawing metre (drawing_unit "
                                    f"{site.drawing_unit!r}); expected about 1 — check the drawing unit and the monuments",
                                    source=src, field="map.monuments")
    check_map_crs(crs, t.apply(site_xy), source=src)
    return t, crs, fit


def finish_site(site: Site, results: list[ScanResult], started: str, caught: list[Seen]) -> RunResult:
    """From per-scan results to the site: unique ids, map placement and checks, mosaic, stations, assets."""
    ids = [r.scan_id for r in results]
    dup = {i for i in ids if ids.count(i) > 1}
    if dup:
        raise BundleError(f"scan id(s) {', '.join(sorted(dup))} used by more than one bundle", source=site.path)
    with collected_warnings() as seen:
        corners = np.concatenate([np.asarray(r.extent.exterior.coords) for r in results if not r.extent.is_empty]
                                 or [np.zeros((0, 2))])
        to_map, crs, map_fit = map_placement(site, corners)
        scale = site_scale_factor(crs, to_map.apply(corners)) if crs is not None and to_map is not None and len(corners) else None
        zones = mosaic_zones([z for r in results for z in r.zones], site, LENGTH_TO_M[site.drawing_unit])
        if site.alignment is not None:
            locate_zones(zones, site, to_map)
        assets, layer = None, None
        if site.elements is not None:
            assets = read_asset_table(site.elements)
            layer = element_layer(assets, crs, to_map, LENGTH_TO_M[site.drawing_unit], site.elements.where)
    warn_again(seen)
    pieces = split_by_assets(zones, site.repair.basis, to_map, layer) if layer else []
    return RunResult(site, results, to_map, crs, map_fit, started, warnings=[m for _, m in [*caught, *seen]], mosaic=zones,
                     element_areas=layer.areas_m2 if layer else {}, asset_pieces=pieces, map_scale=scale, assets=assets)


def now_utc() -> str:
    return dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def run_site(site: Site, *, progress: Callable[[int], None] | None = None) -> RunResult:
    """Every scan of a site in this process, the first failing scan stopping the run with its error:
    the campaign on one worker (one orchestration path), without a cache."""
    from overlay.campaign import run_campaign

    c = run_campaign(site, jobs=1, strict=True, progress=progress)
    assert c.result is not None
    return c.result


@dataclass(frozen=True)
class RunOptions:
    """How a run goes besides its site file (the command line's options, for a library caller)."""

    overwrite: bool = False
    pictures: bool = True
    pdf: bool | None = None  # None: for a single-page report where Chromium is installed
    jobs: int = 1
    dask_address: str | None = None
    cache_dir: Path | None = None
    strict: bool = False
    merge: bool = True
    replace_findings: bool = False


def run(site: Site, out: Path, options: RunOptions = RunOptions(), *,
        on_done: Callable[[str, str], None] | None = None, progress: Callable[[int], None] | None = None,
        drawn: Callable[[int], None] | None = None) -> tuple["CampaignResult", "Written | None"]:
    """The main job: the scans (in parallel, cached), the outputs and the merge, all or nothing.

    Returns the campaign (its result, failures and exit code) and what was written (None when no
    scan could be processed).  Callbacks report each scan done, each point and each picture drawn.
    """
    from overlay.campaign import run_campaign
    from overlay.outputs.write import check_out_dir, write_outputs

    check_out_dir(out)
    c = run_campaign(site, jobs=options.jobs, dask_address=options.dask_address, cache_dir=options.cache_dir,
                     strict=options.strict, on_done=on_done, progress=progress)
    if c.result is None:
        return c, None
    written = write_outputs(c.result, out, overwrite=options.overwrite, pictures=options.pictures, pdf=options.pdf,
                            jobs=options.jobs, progress=drawn, merge=options.merge,
                            replace_findings=options.replace_findings)
    return c, written
