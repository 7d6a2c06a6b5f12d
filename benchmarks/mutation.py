"""Mutation testing of the computational core, in bounded time: do the tests catch a changed result?

    pip install -e ".[test,mutation]"
    python benchmarks/mutation.py [--modules energy,spectra …] [--budget 150] [--jobs 2] [--update]

For each core module, in a scratch copy of the repository, mutmut (PyPI) changes the module one
small edit at a time — an operator, a constant, a comparison, a dropped call — and runs only the
tests that exercise the changed function (mutmut's per-function test selection, from one traced
run of the module's tests); a mutant no test fails on has *survived*.  Lines that only build an
error message or a warning are not mutated (their wording is not a result).  Each module gets
``--budget`` seconds; what is left unchecked is reported as such.  Survivors listed in
``benchmarks/mutation-equivalents.toml`` with a one-line reason are equivalent (no input can tell
them from the original) and not counted.  The report goes to ``benchmarks/mutation-report.md``:
per module the counts, the share of non-equivalent survivors (target: at most 10 %), and the diff
of every survivor.  ``--update`` re-runs only ``--modules`` and keeps the other modules' rows of the
existing report (each row says the day it was run).  Not part of CI (too slow); run it after touching
the core (DEVELOPERS.md).
"""

from __future__ import annotations

import argparse
import json
import os
import re
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from datetime import datetime, timezone
from pathlib import Path

import tomllib

ROOT = Path(__file__).resolve().parents[1]
REPORT = ROOT / "benchmarks" / "mutation-report.md"
EQUIVALENTS = ROOT / "benchmarks" / "mutation-equivalents.toml"

# core module → the tests that exercise it (fast ones; mutmut picks the relevant ones per function)
CORE: dict[str, list[str]] = {
    "signal/spectra": ["tests/test_spectra.py", "tests/test_energy_stage.py"],
    "signal/energy": ["tests/test_energy.py", "tests/test_energy_stage.py", "tests/test_field.py"],
    "signal/field": ["tests/test_field.py"],
    "zones/contour": ["tests/test_contour.py", "tests/test_zones.py"],
    "zones/zone": ["tests/test_zones.py", "tests/test_demo.py"],
    "zones/outline": ["tests/test_outline.py", "tests/test_plate_shapes.py", "tests/test_zones.py"],
    "zones/plate": ["tests/test_plate.py", "tests/test_plate_shapes.py", "tests/test_zones.py"],
    "zones/mosaic": ["tests/test_mosaic.py"],
    "geometry/fits": ["tests/test_fits.py", "tests/test_frames.py"],
    "geometry/transforms": ["tests/test_fits.py", "tests/test_frames.py"],
    "quantities": ["tests/test_quantities.py"],
    "assets/merge": ["tests/test_merge_rows.py"],
    "calibration/agreement": ["tests/test_calibration.py"],
}
NOT_RESULTS = [r"^\s*raise\b", r"warnings\.warn\(", r"^\s*(msg|hint|why|problem) = "]  # messages, not numbers
STATUS = re.compile(r"^\s*(\S+): (.+)$")


def copy_repo(dest: Path) -> None:
    """The tracked files (and any uncommitted edits of them) into ``dest``."""
    files = subprocess.run(["git", "ls-files", "--cached", "--others", "--exclude-standard"], cwd=ROOT, check=True,
                           capture_output=True, text=True).stdout.split()
    for f in files:
        src = ROOT / f
        if src.is_file():
            (dest / f).parent.mkdir(parents=True, exist_ok=True)
            shutil.copy2(src, dest / f)


def configure(work: Path, module: str, tests: list[str]) -> None:
    text = (work / "pyproject.toml").read_text()
    patterns = ", ".join(json.dumps(p) for p in NOT_RESULTS)  # TOML basic strings take JSON's escapes
    text += (f'\n[tool.mutmut]\nsource_paths = ["overlay"]\nonly_mutate = ["overlay/{module}.py"]\n'
             f"pytest_add_cli_args_test_selection = {json.dumps(tests)}\n"
             f'pytest_add_cli_args = ["-p", "no:cacheprovider", "-q", "-x"]\nalso_copy = ["demo_site/"]\n'
             f"do_not_mutate_patterns = [{patterns}]\n")
    (work / "pyproject.toml").write_text(text)


def results(work: Path, mutmut: str) -> dict[str, str]:
    done = subprocess.run([mutmut, "results", "--all", "true"], cwd=work, capture_output=True, text=True)
    out = {}
    for line in done.stdout.splitlines():
        m = STATUS.match(line)
        if m:
            out[m.group(1)] = m.group(2).strip()
    return out


def diff_of(work: Path, mutmut: str, name: str) -> str:
    done = subprocess.run([mutmut, "show", name], cwd=work, capture_output=True, text=True)
    return "\n".join(line for line in done.stdout.splitlines() if line.startswith(("+", "-"))
                     and not line.startswith(("+++", "---")))


def equivalents() -> list[dict[str, str]]:
    if not EQUIVALENTS.exists():
        return []
    return tomllib.loads(EQUIVALENTS.read_text()).get("equivalent", [])


def is_equivalent(module: str, diff: str, known: list[dict[str, str]]) -> str | None:
    added = [line[1:].strip() for line in diff.splitlines() if line.startswith("+")]
    for e in known:
        if e["module"] == module and any(e["line"].strip() == a for a in added):
            return e["reason"]
    return None


