"""Importers: files written by pyuff's own writer (a reference library) read back through the UFF
importer; the dataset 58 layout; unit conversions; plain tables; bad files; same zones as a bundle
written directly."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import pyuff

from overlay.cli.main import main
from overlay.errors import BundleError
from overlay.importers import Imported, write_bundle
from overlay.importers.table import MatrixTableImporter, PointTableImporter
from overlay.importers.uff import UffImporter
from overlay.io.bundle import read_bundle
from overlay.io.site import read_site
from overlay.job import run_site

from .conftest import write_site

FS, N, S, G = 25600.0, 1024, 0.05, 15


def _synthetic() -> tuple[np.ndarray, np.ndarray]:
    """Node coordinates (m) and velocity records (m/s) of a 15 × 15 scan with one resonant patch."""
    rr, cc = np.mgrid[0:G, 0:G]
    xy = np.column_stack([cc.ravel() * S, rr.ravel() * S])
    t = np.arange(N) / FS
    amp = np.exp(-np.sum((xy - 0.35) ** 2, axis=1) / (2 * 0.08**2))
    rng = np.random.default_rng(4)
    rec = rng.normal(0, 1e-5, (G * G, N)) + (1 + 9 * amp)[:, None] * 1e-4 * np.sin(2 * np.pi * 1500.0 * t) * np.exp(-40 * t)
    return xy, rec


def _ds58(node: int, data: np.ndarray, inc: float, unit: str, func_type: int = 1) -> dict:
    """A dataset 58 through pyuff's own prepare_58 (every record field given; writer of the reference library)."""
    return pyuff.prepare_58(
        binary=0, id1="overlay test", id2="", id3="", id4="", id5="", func_type=func_type, ver_num=0, load_case_id=0,
        rsp_ent_name="pt", rsp_node=int(node), rsp_dir=3, ref_ent_name="NONE", ref_node=0, ref_dir=0,
        ord_data_type=4, num_pts=len(data), abscissa_spacing=1, abscissa_min=0.0, abscissa_inc=inc, z_axis_value=0.0,
        abscissa_spec_data_type=17 if func_type == 1 else 18, abscissa_len_unit_exp=0, abscissa_force_unit_exp=0,
        abscissa_temp_unit_exp=0, abscissa_axis_units_lab="s" if func_type == 1 else "Hz",
        ordinate_spec_data_type=11, ordinate_len_unit_exp=1, ordinate_force_unit_exp=0, ordinate_temp_unit_exp=0,
        ordinate_axis_units_lab=unit, orddenom_spec_data_type=0, orddenom_len_unit_exp=0, orddenom_force_unit_exp=0,
        orddenom_temp_unit_exp=0, orddenom_axis_units_lab="", z_axis_spec_data_type=0, z_axis_len_unit_exp=0,
        z_axis_force_unit_exp=0, z_axis_temp_unit_exp=0, z_axis_axis_units_lab="",
        data=np.asarray(data, dtype=float), x=inc * np.arange(len(data)))


def _write_uff(path: Path, xy: np.ndarray, rec: np.ndarray, *, nodes_set: int = 2411, unit: str = "mm/s",
               scale: float = 1000.0, skip: tuple[int, ...] = (), psd: bool = False, inc: float | None = None) -> None:
    n = len(xy)
    prep = pyuff.prepare_2411 if nodes_set == 2411 else pyuff.prepare_15
    sets = [prep(node_nums=np.arange(1, n + 1), def_cs=np.zeros(n, dtype=int), disp_cs=np.zeros(n, dtype=int),
                 color=np.ones(n, dtype=int), x=xy[:, 0].astype(float), y=xy[:, 1].astype(float), z=np.zeros(n))]
    for k in range(n):
        if k not in skip:
            sets.append(_ds58(k + 1, rec[k] * scale, inc or 1 / FS, unit, 9 if psd else 1))
    pyuff.UFF(str(path)).write_sets(sets, mode="overwrite")


