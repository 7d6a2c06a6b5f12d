"""Zones on scans the tool was not tuned to: the validation table of docs/zones.md.

    python benchmarks/zone_validation.py [--only NAME_PART] [--reference auto|percentile|trend]

Each case of tests/independent_cases.py (its own generator and seed: finite-difference plate
modes, flat-topped and double-peaked responses, scan edges, merging pairs, smooth sound fields of
0, 4 and 8 dB) is written as a bundle and run with the default settings.  Per case: zones of the
lowest class, contour area error against the analytic level set, outline area error against the
true hollow, centroid error, false-zone area, the outline's basis and fit, the reference chosen.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from tests.independent_cases import cases, run_case  # noqa: E402


def table(rows: list[dict[str, object]]) -> str:
    head = ("case", "zones", "contour_err", "outline_err", "centroid_m", "false_m2", "basis", "misfit", "reference",
            "span_db")
    out = ["| " + " | ".join(head) + " |", "|" + "---|" * len(head)]
    for r in rows:
        cells = []
        for h in head:
            v = r.get(h, "")
            if isinstance(v, float):
                v = "" if v != v else (f"{v:+.0%}" if h.endswith("_err") else f"{v:.3f}" if h not in ("span_db", "misfit") else f"{v:.1f}")
            cells.append(str(v))
        out.append("| " + " | ".join(cells) + " |")
    return "\n".join(out)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--only", default="", help="run only the cases whose name contains this")
    ap.add_argument("--reference", default="auto", help="the [energy] reference to run with (default auto)")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        rows = [run_case(c, Path(tmp), args.reference) for c in cases() if args.only in c.name]
    print(table(rows))


if __name__ == "__main__":
    main()
