"""Site file reading: defaults, and clear one-line errors for bad fields."""

from __future__ import annotations

from pathlib import Path

import pytest

from overlay.errors import SiteFileError
from overlay.io.site import read_site

from .conftest import write_bundle, write_site


def test_defaults_and_glob(tmp_path: Path) -> None:
    write_bundle(tmp_path / "scans" / "S-1")
    write_bundle(tmp_path / "scans" / "S-2")
    site = read_site(write_site(tmp_path, ["scans/S-*"]))
    assert [e.bundle.name for e in site.scans] == ["S-1", "S-2"]
    assert [c.name for c in site.zones.classes] == ["watch", "suspect", "probable"]
    assert site.energy.reference == "auto" and site.energy.percentile == 10
    assert site.map is None


@pytest.mark.parametrize(
    "extra, fragment",
    [
        ('\n[zones]\n[[zones.classes]]\nname = "a"\nthreshold_db = 9\n[[zones.classes]]\nname = "b"\nthreshold_db = 6\n',
         "thresholds must rise"),
        ('\n[energy]\nreference = "mean"\n', "energy.reference: must be one of"),
        ('\n[map]\ncrs = "EPSG:25832"\n', "map.origin: give either origin"),
        ('\n[outputs]\nbasename = "../x"\n', "outputs.basename"),
        ('\n[alignment]\npoints = [[0, 0]]\n', "alignment.points: must be a polyline: a list of at least 2 [x, y] pairs"),
        ('\n[dxf]\nbase = "nope.dxf"\n', "dxf.base: file not found"),
        ('\n[dxf]\ncolours = { watch = 300 }\n', "dxf.colours"),
        ('\n[merge]\nfindings_layer = "x"\n', "merge: needs [elements]"),
        ('\n[concrete]\nfc_mpa = 30\nmodulus_gpa = 30\n', "give modulus_gpa or fc_mpa"),
        ('\n[repair]\nfootprint = "round"\n', "repair.footprint: must be one of"),
        ('\n[repair]\nmargin_m = 150\n', "repair.margin_m: must be at most 2"),  # millimetres given as metres
        ('\n[elements]\ndatabase = "host=x password=y"\nlayer = "a"\n', "elements.database: holds a password"),
        ('\n[elements]\nsource = "a.gpkg"\ndatabase = "host=x"\n', "not both"),
        ('\n[quality]\nmin_signal_level = 2\n', "quality.min_signal_level: must lie in 0..1"),
    ],
)
def test_bad_fields(tmp_path: Path, extra: str, fragment: str) -> None:
    write_bundle(tmp_path / "S-1")
    with pytest.raises(SiteFileError) as info:
        read_site(write_site(tmp_path, ["S-1"], extra=extra))
    assert fragment in str(info.value) and "site.toml" in str(info.value)
    assert info.value.exit_code == 3


def test_each_table_is_one_frozen_spec(tmp_path: Path) -> None:
    # every table of the file lands in its own spec; nothing can change a setting in place, and the
    # command line's override makes a new value (the file's own reading is kept)
    import argparse
    import dataclasses

    from overlay.cli.common import read_site_as_told

    write_bundle(tmp_path / "S-1")
    extra = ('\n[energy]\npercentile = 20\nincidence_correction = false\n[quality]\nmin_snr_db = 6\n'
             '[repair]\nmargin_m = 0.1\nbasis = "contour"\n[outputs]\nbasename = "deck"\nformats = ["dxf"]\n')
    path = write_site(tmp_path, ["S-1"], extra)
    site = read_site(path)
    assert (site.energy.percentile, site.energy.incidence_correction, site.quality.min_snr_db) == (20, False, 6)
    assert (site.repair.margin_m, site.repair.basis, site.outputs.basename, site.outputs.formats) == (
        0.1, "contour", "deck", ("dxf",))
    assert site.registration.tolerance_m == 0.01 and not site.registration.accept_misfit
    for spec in (site, site.registration, site.energy, site.quality, site.zones, site.repair, site.outputs):
        field = dataclasses.fields(spec)[0].name
        with pytest.raises(dataclasses.FrozenInstanceError):
            setattr(spec, field, None)
    told = read_site_as_told(path, argparse.Namespace(accept_misfit=True))
    assert told.registration.accept_misfit and told.registration.tolerance_m == 0.01
    assert told.energy == site.energy and not read_site(path).registration.accept_misfit


def test_glob_matching_nothing(tmp_path: Path) -> None:
    with pytest.raises(SiteFileError, match=r"scans\[0\].bundle: pattern 'nothing/\*' matches no folder"):
        read_site(write_site(tmp_path, ["nothing/*"]))


def test_the_documented_site_file_example_reads(demo: dict, tmp_path: Path) -> None:
    # docs/site-file.md shows a full site file; it must stay true to the reader
    import re
    import shutil

    doc = (Path(__file__).resolve().parents[1] / "docs" / "site-file.md").read_text()
    example = re.search(r"```toml\n(.*?)```", doc, re.S).group(1)
    shutil.copytree(demo["root"] / "site", tmp_path / "site")
    path = tmp_path / "site" / "documented.toml"
    path.write_text(example)
    import warnings as _w

    with _w.catch_warnings():
        _w.simplefilter("error")  # no unknown field in the documented example
        site = read_site(path)
    assert site.name == "Kestrel Lane Overpass" and site.map is not None and site.alignment is not None
    assert [c.name for c in site.zones.classes] == ["watch", "suspect", "probable"]
    assert site.dxf.base is not None and site.merge is not None and site.elements is not None


@pytest.mark.parametrize("line, field, fragment", [
    ("text_height_m = 0.06", "dxf.text_height_m", "use label_height_mm and note_height_mm"),
    ("label_height_mm = 1.0", "dxf.label_height_mm", "does not stay legible"),  # ISO 3098-1 minimum (from memory)
    ("plot_scale = 0", "dxf.plot_scale", "whole number N for 1:N"),
    ('sheet = "A5"', "dxf.sheet", "must be one of 'A0', 'A1', 'A2', 'A3', 'A4'"),
])
def test_dxf_sheet_fields_are_checked(tmp_path: Path, line: str, field: str, fragment: str) -> None:
    write_bundle(tmp_path / "S-1")
    site = write_site(tmp_path, ["S-1"], extra=f"\n[dxf]\n{line}\n")
    with pytest.raises(SiteFileError, match=f"{field}: .*{fragment}"):
        read_site(site)
