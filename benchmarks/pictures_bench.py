"""Benchmark of the pictures over a campaign; figures go to docs/performance.md.

    .venv/bin/python benchmarks/pictures_bench.py             # 40 scans, ≈ 1 min
    .venv/bin/python benchmarks/pictures_bench.py --scans 10  # quicker

The synthetic campaign of benchmarks/campaign_bench.py (one resonant patch per scan, so three
nested zones each), processed once; then every picture of the run drawn on 1 and on 2
processes, measured in one run: time per picture, the speed-up of 2 processes over 1, and the
size of the PNGs the HTML report embeds.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))

from campaign_bench import write_site

from overlay.campaign import run_campaign
from overlay.io.site import read_site
from overlay.outputs.write import draw_pictures


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--scans", type=int, default=40)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        site = read_site(write_site(Path(tmp), args.scans))
        t0 = time.perf_counter()
        result = run_campaign(site, jobs=2).result
        numbers = time.perf_counter() - t0
        n_zones = sum(len(s.zones) for s in result.scans)
        times = {}
        for jobs in (1, 2):
            t0 = time.perf_counter()
            images = draw_pictures(result, None, jobs=jobs)
            times[jobs] = time.perf_counter() - t0
        size = sum(len(v) for v in images.values())
        print(f"{args.scans} scans, {n_zones} zones, {len(images)} pictures, {os.cpu_count()} cores")
        print(f"  the numbers (run_campaign, 2 processes)   {numbers:.1f} s")
        print(f"  pictures on 1 process                     {times[1]:.1f} s   ({times[1] / len(images):.2f} s per picture)")
        print(f"  pictures on 2 processes                   {times[2]:.1f} s   (speed-up {times[1] / times[2]:.2f})")
        print(f"  PNG bytes                                 {size / 1e6:.1f} MB   ({size / len(images) / 1e3:.0f} kB per picture)")


if __name__ == "__main__":
    main()
