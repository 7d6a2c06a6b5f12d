"""A property-based fuzzer over site files and bundles: fields dropped, mistyped, out of range or
renamed, tables renamed, CSV cells damaged, files truncated.  Whatever the damage, the tool answers
with a documented exit code — 0 done, 3 bad input, 4 registration or CRS, 5 output conflict — never
1 (an unexpected error), and a run that fails writes nothing.  A longer search than CI's 300 cases:
``OVERLAY_FUZZ_EXAMPLES=5000 python -m pytest tests/test_fuzz.py``."""

from __future__ import annotations

import datetime as dt
import json
import math
import os
import shutil
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from overlay.cli.main import main
from overlay.io.tomlio import tomllib

from .conftest import write_bundle, write_site

SITE_EXTRA = ('\n[map]\ncrs = "EPSG:25832"\norigin = [500000.0, 5700000.0]\nbearing_deg = 90.0\n'
              "\n[energy]\nreference = \"percentile\"\npercentile = 10\n"
              "\n[repair]\nmargin_m = 0.15\n\n[zones]\nmin_area_m2 = 0.01\n")


def _value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return "nan" if math.isnan(v) else ("inf" if v == math.inf else "-inf" if v == -math.inf else repr(v))
    if isinstance(v, (int, dt.datetime, dt.date)):
        return v.isoformat() if isinstance(v, (dt.datetime, dt.date)) else str(v)
    if isinstance(v, str):  # JSON's escapes (\uXXXX, \n, \") are TOML's too; TOML also refuses a raw DEL
        return json.dumps(v, ensure_ascii=False).replace("\x7f", "\\u007f")
    if isinstance(v, list):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{_value(str(k))} = {_value(x)}" for k, x in v.items()) + "}"
    raise TypeError(type(v))


def dump_toml(doc: dict[str, Any], prefix: str = "") -> str:
    """A small TOML writer for what site files and manifests hold (tables, arrays of tables, values)."""
    plain = {k: v for k, v in doc.items() if not _is_table(v) and not _is_table_array(v)}
    out = "".join(f"{json.dumps(k)} = {_value(v)}\n" for k, v in plain.items())
    for k, v in doc.items():
        name = f"{prefix}.{json.dumps(k)}" if prefix else json.dumps(k)
        if _is_table(v):
            out += f"\n[{name}]\n" + dump_toml(v, name)
        elif _is_table_array(v):
            for item in v:
                out += f"\n[[{name}]]\n" + dump_toml(item, name)
    return out


def _is_table(v: Any) -> bool:
    return isinstance(v, dict)


def _is_table_array(v: Any) -> bool:
    return isinstance(v, list) and bool(v) and all(isinstance(x, dict) for x in v)


def _paths(doc: Any, here: tuple = ()) -> list[tuple]:
    """Every key path of a parsed TOML document (tables, keys, items of arrays of tables)."""
    found = []
    if isinstance(doc, dict):
        for k, v in doc.items():
            found.append(here + (k,))
            found += _paths(v, here + (k,))
    elif _is_table_array(doc):
        for i, item in enumerate(doc):
            found += _paths(item, here + (i,))
    return found


WEIRD = st.one_of(st.integers(-10**12, 10**12), st.floats(allow_nan=True, allow_infinity=True), st.booleans(),
                  st.text(max_size=12), st.lists(st.floats(-1e6, 1e6), max_size=3), st.just({"x": 1}),
                  st.just(1e308), st.just(-1.0), st.just(0), st.just([0.0, 0.0]), st.just(dt.date(1, 1, 1)))

TOML_EDIT = st.tuples(st.sampled_from(["drop", "retype", "rename", "scale", "scale"]), st.integers(0, 10**6), WEIRD)
FACTORS = (-1.0, 0.0, 1e-6, 0.5, 1.01, 10.0, 1e3, 1e6)
CSV_EDIT = st.tuples(st.sampled_from(["cell", "truncate", "drop_column", "duplicate_line", "blank"]),
                     st.integers(0, 10**6), st.text(alphabet="0123456789.-eE,\"x ", max_size=8))


