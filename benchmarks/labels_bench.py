"""Label placement on a crowded grid of zones: how its cost grows with the number of labels.

    .venv/bin/python benchmarks/labels_bench.py                   # 500 … 4,000 labels, ≈ 1 min
    .venv/bin/python benchmarks/labels_bench.py --sizes 250 500   # quicker

Square zones 1 m wide, 3 m apart on a square grid, each with a label 4 × 0.8 m and a gap of
0.3 m: no label fits inside its zone or between two, so every one moves out on its rings, the
drawing's worst case (a campaign's overview at a small scale).  Prints the CPU seconds per size
and the growth against the first size.
"""

from __future__ import annotations

import argparse
import math
import time

from shapely.geometry import box

from overlay.outputs.labels import Item, place_labels


def grid(n: int) -> list[Item]:
    side = math.ceil(math.sqrt(n))
    return [Item(f"D{i}", box((i % side) * 3.0, (i // side) * 3.0, (i % side) * 3.0 + 1, (i // side) * 3.0 + 1),
                 4.0, 0.8) for i in range(n)]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--sizes", type=int, nargs="+", default=[500, 1000, 2000, 4000])
    args = ap.parse_args()
    first = None
    for n in args.sizes:
        items = grid(n)
        t0 = time.process_time()
        placed = place_labels(items, gap=0.3)
        cpu = time.process_time() - t0
        first = first or (n, cpu)
        moved = sum(not p.inside for p in placed)
        print(f"  {n:5d} labels ({moved} moved out): {cpu:6.1f} s CPU, {1e3 * cpu / n:5.1f} ms a label; "
              f"{n / first[0]:.0f} x the labels, {cpu / first[1]:.1f} x the time")


if __name__ == "__main__":
    main()
