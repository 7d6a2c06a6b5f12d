"""GeoPackages as GIS clients meet them: GDAL's own validator, the owner's GeoPackage version kept,
real DATETIME and BOOLEAN types, one finding per defect, default styles a desktop GIS applies, and
a Shapefile export that launders nothing silently.

Outside references: OGC GeoPackage Encoding Standard 12-128r18 (requirement numbers as GDAL's
validator reports them; §1.1.1 application_id and user_version; Table 1 data types DATETIME and
BOOLEAN); GDAL's `validate_gpkg` (Debian python3-gdal) and `ogrinfo` (gdal-bin) as independent
readers; QGIS (Debian python3-qgis) as the desktop client.  Each check is skipped, with the reason,
where the client is not installed; `.ci/run` installs them best effort.
"""

from __future__ import annotations

import csv
import dataclasses
import io
import json
import shutil
import sqlite3
import subprocess
import zipfile
from pathlib import Path

import geopandas as gpd
import pyogrio
import pytest
import shapely

from overlay.assets.merge import merge_findings
from overlay.outputs import palette
from overlay.outputs.write import write_outputs
from overlay.quantities import defects

SYSTEM_PYTHON = "/usr/bin/python3"


def _system_module(name: str) -> bool:
    if not Path(SYSTEM_PYTHON).exists():
        return False
    return subprocess.run([SYSTEM_PYTHON, "-c", f"import {name}"], capture_output=True).returncode == 0


HAS_VALIDATOR = _system_module("osgeo_utils.samples.validate_gpkg")
HAS_QGIS = _system_module("qgis.core")
HAS_OGRINFO = shutil.which("ogrinfo") is not None
needs_validator = pytest.mark.skipif(not HAS_VALIDATOR, reason="GDAL's validator (Debian python3-gdal) not installed")
needs_qgis = pytest.mark.skipif(not HAS_QGIS, reason="QGIS (Debian python3-qgis) not installed")
needs_ogrinfo = pytest.mark.skipif(not HAS_OGRINFO, reason="GDAL command-line tools (Debian gdal-bin) not installed")


def validate(path: Path) -> str:
    """GDAL's GeoPackage validator: '' when the file passes, else its last line."""
    done = subprocess.run([SYSTEM_PYTHON, "-m", "osgeo_utils.samples.validate_gpkg", str(path)],
                          capture_output=True, text=True, timeout=120)
    return "" if done.returncode == 0 else (done.stderr or done.stdout).strip().splitlines()[-1]


def ogr_fields(path: Path, layer: str) -> dict[str, str]:
    done = subprocess.run(["ogrinfo", "-so", str(path), layer], capture_output=True, text=True, check=True)
    out = {}
    for line in done.stdout.splitlines():
        if ": " in line and "(" in line and not line.startswith(("Layer", "Geometry", "Extent", "FID")):
            name, kind = line.split(": ", 1)
            out[name.strip()] = kind.split(" (")[0]
    return out


QGIS_PROBE = r"""
import json, os, sys
os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
from qgis.core import QgsApplication, QgsVectorLayer
app = QgsApplication([], False); app.initQgis()
out = {}
for name in sys.argv[2:]:
    lyr = QgsVectorLayer(f"{sys.argv[1]}|layername={name}", name, "ogr")
    r = lyr.renderer()
    info = {"valid": lyr.isValid(), "renderer": r.type()}
    if r.type() == "categorizedSymbol":
        info["attr"] = r.classAttribute()
        info["categories"] = {str(c.value()): c.symbol().color().name() for c in r.categories()}
    info["aliases"] = {f.name(): lyr.attributeAlias(i) for i, f in enumerate(lyr.fields()) if lyr.attributeAlias(i)}
    out[name] = info
print(json.dumps(out)); sys.stdout.flush(); os._exit(0)
"""


def qgis_layers(path: Path, *layers: str) -> dict:
    done = subprocess.run([SYSTEM_PYTHON, "-c", QGIS_PROBE, str(path), *layers], capture_output=True, text=True,
                          timeout=180, env={"QT_QPA_PLATFORM": "offscreen", "PATH": "/usr/bin:/bin",
                                            "XDG_RUNTIME_DIR": "/tmp", "HOME": "/tmp"})
    return json.loads(done.stdout.strip().splitlines()[-1])


