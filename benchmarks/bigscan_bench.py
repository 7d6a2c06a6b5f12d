"""Benchmark of a whole run on one big scan against the FFT floor; figures go to docs/performance.md.

    .venv/bin/python benchmarks/bigscan_bench.py                 # 50,000 × 4,096 float32 (819 MB), 5 runs
    .venv/bin/python benchmarks/bigscan_bench.py --runs 2        # quicker
    .venv/bin/python benchmarks/bigscan_bench.py --memory        # and a 4 GB record file, peak memory
    .venv/bin/python benchmarks/bigscan_bench.py --profile       # where one run's time goes (cProfile, top 25)

One scan on a 250 × 200 grid at 2 cm with ten resonant hollows, records 4,096 samples at
51.2 kHz (explicit gate: the whole record).  Measured in one run, interleaved, ``--runs`` times:

  floor      scipy.fft.rfft of the gated float32 records in 512-row chunks, in memory
  run        `overlay run site.toml --no-pictures` as a user starts it (a new process, start-up
             included, no cache): DXF, GeoPackage, CSV, text report           target ≤ 5 × floor
  run+pics   the same with the pictures and the HTML report                     target ≤ 12 × floor
  start-up   `overlay --version` and `overlay --help`                           target ≤ 0.3 s
  imports    a new process importing only the libraries a run needs (for comparison)

``--memory``: the same scan at 125,000 points × 8,192 samples (4.1 GB), ten hollows, a whole run
with pictures: peak resident memory of the process (target ≤ 512 MB).
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import scipy.fft

FS = 51200.0
OVERLAY = str(Path(sys.executable).with_name("overlay"))


def write_site(root: Path, rows: int, cols: int, samples: int, spacing: float = 0.02) -> Path:
    """A site with one big scan: noise everywhere, a damped resonance over ten hollows (chunked writing)."""
    scan = root / "scans" / "BIG"
    scan.mkdir(parents=True)
    rng = np.random.default_rng(3)
    rr, cc = np.mgrid[0:rows, 0:cols]
    xy = np.column_stack([cc.ravel() * spacing, rr.ravel() * spacing])
    w, h = (cols - 1) * spacing, (rows - 1) * spacing
    centres = np.column_stack([rng.uniform(0.1 * w, 0.9 * w, 10), rng.uniform(0.1 * h, 0.9 * h, 10)])
    radii, freqs = rng.uniform(0.08, 0.2, 10), rng.uniform(900.0, 3500.0, 10)
    t = np.arange(samples) / FS
    out = np.lib.format.open_memmap(scan / "records.npy", mode="w+", dtype=np.float32, shape=(rows * cols, samples))
    base = (1e-3 * np.sin(2 * np.pi * 600.0 * t) * np.exp(-t * 60)).astype(np.float32)
    for i in range(0, rows * cols, 4096):
        j = min(i + 4096, rows * cols)
        block = rng.standard_normal((j - i, samples), dtype=np.float32) * np.float32(1e-5) + base
        for (cx, cy), r, f in zip(centres, radii, freqs):
            d2 = ((xy[i:j, 0] - cx) ** 2 + (xy[i:j, 1] - cy) ** 2) / r**2
            amp = np.where(d2 < 1.0, 8e-3 * (1 - d2) ** 2, 0.0).astype(np.float32)
            near = np.nonzero(amp)[0]
            if near.size:
                block[near] += amp[near, None] * (np.sin(2 * np.pi * f * t) * np.exp(-t * 40)).astype(np.float32)
        out[i:j] = block
    out.flush()
    del out
    lines = ["id,row,col,x,y"] + [f"P{k},{r},{c},{x:.4f},{y:.4f}" for k, (r, c, (x, y))
                                  in enumerate(zip(rr.ravel(), cc.ravel(), xy))]
    (scan / "points.csv").write_text("\n".join(lines) + "\n")
    corners = [(0.0, 0.0), (w, 0.0), (w, h), (0.0, h)]
    targets = "".join(f'[[targets]]\nname = "T{k}"\nscanner = [{x}, {y}]\ndrawing = [{x + 10.0}, {y + 5.0}]\n'
                      for k, (x, y) in enumerate(corners))
    (scan / "scan.toml").write_text(
        f'format = "scan-bundle/1"\n[scan]\nid = "BIG"\nelement = "DECK-1"\n[coordinates]\nkind = "surface"\n'
        f'[records]\nsample_rate_hz = {FS}\nvelocity_unit = "m/s"\ngate_s = [0.0, {samples / FS}]\n'
        f"[band]\nhz = [400.0, 8000.0]\n{targets}")
    site = root / "site.toml"
    site.write_text('format = "overlay-site/1"\n[site]\nname = "Big scan"\ndrawing_unit = "m"\n'
                    '[map]\ncrs = "EPSG:25832"\norigin = [500000.0, 5700000.0]\nbearing_deg = 90.0\n'
                    '[[scans]]\nbundle = "scans/BIG"\n[outputs]\nbasename = "big"\n'
                    'formats = ["dxf", "gpkg", "quantities-csv"]\n')
    return site


def floor(records: Path) -> float:
    """The chunked FFT of the gated records, already in memory (the data read is not counted)."""
    rec = np.load(records, mmap_mode="r")
    gated = np.ascontiguousarray(rec, dtype=np.float32)
    workers = os.cpu_count() or 1
    t0 = time.perf_counter()
    for i in range(0, len(gated), 512):
        scipy.fft.rfft(gated[i : i + 512], axis=-1, workers=workers)
    return time.perf_counter() - t0


def run(site: Path, out: Path, *extra: str) -> tuple[float, float]:
    """(wall seconds, peak resident MB) of `overlay run` in a fresh process."""
    t0 = time.perf_counter()
    # peak memory as the kernel keeps it for this process image (VmHWM): getrusage's ru_maxrss would also
    # count the benchmark's own memory, which a forked child carries until it execs
    done = subprocess.run([sys.executable, "-c", "import sys; from overlay.cli.main import main; "
                           "code = main(sys.argv[1:]); "
                           "print([l.split()[1] for l in open('/proc/self/status') if l.startswith('VmHWM')][0], "
                           "file=sys.stderr); sys.exit(code)", "run", str(site), "--out", str(out), "--no-cache",
                           "--overwrite", "-q", *extra], capture_output=True, text=True)
    wall = time.perf_counter() - t0
    if done.returncode != 0:
        raise SystemExit(done.stderr)
    return wall, int(done.stderr.strip().splitlines()[-1]) / 1024


def imports() -> float:
    """A new process that only imports the libraries a run needs: a floor under every run's start."""
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-c", "import numpy, scipy.fft, scipy.optimize, scipy.special, shapely, pyproj, "
                    "ezdxf"], check=True)
    return time.perf_counter() - t0