def run_module(module: str, budget: float, jobs: int, mutmut: str) -> dict[str, object]:
    with tempfile.TemporaryDirectory(prefix=f"mutate-{module.replace('/', '-')}-") as tmp:
        work = Path(tmp)
        copy_repo(work)
        configure(work, module, CORE[module])
        t0 = time.perf_counter()
        # its own session, so the budget stops mutmut's children too (a test may start worker processes)
        run = subprocess.Popen([mutmut, "run", "--max-children", str(jobs)], cwd=work, start_new_session=True,
                               stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        try:
            run.wait(timeout=budget)
            timed_out = False
        except subprocess.TimeoutExpired:
            timed_out = True
            os.killpg(run.pid, signal.SIGKILL)
            run.wait()
        seconds = time.perf_counter() - t0
        status = results(work, mutmut)
        known = equivalents()
        survivors = []
        for name, st in sorted(status.items()):
            if st in ("survived", "no tests"):
                diff = diff_of(work, mutmut, name)
                survivors.append((name, st, diff, is_equivalent(module, diff, known)))
    counts: dict[str, int] = {}
    for st in status.values():
        counts[st] = counts.get(st, 0) + 1
    live = [s for s in survivors if s[3] is None]
    checked = sum(v for k, v in counts.items() if k != "not checked")
    considered = checked - (len(survivors) - len(live))
    return {"module": module, "counts": counts, "survivors": survivors, "seconds": seconds, "timed_out": timed_out,
            "share": len(live) / considered if considered else float("nan"), "checked": checked,
            "day": datetime.now(timezone.utc).strftime("%Y-%m-%d")}


HEADER = ["# Mutation testing of the core", "",
          "Made by `python benchmarks/mutation.py` (see its docstring). Survivors: mutants no test caught; "
          "equivalent ones (no input tells them apart) are listed in `benchmarks/mutation-equivalents.toml`.", "",
          "| module | mutants | checked | killed | survived | no tests | timeout | equivalent | live survivors | "
          "share | time | run |", "|---|---|---|---|---|---|---|---|---|---|---|---|"]


def rendered(r: dict[str, object]) -> tuple[str, list[str]]:
    """One module's table row and its survivor section (empty when nothing live survived)."""
    c = r["counts"]
    surv = r["survivors"]
    eq = sum(1 for s in surv if s[3])
    live = [s for s in surv if not s[3]]
    row = (f"| {r['module']} | {sum(c.values())} | {r['checked']} | {c.get('killed', 0)} | {c.get('survived', 0)} | "
           f"{c.get('no tests', 0)} | {c.get('timeout', 0)} | {eq} | {len(live)} | {r['share']:.1%} | "
           f"{r['seconds']:.0f} s{' (budget)' if r['timed_out'] else ''} | {r['day']} |")
    section: list[str] = []
    if live:
        section = ["", f"## {r['module']}: {len(live)} live survivor(s)", ""]
        for name, st, diff, _ in live:
            section += [f"`{name}` ({st})", "", "```diff", diff or "(no diff)", "```", ""]
    return row, section


def previous(path: Path) -> dict[str, tuple[str, list[str]]]:
    """The rows and sections of an existing report, by module (for ``--update``)."""
    if not path.exists():
        return {}
    out: dict[str, tuple[str, list[str]]] = {}
    lines = path.read_text().splitlines()
    for line in lines:
        cells = [c.strip() for c in line.strip("|").split("|")]
        if line.startswith("| ") and cells[0] in CORE:
            out[cells[0]] = (line, [])
    module = None
    for line in lines:
        m = re.match(r"^## (\S+): \d+ live survivor", line)
        if m:
            module = m.group(1)
            out[module][1].extend(["", line])
        elif module is not None:
            out[module][1].append(line)
    return out


def report(rows: list[dict[str, object]], kept: dict[str, tuple[str, list[str]]] | None = None) -> str:
    parts = dict(kept or {})
    parts.update({r["module"]: rendered(r) for r in rows})
    order = [m for m in CORE if m in parts]
    out = HEADER + [parts[m][0] for m in order]
    for m in order:
        out += parts[m][1]
    return "\n".join(out).rstrip("\n") + "\n"


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--modules", default=",".join(CORE), help="comma-separated core modules (default: all)")
    ap.add_argument("--budget", type=float, default=150.0, help="seconds per module (default 150)")
    ap.add_argument("--jobs", type=int, default=2, help="mutants run at once (default 2)")
    ap.add_argument("--report", type=Path, default=REPORT)
    ap.add_argument("--update", action="store_true", help="keep the other modules' rows of the existing report")
    args = ap.parse_args()
    mutmut = shutil.which("mutmut", path=str(Path(sys.executable).parent)) or shutil.which("mutmut")
    if mutmut is None:
        print("mutmut is not installed: pip install -e '.[test,mutation]'", file=sys.stderr)
        return 2
    kept = previous(args.report) if args.update else {}
    rows = []
    for module in args.modules.split(","):
        module = next((m for m in CORE if m == module or m.endswith("/" + module)), module)
        print(f"{module} …", file=sys.stderr, flush=True)
        rows.append(run_module(module, args.budget, args.jobs, mutmut))
        args.report.write_text(report(rows, kept))
    print(report(rows, kept))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