@pytest.fixture(scope="module")
def written(demo: dict, tmp_path_factory: pytest.TempPathFactory) -> dict:
    out = tmp_path_factory.mktemp("gis")
    site = dataclasses.replace(demo["result"].site, outputs=dataclasses.replace(
        demo["result"].site.outputs, formats=("dxf", "gpkg", "quantities-csv", "shapefile")))
    result = dataclasses.replace(demo["result"], site=site)
    return {"paths": write_outputs(result, out, pictures=False).paths, "result": result}


def owner_file(folder: Path, version: str) -> Path:
    """An owner's asset register written by GDAL as GeoPackage ``version``, with a second, unrelated layer."""
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "assets.gpkg"
    from overlay.demo import deck_panels, scenario_folder
    from overlay.geometry.crs import from_placement
    from overlay.io.tomlio import tomllib

    st = tomllib.loads((scenario_folder() / "scenario.toml").read_text())["structure"]
    to_map = from_placement(tuple(st["origin"]), st["bearing_deg"], 1.0, "m")
    import numpy as np

    rows, geoms = [], []
    for asset_id, span, bay, outline in deck_panels(st):
        rows.append({"asset_id": asset_id, "span": span, "bay": bay})
        geoms.append(shapely.Polygon(to_map.apply(np.array(outline))))
    gpd.GeoDataFrame(rows, geometry=geoms, crs=st["crs"]).to_file(path, layer="deck_panels", driver="GPKG",
                                                                 VERSION=version)
    gpd.GeoDataFrame({"name": ["lamp 1"]}, geometry=[shapely.Point(512350, 5712470)], crs=st["crs"]).to_file(
        path, layer="street_lamps", driver="GPKG")
    return path


def schema(path: Path) -> list[tuple]:
    """Every table and its columns, in file order (what a merge must keep apart from its own table)."""
    con = sqlite3.connect(path)
    try:
        tables = [r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type = 'table' ORDER BY rowid")]
        return [(t, tuple(r[1] for r in con.execute(f'PRAGMA table_info("{t}")'))) for t in tables]
    finally:
        con.close()


@needs_validator
def test_result_geopackage_passes_gdals_validator(written: dict) -> None:
    assert validate(written["paths"]["gpkg"]) == ""


@pytest.mark.parametrize("version, user_version", [("1.2", 10200), ("1.3", 10300), ("1.4", 10400)])
def test_merge_keeps_the_owners_version_and_passes_the_validator(demo: dict, tmp_path: Path, version: str,
                                                                 user_version: int) -> None:
    target = owner_file(tmp_path, version)
    before = schema(target)
    # GDAL 3.6's validator predates GeoPackage 1.4 and rejects any 1.4 file (its R-tree triggers are new):
    # there the merge must add no complaint of its own; 1.2 and 1.3 files must pass outright
    baseline = validate(target) if HAS_VALIDATOR else ""
    if version != "1.4":
        assert baseline == ""
    con = sqlite3.connect(target)
    app_before = con.execute("PRAGMA application_id").fetchone()[0]
    con.close()
    site = dataclasses.replace(demo["result"].site,
                               elements=dataclasses.replace(demo["result"].site.elements, source=target))
    result = dataclasses.replace(demo["result"], site=site)
    for k in range(3):
        merge_findings(result)
        if HAS_VALIDATOR and k in (0, 2):
            assert validate(target) == baseline, f"after merge {k + 1}"
    con = sqlite3.connect(target)
    try:
        assert con.execute("PRAGMA user_version").fetchone()[0] == user_version  # GeoPackage standard §1.1.1
        assert con.execute("PRAGMA application_id").fetchone()[0] == app_before
        triggers = {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type = 'trigger' AND "
                                              "name LIKE 'rtree_acoustic_findings_geom_%'")}
    finally:
        con.close()
    # the R-tree triggers of the file's own version (GeoPackage 1.4 replaced update1/update3 by update5-7)
    new_set = {f"rtree_acoustic_findings_geom_{s}" for s in ("insert", "update2", "update4", "update5", "update6",
                                                             "update7", "delete")}
    old_set = {f"rtree_acoustic_findings_geom_{s}" for s in ("insert", "update1", "update2", "update3", "update4",
                                                             "delete")}
    assert triggers == (new_set if user_version >= 10400 else old_set)
    after = schema(target)
    ours = {"acoustic_findings", "rtree_acoustic_findings_geom", "rtree_acoustic_findings_geom_rowid",
            "rtree_acoustic_findings_geom_node", "rtree_acoustic_findings_geom_parent", "layer_styles"}
    # every table of the owner's keeps its columns and order; ours come after
    assert [t for t in after if t[0] not in ours] == [t for t in before if t[0] not in ours]


