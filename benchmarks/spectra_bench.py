"""Benchmark of the spectra stage (targets in docs/performance.md); figures go to docs/performance.md.

    .venv/bin/python benchmarks/spectra_bench.py            # 10,000 × 8,192 float32 + 4 GB memory run
    .venv/bin/python benchmarks/spectra_bench.py --no-big   # skip the 4 GB file
    .venv/bin/python benchmarks/spectra_bench.py --no-big --runs 8   # and the spread over 8 runs

Reports, measured in one run on this machine:
  (a) spectra stage time ÷ bare scipy.fft.rfft of the same gated float32 array   (target ≤ 2.0)
  (b) scipy.signal.welch on the same array ÷ spectra stage                       (target ≥ 10)
  (c) peak resident memory of the spectra stage over a 4 GB record file          (target ≤ 512 MB)
"""

from __future__ import annotations

import argparse
import mmap
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import scipy.fft
import scipy.signal

from overlay.signal.gate import Gate
from overlay.signal.spectra import records_spectra

FS = 51200.0
N_SAMPLES = 8192
GATE = (1024, 1024 + 4096)  # a 80 ms window inside a 160 ms record
BAND = (400.0, 8000.0)


def make_records(path: Path, n_points: int, chunk: int = 4096) -> None:
    """Float32 records of noise plus a resonance, written in chunks (never whole in memory)."""
    out = np.lib.format.open_memmap(path, mode="w+", dtype=np.float32, shape=(n_points, N_SAMPLES))
    rng = np.random.default_rng(0)
    t = np.arange(N_SAMPLES) / FS
    tone = np.sin(2 * np.pi * 1800.0 * t).astype(np.float32)
    for i in range(0, n_points, chunk):
        j = min(i + chunk, n_points)
        out[i:j] = rng.standard_normal((j - i, N_SAMPLES), dtype=np.float32) * 1e-4
        out[i:j] += tone * 1e-4
    out.flush()
    del out


def _unmap(rec: np.memmap) -> None:
    """Drop the map's pages from this process (they stay in the OS file cache): every run starts cold."""
    base = rec.base
    base.madvise(mmap.MADV_DONTNEED, 0, len(base))


def speed(path: Path, repeat: int = 7) -> dict[str, float]:
    """Median of ``repeat`` interleaved runs of the floors and the stage (the machine is shared and noisy)."""
    rec = np.load(path, mmap_mode="r")
    gate = Gate(GATE[0], GATE[1], FS, "bench")
    gated = np.ascontiguousarray(rec[:, GATE[0] : GATE[1]], dtype=np.float32)  # in memory, for the floor
    workers = os.cpu_count() or 1

    def chunked() -> None:  # the same FFT, 512 rows at a time: no 164 MB output to fault in
        for i in range(0, len(gated), 512):
            scipy.fft.rfft(gated[i : i + 512], axis=-1, workers=workers)

    runs = {
        "floor_s": (None, lambda: scipy.fft.rfft(gated, axis=-1, workers=workers)),
        "mapped_s": (lambda: _unmap(rec), lambda: scipy.fft.rfft(rec[:, GATE[0] : GATE[1]], axis=-1, workers=workers)),
        "chunked_s": (None, chunked),
        "stage_s": (None, lambda: records_spectra(rec, gate, BAND)),
    }
    times: dict[str, list[float]] = {k: [] for k in runs}
    cpu: dict[str, list[float]] = {k: [] for k in runs}
    for _ in range(repeat):
        for k, (before, fn) in runs.items():
            if before is not None:
                before()
            t0, c0 = time.perf_counter(), time.process_time()
            fn()
            times[k].append(time.perf_counter() - t0)
            cpu[k].append(time.process_time() - c0)
    best = {k: float(np.median(v)) for k, v in times.items()}
    best.update({k.replace("_s", "_cpu"): float(np.median(v)) for k, v in cpu.items()})
    t0 = time.perf_counter()
    scipy.signal.welch(gated, FS, axis=-1)
    best["welch_s"] = time.perf_counter() - t0
    return best