def startup(*args: str) -> float:
    t0 = time.perf_counter()
    subprocess.run([OVERLAY, *args], capture_output=True, check=True)
    return time.perf_counter() - t0


def spread(values: list[float], fmt: str = ".2f") -> str:
    return (f"{min(values):{fmt}} / {statistics.median(values):{fmt}} / {max(values):{fmt}}"
            if values else "-")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--runs", type=int, default=5)
    ap.add_argument("--memory", action="store_true", help="also the 4 GB record file, peak memory")
    ap.add_argument("--profile", action="store_true", help="profile one run in this process instead")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory(dir=os.environ.get("BENCH_TMP")) as tmp:
        root = Path(tmp)
        site = write_site(root / "site", 250, 200, 4096)
        if args.profile:
            import cProfile
            import pstats

            from overlay.cli.main import main as overlay

            cProfile.runctx("overlay(['run', str(site), '--out', str(root / 'p'), '--no-cache', '-q'])",
                            globals(), {"overlay": overlay, "site": site, "root": root}, str(root / "prof"))
            pstats.Stats(str(root / "prof")).sort_stats("cumulative").print_stats(25)
            return
        rows: dict[str, list[float]] = {"floor": [], "run": [], "pics": [], "rss": [], "version": [], "help": [],
                                        "imports": []}
        for k in range(args.runs):
            rows["floor"].append(floor(root / "site" / "scans" / "BIG" / "records.npy"))
            rows["run"].append(run(site, root / "out", "--no-pictures")[0])
            wall, rss = run(site, root / "out")
            rows["pics"].append(wall)
            rows["rss"].append(rss)
            rows["version"].append(startup("--version"))
            rows["help"].append(startup("--help"))
            rows["imports"].append(imports())
        ratio = [r / f for r, f in zip(rows["run"], rows["floor"])]
        ratio_p = [r / f for r, f in zip(rows["pics"], rows["floor"])]
        print(f"50,000 × 4,096 float32 scan, {args.runs} runs, min / median / max:")
        print(f"  floor (chunked rfft)           {spread(rows['floor'], '.3f')} s")
        print(f"  run, no pictures               {spread(rows['run'])} s   ratio {spread(ratio, '.1f')}   (target <= 5)")
        print(f"  run with pictures              {spread(rows['pics'])} s   ratio {spread(ratio_p, '.1f')}   (target <= 12)")
        ratio_i = [r / f for r, f in zip(rows["imports"], rows["floor"])]
        print(f"  imports alone (numpy, scipy, shapely, pyproj, ezdxf) {spread(rows['imports'])} s   "
              f"ratio {spread(ratio_i, '.1f')}   (for comparison: a floor under the run's start)")
        print(f"  peak memory, with pictures     {spread(rows['rss'], '.0f')} MB")
        print(f"  overlay --version              {spread(rows['version'])} s   (target <= 0.3)")
        print(f"  overlay --help                 {spread(rows['help'])} s   (target <= 0.3)")
        if args.memory:
            big = write_site(root / "big", 500, 250, 8192)
            size = (root / "big" / "scans" / "BIG" / "records.npy").stat().st_size / 1e9
            wall, rss = run(big, root / "bigout")
            print(f"  4 GB file ({size:.1f} GB, 125,000 × 8,192): whole run with pictures {wall:.1f} s, "
                  f"peak memory {rss:.0f} MB   (target <= 512)")


if __name__ == "__main__":
    main()