@needs_ogrinfo
def test_dates_and_flags_have_real_types(written: dict, demo: dict, tmp_path: Path) -> None:
    gpkg = written["paths"]["gpkg"]
    assert ogr_fields(gpkg, "runs")["run_started"] == "DateTime"
    assert ogr_fields(gpkg, "runs")["fit_passed"] == "Integer(Boolean)"
    assert ogr_fields(gpkg, "runs")["fit_override"] == "Integer(Boolean)"
    assert ogr_fields(gpkg, "points")["valid"] == "Integer(Boolean)"
    assert ogr_fields(gpkg, "zones")["surveyed"] == "DateTime"
    assert ogr_fields(gpkg, "zones")["n_points"].startswith("Integer")
    assert ogr_fields(gpkg, "scan_extents")["surveyed"] == "DateTime"
    assert ogr_fields(gpkg, "targets")["fit_passed"] == "Integer(Boolean)"
    target = owner_file(tmp_path, "1.2")
    site = dataclasses.replace(demo["result"].site,
                               elements=dataclasses.replace(demo["result"].site.elements, source=target))
    merge_findings(dataclasses.replace(demo["result"], site=site))
    assert ogr_fields(target, "acoustic_findings")["inspected"] == "DateTime"


def test_one_finding_per_defect_when_priced_on_the_outline(demo: dict, tmp_path: Path) -> None:
    result = demo["result"]
    assert result.site.repair.basis == "outline"
    target = owner_file(tmp_path / "o", "1.2")
    site = dataclasses.replace(result.site, elements=dataclasses.replace(result.site.elements, source=target))
    merged = merge_findings(dataclasses.replace(result, site=site))
    rows = pyogrio.read_dataframe(target, layer="acoustic_findings")
    found = defects(result.zones, result.site.zones.classes)
    # the demo's defects lie inside one panel each: one row per defect, not one per defect and class
    assert merged.added == len(rows) == len(found) < len(result.zones)
    by_defect = {d.defect_id: d for d in found}
    for _, r in rows.iterrows():
        d = by_defect[r["zone_id"]]
        assert r["class"] == d.highest_class
        for c in result.site.zones.classes:
            assert r[f"area_{c.name}_m2"] == pytest.approx(d.contour_area_m2(c.name), abs=1e-6)
        assert r["affected_area_m2"] == pytest.approx(d.lowest.outline_area_m2, abs=1e-6)  # stored to 1e-6 m²
    # priced on the contour: a row per class zone again
    contour = dataclasses.replace(site, repair=dataclasses.replace(site.repair, basis="contour"))
    pieces = [dict(p) for p in result.asset_pieces]
    for p in pieces:  # with basis contour the pieces are the contours themselves
        z = next(z for z in result.zones if z.zone_id == p["zone_id"])
        p["geometry"] = result.to_map.apply_geometry(z.contour)
        p["area_m2"] = p["contour_area_m2"]
    again = merge_findings(dataclasses.replace(result, site=contour, asset_pieces=pieces), replace_findings=True)
    assert again.added == len(result.zones)


