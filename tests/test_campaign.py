"""Campaigns: mosaic of overlapping scans, identical results for any worker count and on Dask,
failures reported while the others go on, the cache."""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest
from shapely.geometry import Point

from overlay.campaign import run_campaign
from overlay.cli.main import main
from overlay.io.site import read_site


@pytest.fixture
def site_copy(demo: dict, tmp_path: Path) -> Path:
    """A private copy of the generated demo site (bundles, drawings, assets)."""
    dst = tmp_path / "site"
    shutil.copytree(demo["root"] / "site", dst)
    return dst / "site.toml"


def _records(result) -> list[dict]:
    out = []
    for z in result.zones:
        r = z.record()
        out.append({k: (round(v, 9) if isinstance(v, float) else v) for k, v in r.items()})
    return out


def test_mosaic_of_two_overlapping_scans_of_one_defect(demo: dict) -> None:
    # D1 lies in S-101 and in S-106: one zone per class, provenance lists both, area as for one scan
    d1 = next(d for d in demo["truth"]["defects"] if d["id"] == "D1")
    (z,) = [z for z in demo["result"].zones if z.class_name == "watch" and z.contour.contains(Point(d1["center"]))]
    assert z.provenance.split(";") == ["S-101.watch.01", "S-106.watch.01"]
    assert z.scan_id == "S-101;S-106" and z.zone_id == "S-101.watch.01+1"
    assert z.area_m2 == pytest.approx(d1["predicted_contour_area_m2"]["watch"], rel=0.15)
    assert z.outline_area_m2 == pytest.approx(d1["area_m2"], rel=0.10)
    parts = [p for s in demo["result"].scans for p in s.zones if p.zone_id in z.provenance.split(";")]
    assert z.confidence == pytest.approx(1 - np.prod([1 - p.confidence for p in parts]), abs=1e-4)


def test_same_result_for_one_two_workers_and_dask(site_copy: Path) -> None:
    site = read_site(site_copy)
    one = run_campaign(site, jobs=1)
    two = run_campaign(site, jobs=2)
    assert one.failures == [] and two.failures == []
    assert _records(one.result) == _records(two.result)
    distributed = pytest.importorskip("dask.distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, host="127.0.0.1", processes=True,
                                  dashboard_address=None) as cluster:
        via = run_campaign(site, dask_address=cluster.scheduler_address)
    assert via.failures == [] and _records(via.result) == _records(one.result)


def test_one_broken_bundle_among_good_ones(site_copy: Path, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    broken = site_copy.parent / "scans" / "S-103" / "records.npy"
    broken.write_bytes(broken.read_bytes()[:1000])  # truncated in transfer
    out = tmp_path / "out"
    code = main(["run", str(site_copy), "--out", str(out), "--no-pictures", "--no-merge"])
    captured = capsys.readouterr()
    assert code == 3
    assert "S-103/records.npy: not a readable .npy array" in captured.err
    assert "failed scans:" in captured.out and "S-103" in captured.out
    assert (out / "klo2-soffit.gpkg").exists()  # the others are exported
    import pyogrio

    scans = set(pyogrio.read_dataframe(out / "klo2-soffit.gpkg", layer="scan_extents")["scan_id"])
    assert scans == {"S-101", "S-102", "S-104", "S-105", "S-106"}


def test_strict_stops_at_the_first_failure(site_copy: Path, tmp_path: Path) -> None:
    (site_copy.parent / "scans" / "S-102" / "points.csv").unlink()
    code = main(["run", str(site_copy), "--out", str(tmp_path / "out"), "-q", "--strict", "--no-pictures", "--no-merge"])
    assert code == 3 and not (tmp_path / "out" / "klo2-soffit.gpkg").exists()


def test_cache_recomputes_only_what_changed(site_copy: Path, tmp_path: Path) -> None:
    cache = tmp_path / "cache"
    site = read_site(site_copy)
    cold = run_campaign(site, cache_dir=cache)
    assert len(cold.computed) == 6 and cold.cached == []
    warm = run_campaign(site, cache_dir=cache)
    assert warm.computed == [] and len(warm.cached) == 6
    assert _records(warm.result) == _records(cold.result)
    # one bundle changes: only it is recomputed
    pts = site_copy.parent / "scans" / "S-104" / "points.csv"
    pts.write_text(pts.read_text().replace(",1,0.", ",1,0.", 1).replace("\n", "\r\n", 1))
    again = run_campaign(site, cache_dir=cache)
    assert again.computed == ["S-104"] and len(again.cached) == 5
    # a setting that shapes zones invalidates every scan; one that only names outputs does not
    import dataclasses

    moved = run_campaign(dataclasses.replace(site, outputs=dataclasses.replace(site.outputs, basename="other")), cache_dir=cache)
    assert moved.computed == []
    reref = run_campaign(dataclasses.replace(site, energy=dataclasses.replace(site.energy, percentile=20.0)), cache_dir=cache)
    assert len(reref.computed) == 6


def test_cli_jobs_two_and_an_unreachable_scheduler(site_copy: Path, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    out = tmp_path / "out"
    assert main(["run", str(site_copy), "--out", str(out), "--jobs", "2", "--no-pictures", "--no-merge"]) == 0
    assert "scans: 6 computed, 0 from the cache, 0 failed" in capsys.readouterr().out
    assert main(["run", str(site_copy), "--out", str(out), "--jobs", "2", "--no-pictures", "--no-merge",
                 "--overwrite"]) == 0
    assert "0 computed, 6 from the cache" in capsys.readouterr().out
    pytest.importorskip("dask.distributed")
    code = main(["run", str(site_copy), "--out", str(tmp_path / "o2"), "-q", "--no-cache", "--no-pictures",
                 "--dask", "tcp://127.0.0.1:9"])
    err = capsys.readouterr().err
    assert code == 1 and "cannot reach the Dask scheduler at tcp://127.0.0.1:9" in err
    assert len(err.strip().splitlines()) == 1


def test_a_task_carries_its_own_scan_only(site_copy: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # what each pool task sends does not grow with the campaign: the site goes to each worker once,
    # without its list of scans (a site listing 5,000 entries sends the same task as one listing 6)
    import concurrent.futures
    import dataclasses
    import pickle

    import overlay.campaign as campaign

    sent: list[int] = []
    started: list[int] = []
    real_submit = concurrent.futures.ProcessPoolExecutor.submit
    real_init = concurrent.futures.ProcessPoolExecutor.__init__

    def submit(self, fn, *args, **kwargs):
        sent.append(len(pickle.dumps((fn, args, kwargs))))
        return real_submit(self, fn, *args, **kwargs)

    def init(self, *args, **kwargs):
        started.append(len(pickle.dumps(kwargs.get("initargs", ()))))
        real_init(self, *args, **kwargs)

    monkeypatch.setattr(concurrent.futures.ProcessPoolExecutor, "submit", submit)
    monkeypatch.setattr(concurrent.futures.ProcessPoolExecutor, "__init__", init)
    site = read_site(site_copy)
    entries = site.scans[:2]
    big = dataclasses.replace(site, scans=tuple(site.scans) * 1000)
    for s in (site, big):
        results = list(campaign._map_local(entries, s, 2, None))
        assert [r[1] for r in results] == [None, None]  # both scans done
    assert sent[:2] == sent[2:] and started[0] == started[1]
