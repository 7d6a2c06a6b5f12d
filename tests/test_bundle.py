"""Bundle reader against the scan-bundle/1 contract (docs/scan-bundle.md): good bundles and every bad case."""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pytest

from overlay.errors import BundleError, BundleWarning
from overlay.io.bundle import read_bundle

from .conftest import write_bundle


def test_records_bundle_is_read_memory_mapped(bundle: Path) -> None:
    scan = read_bundle(bundle)
    assert scan.scan_id == "S-T1" and scan.element == "EL-1"
    assert scan.payload == "records"
    assert isinstance(scan.records, np.memmap)
    assert scan.records.shape == (48, 1024)
    assert scan.n_points == 48 and scan.has_grid
    assert scan.band_hz == (400.0, 8000.0)
    assert [t.name for t in scan.targets] == ["A", "B", "C", "D"]
    assert scan.targets[1].scanner == pytest.approx((0.7, 0.0))


def test_spectra_and_ready_ver_bundles(tmp_path: Path) -> None:
    s = read_bundle(write_bundle(tmp_path / "a", payload="spectra"))
    assert s.payload == "spectra" and s.spectra.shape == (48, 501)
    ver = np.linspace(0, 20, 48)
    v = read_bundle(write_bundle(tmp_path / "b", payload="ver", ver=ver, points_header="id,row,col,x,y,ver_db",
                                 manifest_extra=""))
    assert v.payload == "ver"
    np.testing.assert_allclose(v.ver_db, ver, atol=1e-4)


def test_millimetre_coordinates_are_converted(tmp_path: Path) -> None:
    folder = write_bundle(tmp_path / "mm", spacing=100.0)
    text = (folder / "scan.toml").read_text().replace('unit = "m"', 'unit = "mm"')
    (folder / "scan.toml").write_text(text)
    scan = read_bundle(folder)
    assert scan.xy[:, 0].max() == pytest.approx(0.7)  # 700 mm
    assert scan.targets[2].scanner == pytest.approx((0.7, 0.5))


def _expect(folder: Path, *fragments: str) -> BundleError:
    with pytest.raises(BundleError) as info:
        read_bundle(folder)
    msg = str(info.value)
    for f in fragments:
        assert f in msg, msg
    assert info.value.exit_code == 3
    assert "\n" not in msg
    return info.value


def test_missing_manifest(bundle: Path) -> None:
    (bundle / "scan.toml").unlink()
    _expect(bundle, "scan.toml", "file not found")


def test_missing_points(bundle: Path) -> None:
    (bundle / "points.csv").unlink()
    _expect(bundle, "points.csv", "file not found")


def test_missing_folder(tmp_path: Path) -> None:
    _expect(tmp_path / "nope", "nope", "folder not found")


def test_wrong_shape(tmp_path: Path) -> None:
    folder = write_bundle(tmp_path / "s", records=np.zeros((48,), dtype=np.float32))
    _expect(folder, "records.npy", "shape must be")


def test_wrong_dtype(tmp_path: Path) -> None:
    folder = write_bundle(tmp_path / "d", records=np.zeros((48, 1024), dtype=np.int16))
    _expect(folder, "records.npy", "dtype must be float32 or float64", "int16")


def test_count_mismatch(tmp_path: Path) -> None:
    folder = write_bundle(tmp_path / "c", records=np.zeros((47, 1024), dtype=np.float32))
    _expect(folder, "records.npy", "47 points", "points.csv has 48")


def test_duplicate_ids(bundle: Path) -> None:
    text = (bundle / "points.csv").read_text().replace("P5,", "P4,", 1)
    (bundle / "points.csv").write_text(text)
    _expect(bundle, "points.csv", "line 7", "duplicate point id 'P4'", "first on line 6")


def test_unknown_kind(bundle: Path) -> None:
    text = (bundle / "scan.toml").read_text().replace('kind = "surface"', 'kind = "polar"')
    (bundle / "scan.toml").write_text(text)
    _expect(bundle, "scan.toml", "coordinates.kind", "'polar'")


def test_unknown_format(bundle: Path) -> None:
    text = (bundle / "scan.toml").read_text().replace("scan-bundle/1", "scan-bundle/9")
    (bundle / "scan.toml").write_text(text)
    _expect(bundle, "format", "scan-bundle/9")


def test_bad_scan_id(bundle: Path) -> None:
    text = (bundle / "scan.toml").read_text().replace('id = "S-T1"', 'id = "S T1/x"')
    (bundle / "scan.toml").write_text(text)
    _expect(bundle, "scan.id", "[A-Za-z0-9._-]+")


def test_toml_syntax_error_names_file(bundle: Path) -> None:
    (bundle / "scan.toml").write_text('format = "scan-bundle/1"\n[scan\n')
    _expect(bundle, "scan.toml", "not valid TOML", "line 2")