@needs_qgis
def test_qgis_opens_every_layer_in_our_style(written: dict, demo: dict, tmp_path: Path) -> None:
    result = written["result"]
    colours = {n: s.hex for n, s in palette.for_site(result.site).items()}
    seen = qgis_layers(written["paths"]["gpkg"], "zones", "points", "defect_outlines", "repair_footprints",
                       "scan_extents", "targets")
    assert all(v["valid"] for v in seen.values())
    assert seen["zones"]["renderer"] == "categorizedSymbol" and seen["zones"]["attr"] == "class"
    assert seen["zones"]["categories"] == colours  # the DXF's and the pictures' class colours
    assert seen["zones"]["aliases"]["area_m2"] == "Contour area (m²)"
    assert seen["points"]["categories"] == {"true": "#666666", "false": "#d55e00"}
    target = owner_file(tmp_path, "1.2")
    site = dataclasses.replace(result.site, elements=dataclasses.replace(result.site.elements, source=target))
    merge_findings(dataclasses.replace(result, site=site))
    owner = qgis_layers(target, "acoustic_findings", "deck_panels")
    assert owner["acoustic_findings"]["categories"] == colours
    assert owner["deck_panels"]["renderer"] == "singleSymbol"  # the owner's own layer: no style forced on it


def test_an_owners_own_default_style_is_not_overridden(demo: dict, tmp_path: Path) -> None:
    target = owner_file(tmp_path, "1.2")
    result = demo["result"]
    site = dataclasses.replace(result.site, elements=dataclasses.replace(result.site.elements, source=target))
    merge_findings(dataclasses.replace(result, site=site))
    con = sqlite3.connect(target)
    with con:
        con.execute("UPDATE layer_styles SET useAsDefault = 0")
        con.execute("INSERT INTO layer_styles (f_table_name, f_geometry_column, styleName, styleQML, useAsDefault) "
                    "VALUES ('acoustic_findings', 'geom', 'the owner''s', '<qgis/>', 1)")
    con.close()
    merge_findings(dataclasses.replace(result, site=site))
    con = sqlite3.connect(target)
    rows = dict(con.execute("SELECT styleName, useAsDefault FROM layer_styles WHERE f_table_name = 'acoustic_findings'"))
    con.close()
    assert rows == {"the owner's": 1, "overlay findings": 0}


def test_shapefile_export_maps_every_field_name(written: dict) -> None:
    path = written["paths"]["shapefile"]
    with zipfile.ZipFile(path) as zf:
        names = set(zf.namelist())
        mapping = list(csv.DictReader(io.StringIO(zf.read("field_names.csv").decode())))
        readme = zf.read("README.txt").decode()
    assert {"zones.shp", "zones.dbf", "zones.prj", "field_names.csv"} <= names
    assert "screening results" in readme  # the cautions travel with the files
    for layer in {m["layer"] for m in mapping}:
        short = [m["shapefile_field"] for m in mapping if m["layer"] == layer]
        assert len(set(s.lower() for s in short)) == len(short) and max(map(len, short)) <= 10  # dBase limit
    zones = pyogrio.read_dataframe(f"/vsizip/{path}/zones.shp")
    gpkg = pyogrio.read_dataframe(written["paths"]["gpkg"], layer="zones")
    m = {r["geopackage_field"]: r for r in mapping if r["layer"] == "zones"}
    assert m["footprint_length_m"]["shapefile_field"] == "fp_len_m"
    assert sorted(zones["fp_len_m"]) == pytest.approx(sorted(gpkg["footprint_length_m"]))
    assert "ISO text" in m["surveyed"]["conversion"]
    assert set(zones["zone_id"]) == set(gpkg["zone_id"])


@needs_validator
def test_every_geopackage_the_demo_writes_passes_the_validator(tmp_path: Path) -> None:
    from overlay.cli.main import main

    assert main(["demo", "--out", str(tmp_path), "--no-pictures", "-q"]) == 0
    written = sorted(tmp_path.rglob("*.gpkg"))
    assert {p.name for p in written} >= {"klo2-soffit.gpkg", "assets.gpkg"}
    for p in written:
        assert validate(p) == "", p
        if HAS_OGRINFO:  # GDAL 3.6 reads every one without a version warning
            done = subprocess.run(["ogrinfo", "-so", "-al", str(p)], capture_output=True, text=True)
            assert "partially supported" not in done.stderr, p