def _edit_toml(path: Path, edit: tuple) -> None:
    op, k, value = edit
    doc = tomllib.loads(path.read_text())
    paths = _paths(doc)
    where = paths[k % len(paths)]
    parent = doc
    for step in where[:-1]:
        parent = parent[step]
    key = where[-1]
    if op == "drop":
        del parent[key]
    elif op == "retype":
        parent[key] = value
    elif op == "scale":  # the same type, another size: numbers (and lists of numbers) scaled or flipped
        f = FACTORS[k % len(FACTORS)]
        v = parent[key]
        if isinstance(v, (int, float)) and not isinstance(v, bool):
            parent[key] = type(v)(v * f) if isinstance(v, float) or f == int(f) else v * f
        elif isinstance(v, list) and all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in v):
            parent[key] = [x * f for x in v]
    else:
        parent[f"{key}x" if isinstance(key, str) else key] = parent.pop(key) if isinstance(key, str) else parent[key]
    path.write_text(dump_toml(doc))


def _edit_csv(path: Path, edit: tuple) -> None:
    op, k, text = edit
    lines = path.read_text().splitlines()
    if op == "truncate":
        raw = path.read_bytes()
        path.write_bytes(raw[: k % max(len(raw), 1)])
        return
    r = 1 + k % (len(lines) - 1)
    cells = lines[r].split(",")
    if op == "cell":
        cells[k % len(cells)] = text
        lines[r] = ",".join(cells)
    elif op == "drop_column":
        c = k % len(cells)
        lines = [",".join(x for i, x in enumerate(line.split(",")) if i != c) for line in lines]
    elif op == "duplicate_line":
        lines.insert(r, lines[r])
    else:
        lines[r] = ""
    path.write_text("\n".join(lines) + "\n")


def _edit_npy(path: Path, k: int) -> None:
    raw = path.read_bytes()
    path.write_bytes(raw[: k % len(raw)] if k % 2 else raw + b"\0" * (1 + k % 64))


@pytest.fixture(scope="module")
def pristine(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("fuzz")
    rr, cc = np.mgrid[0:11, 0:11]
    ver = (20.0 - 800.0 * (((cc - 5) * 0.05) ** 2 + ((rr - 5) * 0.05) ** 2)).ravel()
    write_bundle(root / "S-1", n_rows=11, n_cols=11, spacing=0.05, payload="ver", ver=ver,
                 points_header="id,row,col,x,y,ver_db")
    write_bundle(root / "S-2", n_samples=256, scan_id="S-T2")
    write_site(root, ["S-1", "S-2"], extra=SITE_EXTRA)
    assert main(["run", str(root / "site.toml"), "--out", str(root.parent / "fuzz-clean"), "--no-pictures",
                 "--no-cache", "-q"]) == 0  # the undamaged case runs
    return root


@settings(max_examples=int(os.environ.get("OVERLAY_FUZZ_EXAMPLES", "300")), deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(target=st.sampled_from(["site.toml", "S-1/scan.toml", "S-2/scan.toml", "S-1/points.csv", "S-2/points.csv",
                               "S-2/records.npy"]),
       toml_edit=TOML_EDIT, csv_edit=CSV_EDIT, npy_k=st.integers(1, 10**6), second=st.booleans())
def test_damaged_input_gets_a_documented_exit_code_and_no_output(pristine: Path, tmp_path_factory, target: str,
                                                                 toml_edit: tuple, csv_edit: tuple, npy_k: int,
                                                                 second: bool, capsys: pytest.CaptureFixture) -> None:
    work = tmp_path_factory.mktemp("case")
    shutil.copytree(pristine, work / "site")
    path = work / "site" / target
    for _ in range(2 if second else 1):
        if path.suffix == ".toml":
            _edit_toml(path, toml_edit)
        elif path.suffix == ".csv":
            _edit_csv(path, csv_edit)
        else:
            _edit_npy(path, npy_k)
    out = work / "out"
    code = main(["run", str(work / "site" / "site.toml"), "--out", str(out), "--no-pictures", "--no-cache", "--strict"])
    err = capsys.readouterr().err
    event(f"exit {code}")
    assert code in (0, 3, 4, 5), err
    assert "unexpected error" not in err and "Traceback" not in err, err
    if code != 0:
        assert not out.exists() or not any(out.rglob("*")), f"a failed run (exit {code}) wrote {list(out.rglob('*'))}"