def test_not_a_number_names_line_and_column(bundle: Path) -> None:
    lines = (bundle / "points.csv").read_text().splitlines()
    assert lines[3] == "P2,0,2,0.2,0.0,1"
    lines[3] = "P2,0,2,abc,0.0,1"
    (bundle / "points.csv").write_text("\n".join(lines) + "\n")
    _expect(bundle, "points.csv", "line 4", "column x", "'abc'")


def test_missing_coordinate_column(tmp_path: Path) -> None:
    folder = write_bundle(tmp_path / "m", points_header="id,row,col,x,valid")
    _expect(folder, "points.csv", "required column 'y'")


def test_two_payloads_are_refused(bundle: Path) -> None:
    np.save(bundle / "spectra.npy", np.zeros((48, 10)))
    _expect(bundle, "more than one payload", "records.npy", "spectra.npy")


def test_no_payload(bundle: Path) -> None:
    (bundle / "records.npy").unlink()
    _expect(bundle, "no payload")


def test_band_above_nyquist(bundle: Path) -> None:
    text = (bundle / "scan.toml").read_text().replace("hz = [400.0, 8000.0]", "hz = [400.0, 20000.0]")
    (bundle / "scan.toml").write_text(text)
    _expect(bundle, "band.hz", "Nyquist")


def test_missing_records_table(bundle: Path) -> None:
    text = (bundle / "scan.toml").read_text()
    text = text[: text.index("[records]")] + text[text.index("[band]") :]
    (bundle / "scan.toml").write_text(text)
    _expect(bundle, "records", "required when records.npy is present")


def test_spectra_frequencies_must_increase(tmp_path: Path) -> None:
    folder = write_bundle(tmp_path / "f", payload="spectra")
    f = np.linspace(0, 10000, 501)
    f[10] = f[9]
    np.save(folder / "frequencies.npy", f)
    _expect(folder, "frequencies.npy", "strictly increasing")


def test_truncated_npy(bundle: Path) -> None:
    data = (bundle / "records.npy").read_bytes()
    (bundle / "records.npy").write_bytes(data[:200])
    _expect(bundle, "records.npy", "not a readable .npy")


def test_duplicate_grid_cell(bundle: Path) -> None:
    text = (bundle / "points.csv").read_text().replace("P1,0,1,", "P1,0,0,", 1)
    (bundle / "points.csv").write_text(text)
    _expect(bundle, "points.csv", "grid cell (0, 0) used twice")


def test_nan_ver_points_become_invalid_not_fatal(tmp_path: Path) -> None:
    ver = np.linspace(0, 20, 48)
    ver[5] = np.nan
    folder = write_bundle(tmp_path / "n", payload="ver", ver=ver, points_header="id,row,col,x,y,ver_db")
    with pytest.warns(BundleWarning, match="marked invalid"):
        scan = read_bundle(folder)
    assert not scan.valid[5] and scan.valid.sum() == 47


@pytest.mark.parametrize("old, new, field, hint", [
    ('element = "EL-1"', 'element = "EL-1"\noperator = "x"', "scan.operator", "known here"),
    ('element = "EL-1"', 'elemnt = "EL-1"', "scan.elemnt", "did you mean 'element'"),
    ("sample_rate_hz", "sample_rate", "records.sample_rate_hz", "the file has 'records.sample_rate': misspelt"),
    ("[band]", "[bands]", "band", "the file has 'bands': misspelt"),
])
def test_unknown_fields_are_errors_with_the_nearest_name(bundle: Path, old: str, new: str, field: str, hint: str) -> None:
    # a misspelt field would silently fall back to a default and change a number: refused (exit 3)
    text = (bundle / "scan.toml").read_text().replace(old, new, 1)
    (bundle / "scan.toml").write_text(text)
    with pytest.raises(BundleError, match=f"{field}: .*{hint}") as info:
        read_bundle(bundle)
    assert info.value.exit_code == 3


def test_clean_bundle_gives_no_warning(bundle: Path) -> None:
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        read_bundle(bundle)


def test_a_target_beyond_the_documented_range_is_refused(bundle: Path) -> None:
    # the points' range (|x|, |y| ≤ 1e6 m, docs/scan-bundle.md) holds for the targets too: a target at 1e308
    # reached the fit as inf before
    import re

    text = (bundle / "scan.toml").read_text()
    text = re.sub(r"scanner = \[[^\]]*\]", "scanner = [1e308, 0.0]", text, count=1)
    (bundle / "scan.toml").write_text(text)
    with pytest.raises(BundleError, match=r"targets\[0\]\.scanner: coordinate beyond 1e\+06") as info:
        read_bundle(bundle)
    assert info.value.exit_code == 3