def test_uff_written_by_pyuff_reads_back_exactly(tmp_path: Path) -> None:
    xy, rec = _synthetic()
    path = tmp_path / "scan.uff"
    _write_uff(path, xy, rec)  # velocities in mm/s, as many instruments export
    scan = UffImporter().read([path], {})
    np.testing.assert_allclose(scan.xy, xy, atol=1e-9)
    assert scan.sample_rate_hz == pytest.approx(FS, rel=1e-9)
    # mm/s → m/s: 1 mm/s = 1e-3 m/s (hand-worked); float precision of the ASCII file
    np.testing.assert_allclose(scan.records, rec, rtol=1e-5, atol=1e-12)
    assert scan.row is not None and scan.row.max() == G - 1 and scan.col.max() == G - 1
    assert any("m/s" in f for f in scan.found) and scan.valid.all()


def test_dataset_58_field_layout(tmp_path: Path) -> None:
    # Universal File Format, dataset 58 "Function at Nodal DOF" (I-DEAS universal file datasets
    # description; record/field positions as pyuff documents them, code values from memory):
    # R6 F1 function type (1 time response), R6 F6/F7 response node and direction (3 = Z),
    # R7 F1 ordinate data type (2 real single, 4 real double), R7 F2 number of values,
    # R7 F3 abscissa spacing (1 even), R7 F5 abscissa increment
    xy, rec = _synthetic()
    path = tmp_path / "scan.uff"
    _write_uff(path, xy[:1], rec[:1])
    lines = path.read_text().splitlines()
    start = next(i for i, line in enumerate(lines) if line.strip() == "58")
    r6 = lines[start + 6].split()
    r7 = lines[start + 7].split()
    assert int(r6[0]) == 1 and int(r6[5]) == 1 and int(r6[6]) == 3
    assert int(r7[0]) in (2, 4) and int(r7[1]) == N and int(r7[2]) == 1
    assert float(r7[4]) == pytest.approx(1 / FS, rel=1e-6)
    got = pyuff.UFF(str(path)).read_sets()[1]
    assert got["func_type"] == 1 and got["rsp_dir"] == 3 and got["abscissa_inc"] == pytest.approx(1 / FS, rel=1e-6)


def test_dataset_15_nodes_and_missing_records_become_invalid(tmp_path: Path) -> None:
    xy, rec = _synthetic()
    path = tmp_path / "scan.uff"
    _write_uff(path, xy, rec, nodes_set=15, unit="m/s", scale=1.0, skip=(3, 40))
    scan = UffImporter().read([path], {})
    assert (~scan.valid).sum() == 2 and not scan.valid[3] and not scan.valid[40]
    assert any("without function data: marked invalid" in f for f in scan.found)


def test_psd_unit_squared(tmp_path: Path) -> None:
    # a PSD in (mm/s)²/Hz: 1 (mm/s)²/Hz = 1e-6 (m/s)²/Hz (hand-worked)
    xy, _ = _synthetic()
    psd = np.full((len(xy), 101), 2.0)
    path = tmp_path / "psd.uff"
    _write_uff(path, xy, psd, unit="(mm/s)^2/Hz", scale=1.0, psd=True, inc=100.0)
    scan = UffImporter().read([path], {})
    assert scan.spectra is not None and np.allclose(scan.spectra, 2e-6)
    assert scan.frequencies[1] - scan.frequencies[0] == pytest.approx(100.0)


