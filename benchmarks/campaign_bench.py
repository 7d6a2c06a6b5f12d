"""Benchmark of campaigns; figures go to docs/performance.md.

    .venv/bin/python benchmarks/campaign_bench.py             # 200 scans, ≈ 3 min
    .venv/bin/python benchmarks/campaign_bench.py --scans 60  # quicker

A synthetic campaign: a row of overlapping small scans (25 × 25 points, 1,024 samples, one
resonant patch each), measured in one run:
  speed-up of 2 local workers over 1 (target ≥ 1.7 on 2 cores)
  a Dask LocalCluster (2 workers, loopback) against the local pool of 2 (target within 15 %)
  a warm rerun with 1 % of the scans changed against the cold run (target ≤ 5 % of the cold time)
  time from 50 to 200 scans (target linear: ratio ≈ 4)
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np

from overlay.campaign import run_campaign
from overlay.io.site import read_site

FS, N = 25600.0, 1024


def write_scan(folder: Path, k: int, rng: np.random.Generator) -> None:
    folder.mkdir(parents=True)
    n, s = 25, 0.05
    rr, cc = np.mgrid[0:n, 0:n]
    xy = np.column_stack([cc.ravel() * s, rr.ravel() * s])
    t = np.arange(N) / FS
    f0 = rng.uniform(900, 3000)
    c = rng.uniform(0.4, 0.8, 2)
    amp = np.exp(-np.sum((xy - c) ** 2, axis=1) / (2 * 0.08**2))
    rec = rng.normal(0, 1e-4, (n * n, N)) + (1 + 8 * amp)[:, None] * 1e-3 * np.sin(2 * np.pi * f0 * t) * np.exp(-t * 40)
    np.save(folder / "records.npy", rec.astype(np.float32))
    (folder / "points.csv").write_text("id,row,col,x,y\n" + "\n".join(
        f"P{i},{r},{q},{x:.3f},{y:.3f}" for i, (r, q, (x, y)) in enumerate(zip(rr.ravel(), cc.ravel(), xy))) + "\n")
    ox = k * 0.9  # each scan overlaps the next by 0.3 m
    targets = "".join(f'[[targets]]\nname = "S{k}-{j}"\nscanner = [{x}, {y}]\ndrawing = [{x + ox}, {y}]\n'
                      for j, (x, y) in enumerate([(0, 0), (1.2, 0), (1.2, 1.2), (0, 1.2)]))
    (folder / "scan.toml").write_text(
        f'format = "scan-bundle/1"\n[scan]\nid = "B-{k:04d}"\n[coordinates]\nkind = "surface"\n'
        f'[records]\nsample_rate_hz = {FS}\nvelocity_unit = "m/s"\ngate_s = [0.0, {N / FS}]\n'
        f'[band]\nhz = [400.0, 8000.0]\n{targets}')


def write_site(root: Path, n: int, per_element: int | None = None, extra: str = "") -> Path:
    """``n`` scans; with ``per_element`` they are named to elements ``SPAN-00`` … that many to each."""
    rng = np.random.default_rng(7)
    for k in range(n):
        write_scan(root / "scans" / f"B-{k:04d}", k, rng)
    if per_element is None:
        entries = '[[scans]]\nbundle = "scans/B-*"\n'
    else:
        entries = "".join(f'[[scans]]\nbundle = "scans/B-{k:04d}"\nelement = "SPAN-{k // per_element:02d}"\n'
                          for k in range(n))
    site = root / "site.toml"
    site.write_text('format = "overlay-site/1"\n[site]\nname = "bench"\n' + extra + entries)
    return site


def timed(fn) -> float:
    t0 = time.perf_counter()
    c = fn()
    assert not c.failures, c.failures[:2]
    return time.perf_counter() - t0


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--scans", type=int, default=200)
    ap.add_argument("--runs", type=int, default=1, help="measure the speed-up this many times")
    ap.add_argument("--payload", action="store_true", help="the same scans from a site of 16 times as many entries")
    ap.add_argument("--exporters", action="store_true", help="the share of a whole run spent writing outputs")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        site = read_site(write_site(root, args.scans))
        small = read_site(write_site(root / "quarter", args.scans // 4))
        print(f"{args.scans} scans of 625 points x {N} samples")
        speedups = []
        for _ in range(args.runs):
            one = timed(lambda: run_campaign(site, jobs=1))
            two = timed(lambda: run_campaign(site, jobs=2))
            speedups.append(one / two)
            print(f"  1 worker {one:.1f} s, 2 workers {two:.1f} s: speed-up {one / two:.2f}   (target >= 1.8)")
        if args.runs > 1:
            print(f"  speed-up over {args.runs} runs: min {min(speedups):.2f}, max {max(speedups):.2f}")
        quarter = timed(lambda: run_campaign(small, jobs=1))
        if args.payload:
            import dataclasses

            from overlay.campaign import _map_local

            many = dataclasses.replace(site, scans=tuple(site.scans) * 16)
            took: dict[str, list[float]] = {"site listing them": [], "site listing 16x as many entries": []}
            for _ in range(2):  # interleaved: the machine's speed drifts
                for label, s in zip(took, (site, many)):
                    t0 = time.perf_counter()
                    list(_map_local(list(site.scans), s, 2, None))
                    took[label].append(time.perf_counter() - t0)
            for label, t in took.items():
                print(f"  {args.scans} scans on 2 workers, {label}: {min(t):.1f} s (best of 2)")
        if args.exporters:
            from overlay.outputs.write import write_outputs

            t0 = time.perf_counter()
            c = run_campaign(site, jobs=2)
            numbers = time.perf_counter() - t0
            t0 = time.perf_counter()
            write_outputs(c.result, root / "out", pictures=False, pdf=False)
            writing = time.perf_counter() - t0
            print(f"  scans {numbers:.1f} s, outputs (DXF, GeoPackage, CSV, reports) {writing:.1f} s: writing is "
                  f"{100 * writing / (numbers + writing):.0f} % of the run   (target <= 10 %)")
            import ezdxf

            doc = ezdxf.readfile(next((root / "out").glob("*.dxf")))
            t0 = time.perf_counter()
            doc.saveas(root / "again.dxf")  # ezdxf writing out the same drawing: a floor under the DXF's part
            again = time.perf_counter() - t0
            print(f"  for comparison: ezdxf saving the same drawing again {again:.1f} s, {len(doc.modelspace())} "
                  f"model-space entities ({100 * again / (numbers + again):.0f} % of a run with nothing else written)")
        print(f"  {args.scans // 4} scans {quarter:.1f} s -> {args.scans} scans {one:.1f} s: ratio {one / quarter:.2f}"
              "   (linear: 4)")
        try:
            from dask.distributed import LocalCluster

            with LocalCluster(n_workers=2, threads_per_worker=1, host="127.0.0.1", dashboard_address=None) as cluster:
                dask_t = timed(lambda: run_campaign(site, dask_address=cluster.scheduler_address))
            print(f"  Dask LocalCluster (2 workers) {dask_t:.1f} s vs local pool {two:.1f} s: "
                  f"{100 * (dask_t / two - 1):+.0f} %   (target within 15 %)")
        except ImportError:
            print("  Dask not installed: pip install 'overlay[dask]'")
        cache = root / "cache"
        cold = timed(lambda: run_campaign(site, jobs=2, cache_dir=cache))
        changed = max(1, args.scans // 100)
        for k in range(changed):
            p = root / "scans" / f"B-{k:04d}" / "points.csv"
            p.write_text(p.read_text() + "\n")
        warm = timed(lambda: run_campaign(site, jobs=2, cache_dir=cache))
        print(f"  cold run with cache {cold:.1f} s; warm rerun with {changed} changed scan(s) {warm:.2f} s: "
              f"{100 * warm / cold:.1f} % of cold   (target <= 5 %)")


if __name__ == "__main__":
    main()
