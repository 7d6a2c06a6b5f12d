"""Are two output folders the same apart from run times?  The check after a refactor.

    .venv/bin/python -m overlay demo --out /tmp/before      # on the old commit (git worktree)
    .venv/bin/python -m overlay demo --out /tmp/after       # on the new one
    .venv/bin/python benchmarks/same_outputs.py /tmp/before /tmp/after

Files equal byte for byte pass.  Text files (reports, GeoJSON, CSV, DXF) and GeoPackages (compared
as their SQL dump) pass when they differ only in time stamps, GUIDs, the DXF's date variables and
durations; pictures embedded in HTML are compared as their PNG files.  PNG and PDF files that differ are listed (the DXF preview shows the run time, so it
always differs); look at them.  Exit 1 when any text differs, 0 otherwise.
"""

from __future__ import annotations

import argparse
import difflib
import re
import sqlite3
import sys
from pathlib import Path

STAMP = re.compile(r"\d{4}-\d\d-\d\d[T ]\d\d:\d\d:\d\d(\.\d+)?(Z|\+00:00)?|\d{8}T\d{6}Z")
GUID = re.compile(r"\{[0-9A-Fa-f-]{36}\}")
EMBEDDED = re.compile(r"data:image/png;base64,[A-Za-z0-9+/=]+")
BINARY = (".png", ".pdf", ".npy", ".npz")


def normalised(path: Path) -> str:
    """The file as text with what changes from run to run masked."""
    if path.suffix == ".gpkg":
        con = sqlite3.connect(path)
        text = "\n".join(con.iterdump())
        con.close()
    else:
        text = path.read_text(errors="replace")
    text = GUID.sub("<guid>", STAMP.sub("<time>", text))
    text = EMBEDDED.sub("<embedded picture, compared as its PNG file>", text)
    if path.suffix == ".dxf":
        text = re.sub(r"(\$TD\w+\n\s*40\n)[^\n]+", r"\1<date>", text)
    return re.sub(r"\d+(\.\d+)? s\b", "<seconds>", text)


def compare(before: Path, after: Path) -> list[str]:
    """One line per difference that is more than a run time (binary files: listed, not judged)."""
    out = []
    names = {p.relative_to(before) for p in before.rglob("*") if p.is_file() and ".overlay-cache" not in p.parts}
    names_after = {p.relative_to(after) for p in after.rglob("*") if p.is_file() and ".overlay-cache" not in p.parts}
    for name in sorted(names ^ names_after):
        if not STAMP.search(str(name)):  # a backup is named by its time
            out.append(f"only in {'before' if name in names else 'after'}: {name}")
    for name in sorted(names & names_after):
        a, b = before / name, after / name
        if a.read_bytes() == b.read_bytes():
            continue
        if name.suffix in BINARY:
            print(f"binary, differs (look at it): {name}")
            continue
        ta, tb = normalised(a), normalised(b)
        if ta != tb:
            diff = difflib.unified_diff(ta.splitlines(), tb.splitlines(), lineterm="", n=0)
            first = next((d for d in list(diff)[2:] if d[:1] in "+-"), "")
            out.append(f"differs: {name}: {first[:200]}")
    return out


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("before", type=Path)
    p.add_argument("after", type=Path)
    args = p.parse_args()
    problems = compare(args.before, args.after)
    print("\n".join(problems) if problems else "same apart from run times")
    return 1 if problems else 0


if __name__ == "__main__":
    sys.exit(main())