def test_uff_import_runs_to_the_same_zones_as_the_direct_bundle(tmp_path: Path) -> None:
    xy, rec = _synthetic()
    path = tmp_path / "scan.uff"
    _write_uff(path, xy, rec)
    direct = Imported(scan_id="scan", ids=[f"N{k + 1}" for k in range(len(xy))], xy=xy, valid=np.ones(len(xy), bool),
                      row=np.repeat(np.arange(G), G), col=np.tile(np.arange(G), G), records=rec.astype(np.float32),
                      sample_rate_hz=FS, band_hz=(400.0, 8000.0), gate_s=(0.0, N / FS))
    write_bundle(direct, tmp_path / "direct")
    assert main(["import", "uff", str(path), "--out", str(tmp_path / "imported")]) == 0
    for folder in ("direct", "imported"):
        toml = tmp_path / folder / "scan.toml"
        toml.write_text(toml.read_text() + '\n[[targets]]\nname = "A"\nscanner = [0.0, 0.0]\ndrawing = [0.0, 0.0]\n'
                        '[[targets]]\nname = "B"\nscanner = [0.7, 0.0]\ndrawing = [0.7, 0.0]\n')
    a = run_site(read_site(write_site(tmp_path, ["direct"])))
    b = run_site(read_site(write_site(tmp_path, ["imported"])))
    assert len(a.zones) == len(b.zones) > 0
    for za, zb in zip(a.zones, b.zones):
        assert za.class_name == zb.class_name
        assert za.area_m2 == pytest.approx(zb.area_m2, rel=1e-4)
        assert za.peak_hz == pytest.approx(zb.peak_hz, rel=1e-5)


@pytest.mark.parametrize("damage, fragment", [
    ("mixed", "mixed ordinate units"),
    ("spacing", "inconsistent abscissa"),
    ("duplicate", "defined twice"),
    ("nan", "non-finite values in the record of node 5"),
])
def test_bad_uff_files_exit_3_and_write_no_bundle(tmp_path: Path, capsys: pytest.CaptureFixture, damage: str, fragment: str) -> None:
    xy, rec = _synthetic()
    xy, rec = xy[:20], rec[:20].copy()
    path = tmp_path / "bad.uff"
    if damage == "nan":
        rec[4, 10] = 12.345678  # a sentinel, turned into NaN in the file text below (pyuff's writer writes 0 for NaN)
    _write_uff(path, xy, rec)
    if damage == "nan":
        text = path.read_text()
        assert text.count("1.23456780000e+04") == 1
        path.write_text(text.replace("1.23456780000e+04", "              NaN"))
    uff = pyuff.UFF(str(path))
    sets = uff.read_sets()
    if damage == "mixed":
        sets[3]["ordinate_axis_units_lab"] = "m/s"
    elif damage == "spacing":
        sets[3]["abscissa_inc"] = 2 / FS
        sets[3]["x"] = np.arange(len(sets[3]["data"])) * 2 / FS
    elif damage == "duplicate":
        sets[0]["node_nums"][1] = sets[0]["node_nums"][0]
    if damage != "nan":
        pyuff.UFF(str(path)).write_sets(sets, mode="overwrite")
    out = tmp_path / "bundle"
    assert main(["import", "uff", str(path), "--out", str(out)]) == 3
    err = capsys.readouterr().err
    assert fragment in err and len(err.strip().splitlines()) == 1
    assert not out.exists()
    if damage == "nan":  # asked for, the good part imports and the drop is reported
        assert main(["import", "uff", str(path), "--out", str(out), "--allow-partial"]) == 0
        assert "dropped: 1 record(s): node 5: non-finite values" in capsys.readouterr().out
        assert read_bundle(out).valid.sum() == 19


def test_point_table_with_mapping_and_energy(tmp_path: Path) -> None:
    csv_path = tmp_path / "pts.csv"
    rows = ["PointID,X_mm,Y_mm,E"] + [f"p{k},{50 * (k % 5)},{50 * (k // 5)},{1.0 if k != 12 else 100.0}" for k in range(25)]
    csv_path.write_text("\n".join(rows) + "\n")
    scan = PointTableImporter().read([csv_path], {"columns": {"id": "PointID", "x": "X_mm", "y": "Y_mm", "energy": "E"},
                                                  "length_unit": "mm"})
    # energy 100 against a reference of 1 (the 10th percentile): 20 dB (hand-worked)
    assert scan.ver_db[12] == pytest.approx(20.0) and scan.xy[6] == pytest.approx([0.05, 0.05])
    with pytest.raises(BundleError, match="no column mapped to 'y'"):
        PointTableImporter().read([csv_path], {"columns": {"id": "PointID", "x": "X_mm", "energy": "E"}})
    with pytest.raises(BundleError, match="column 'Z' .* not in the header"):
        PointTableImporter().read([csv_path], {"columns": {"id": "PointID", "x": "X_mm", "y": "Z", "energy": "E"}})