PEAK_SCRIPT = """
import sys, numpy as np
from overlay.signal.gate import Gate
from overlay.signal.spectra import records_spectra
rec = np.load(sys.argv[1], mmap_mode="r")
sp = records_spectra(rec, Gate({g0}, {g1}, {fs}, "bench"), ({b0}, {b1}))
print(int(np.isfinite(sp.energy).sum()))
for line in open("/proc/self/status"):
    if line.startswith("VmHWM"):
        print(line.split()[1])
"""


def peak_memory(path: Path) -> tuple[float, int]:
    script = PEAK_SCRIPT.format(g0=GATE[0], g1=GATE[1], fs=FS, b0=BAND[0], b1=BAND[1])
    done = subprocess.run([sys.executable, "-c", script, str(path)], capture_output=True, text=True, check=True)
    n_ok, hwm_kb = done.stdout.split()
    return int(hwm_kb) / 1024.0, int(n_ok)


def report(s: dict[str, float]) -> None:
    print(f"  bare rfft, gated array in memory          {s['floor_s']:.3f} s")
    print(f"  bare rfft, gated array from the file map  {s['mapped_s']:.3f} s   (pages dropped before each run)")
    print(f"  bare rfft in 512-row chunks, in memory    {s['chunked_s']:.3f} s")
    print(f"  spectra stage, from the file              {s['stage_s']:.3f} s")
    print(f"  scipy.signal.welch, in memory             {s['welch_s']:.3f} s")
    print(f"  (a) stage / rfft in memory                {s['stage_s'] / s['floor_s']:.2f}   (target <= 2.0; wall clock)")
    print(f"      stage / rfft of the mapped file       {s['stage_s'] / s['mapped_s']:.2f}   (the floor reads its input too)")
    print(f"      stage / chunked rfft in memory        {s['stage_s'] / s['chunked_s']:.2f}")
    print(f"      CPU time: stage {s['stage_cpu']:.3f} s, in memory {s['floor_cpu']:.3f} s, mapped {s['mapped_cpu']:.3f} s")
    print(f"  (b) welch / stage                         {s['welch_s'] / s['stage_s']:.1f}   (target >= 10)")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--no-big", action="store_true", help="skip the 4 GB peak-memory run")
    ap.add_argument("--runs", type=int, default=1, help="repeat the 10,000-point measurement this many times "
                    "and print the spread (default 1)")
    ap.add_argument("--dir", type=Path, default=None, help="scratch folder (default: a temporary one)")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory(dir=args.dir) as tmp:
        small = Path(tmp) / "records_10k.npy"
        make_records(small, 10_000)
        print(f"10,000 x {N_SAMPLES} float32, gate {GATE[1] - GATE[0]} samples, {os.cpu_count()} cores")
        print("  (median of 7 interleaved runs each; welch once)")
        runs = []
        for k in range(args.runs):
            if args.runs > 1:
                print(f" run {k + 1} of {args.runs}")
            runs.append(speed(small))
            report(runs[-1])
        if args.runs > 1:
            for name, num, den in (("(a) stage / rfft in memory", "stage_s", "floor_s"),
                                   ("    stage / rfft of the mapped file", "stage_s", "mapped_s"),
                                   ("(b) welch / stage", "welch_s", "stage_s")):
                r = [s[num] / s[den] for s in runs]
                print(f"  spread over {args.runs} runs, {name}: {min(r):.2f} - {max(r):.2f} (median {np.median(r):.2f})")
        small.unlink()
        if not args.no_big:
            big = Path(tmp) / "records_4gb.npy"
            n_big = (4 * 1024**3) // (N_SAMPLES * 4)
            t0 = time.perf_counter()
            make_records(big, n_big)
            print(f"4 GB file: {n_big} x {N_SAMPLES} float32 ({big.stat().st_size / 1024**3:.2f} GiB) written in "
                  f"{time.perf_counter() - t0:.0f} s")
            mb, n_ok = peak_memory(big)
            print(f"  (c) peak resident memory {mb:.0f} MB over {n_ok} points   (target <= 512 MB)")


if __name__ == "__main__":
    main()
