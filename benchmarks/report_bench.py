"""Benchmark of the reports over a campaign; figures go to docs/performance.md.

    .venv/bin/python benchmarks/report_bench.py              # 200 scans, ≈ 3 min
    .venv/bin/python benchmarks/report_bench.py --scans 60   # quicker

The synthetic campaign of benchmarks/campaign_bench.py (one resonant patch per scan, so one
defect with three nested zones each), the scans grouped ten to an element.  Measured in one run:
every picture drawn on one process (time per scan; target ≤ 0.15 s), then the outputs written:
the size of the report's index page (target ≤ 2 MB) and of the whole report — pages and
pictures — per 100 scans (target ≤ 25 MB).  For comparison, the single self-contained page of
the first 20 scans (the largest campaign written as one page).
"""

from __future__ import annotations

import argparse
import dataclasses
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))

from campaign_bench import write_site

from overlay.campaign import run_campaign
from overlay.io.site import read_site
from overlay.outputs.write import draw_pictures, write_outputs

PER_ELEMENT = 10


def size(paths: list[Path]) -> float:
    return sum(p.stat().st_size for p in paths) / 1e6


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--scans", type=int, default=200)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        formats = '[outputs]\nformats = ["dxf", "gpkg", "quantities-csv"]\n'
        result = run_campaign(read_site(write_site(root / "site", args.scans, PER_ELEMENT, formats)), jobs=2).result
        n_scans = len(result.scans)
        t0 = time.perf_counter()
        images = draw_pictures(result, None, jobs=1)
        drawing = time.perf_counter() - t0
        t0 = time.perf_counter()
        paths = write_outputs(result, root / "out", pdf=False, jobs=2).paths
        writing = time.perf_counter() - t0
        index = paths["html"]
        pages = sorted(index.parent.glob("*.html"))
        pictures = sorted(paths["pictures"].glob("*.png"))
        whole = size(pages) + size(pictures)
        few = dataclasses.replace(result, scans=result.scans[:20],
                                  mosaic=[z for z in result.zones if z.scan_id.split(";")[0] in
                                          {s.scan_id for s in result.scans[:20]}])
        single = write_outputs(few, root / "single", pdf=False, jobs=2).paths["html"]
        print(f"{n_scans} scans, {len(result.zones)} zones, {len(images)} pictures, {len(pages)} pages")
        print(f"  pictures on 1 process              {drawing:.1f} s   ({drawing / n_scans:.3f} s per scan; target <= 0.15)")
        print(f"  write_outputs, pictures on 2       {writing:.1f} s")
        print(f"  index page                         {size([index]):.2f} MB   (target <= 2 MB)")
        print(f"  pages                              {size(pages):.2f} MB")
        print(f"  pictures                           {size(pictures):.1f} MB   ({size(pictures) * 1e3 / len(pictures):.0f} kB each)")
        print(f"  whole report per 100 scans         {whole * 100 / n_scans:.1f} MB   (target <= 25 MB)")
        print(f"  single page of 20 scans            {size([single]):.1f} MB   ({size([single]) / 20:.2f} MB per scan)")


if __name__ == "__main__":
    main()