def test_ver_matrix(tmp_path: Path) -> None:
    path = tmp_path / "m.csv"
    path.write_text("0,1,2\n3,4,5\n")
    scan = MatrixTableImporter().read([path], {"spacing": 0.1, "origin": (10.0, 20.0)})
    assert scan.ver_db.tolist() == [0, 1, 2, 3, 4, 5]
    assert scan.xy[5] == pytest.approx([10.2, 20.1])
    write_bundle(scan, tmp_path / "b")
    assert read_bundle(tmp_path / "b").payload == "ver"
    path.write_text("0,1\n3\n")
    with pytest.raises(BundleError, match="line 2: has 1 values, the first row has 2"):
        MatrixTableImporter().read([path], {"spacing": 0.1})


def test_curvilinear_grid_recovered_from_a_declared_shape(tmp_path: Path) -> None:
    # nodes on a gently curved lining (rows bend): not a regular grid, so no row/col by themselves;
    # with --grid-shape the node-number order fills the rows, and the check accepts it
    rr, cc = np.mgrid[0:6, 0:8]
    u = cc.ravel() * 0.1
    xy = np.column_stack([u, rr.ravel() * 0.1 + 0.05 * np.sin(3 * u)])
    rec = np.random.default_rng(1).normal(0, 1e-4, (len(xy), 256))
    path = tmp_path / "curved.uff"
    _write_uff(path, xy, rec, unit="m/s", scale=1.0)
    plain = UffImporter().read([path], {})
    assert plain.row is None
    shaped = UffImporter().read([path], {"grid_shape": (6, 8)})
    assert shaped.row.tolist() == rr.ravel().tolist() and shaped.col.tolist() == cc.ravel().tolist()
    with pytest.raises(BundleError, match="do not form a 8 x 6 grid"):
        UffImporter().read([path], {"grid_shape": (8, 6)})


def test_each_importer_brings_its_own_options_to_the_command_line(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    from overlay.cli.main import main

    assert main(["import", "uff", "--help"]) == 0
    out = capsys.readouterr().out
    assert "--grid-shape" in out and "--direction" in out and "--map" not in out and "--out" in out
    assert main(["import", "point-table", "--help"]) == 0
    out = capsys.readouterr().out
    assert "--map" in out and "--mapping" in out and "--grid-shape" not in out
    csv_path = tmp_path / "pts.csv"
    rows = ["PointID,X_mm,Y_mm,E"] + [f"p{k},{50 * (k % 5)},{50 * (k // 5)},{1.0 if k != 12 else 100.0}" for k in range(25)]
    csv_path.write_text("\n".join(rows) + "\n")
    mapping = tmp_path / "map.toml"
    mapping.write_text('[columns]\nid = "PointID"\nx = "X_mm"\ny = "Y_mm"\n')
    assert main(["import", "point-table", str(csv_path), "--out", str(tmp_path / "b"), "--mapping", str(mapping),
                 "--map", "energy=E", "--length-unit", "mm"]) == 0
    assert read_bundle(tmp_path / "b").ver_db[12] == pytest.approx(20.0)  # hand-worked as above
    assert main(["import", "point-table", str(csv_path), "--out", str(tmp_path / "c"), "--map", "energy"]) == 2
    assert "--map wants KEY=COLUMN" in capsys.readouterr().err
    assert main(["import", "ver-matrix", "--help"]) == 0
    assert "--spacing" in capsys.readouterr().out
