"""Exporters read back: DXF with ezdxf (audit, codes of the DXF reference), GeoPackage with sqlite3 and
pyogrio (OGC GeoPackage 1.3 encoding standard), quantities CSV against the zones."""

from __future__ import annotations

import csv
import sqlite3
import struct

import ezdxf
import numpy as np
import pyogrio
import pytest
import shapely
from shapely.geometry import Polygon

from overlay.cautions import CAUTIONS
from overlay.exporters.dxf import APPID, TAG_BLOCK, clean_text, layer_names
from overlay.outputs.write import write_outputs


@pytest.fixture(scope="module")
def written(demo: dict, tmp_path_factory: pytest.TempPathFactory) -> dict:
    out = tmp_path_factory.mktemp("out")
    paths = write_outputs(demo["result"], out, pictures=False).paths
    return {"paths": paths, "result": demo["result"]}


def test_dxf_layers_polylines_units_and_audit(written: dict) -> None:
    result = written["result"]
    doc = ezdxf.readfile(written["paths"]["dxf"])
    auditor = doc.audit()
    assert not auditor.has_errors, [str(e) for e in auditor.errors]
    # DXF reference: $INSUNITS 6 = metres
    assert doc.header["$INSUNITS"] == 6
    assert doc.dxfversion >= "AC1027"  # R2013
    msp = doc.modelspace()
    for zc in result.site.zones.classes:
        names = layer_names(zc.name)
        assert all(doc.layers.has_entry(n) for n in names.values())
        zones = [z for z in result.zones if z.class_name == zc.name]
        plines = msp.query(f'LWPOLYLINE[layer=="{names["outline"]}"]')
        rings = sum(1 + len(z.contour.interiors) for z in zones)
        assert len(plines) == rings
        assert all(p.closed for p in plines)  # group code 70 bit 1
        assert len(msp.query(f'HATCH[layer=="{names["fill"]}"]')) == len(zones)


def test_dxf_polyline_areas_equal_zone_areas(written: dict) -> None:
    result = written["result"]
    doc = ezdxf.readfile(written["paths"]["dxf"])
    by_id = {z.zone_id: z for z in result.zones}
    seen = 0
    for pl in doc.modelspace().query("LWPOLYLINE"):
        if not pl.has_xdata(APPID):
            continue
        fields = dict(tag.value.split("=", 1) for tag in pl.get_xdata(APPID))
        if "zone_id" not in fields:  # a repair footprint
            continue
        zone = by_id[fields["zone_id"]]
        area = Polygon([p[:2] for p in pl.get_points()]).area  # shapely as reference for the area
        holes = sum(Polygon(h.coords).area for h in zone.contour.interiors)
        assert area - holes == pytest.approx(zone.area_m2, rel=1e-9)
        assert float(fields["area_m2"]) == pytest.approx(zone.area_m2, rel=1e-5)
        seen += 1
    assert seen == len(result.zones) > 0


def test_dxf_tag_blocks_carry_attributes(written: dict) -> None:
    result = written["result"]
    doc = ezdxf.readfile(written["paths"]["dxf"])
    refs = doc.modelspace().query(f'INSERT[name=="{TAG_BLOCK}"]')
    assert len(refs) == len(result.zones)
    tags = {r.get_attrib_text("ID"): r for r in refs}
    for z in result.zones:
        r = tags[z.zone_id]
        assert r.get_attrib_text("CLASS") == z.class_name
        assert float(r.get_attrib_text("AREA_M2")) == pytest.approx(z.area_m2, abs=5e-4)
        assert float(r.get_attrib_text("CONF")) == pytest.approx(z.confidence, abs=5e-3)
        # the tag sits inside its zone
        assert z.contour.contains(shapely.Point(r.dxf.insert[0], r.dxf.insert[1]))


def test_dxf_note_carries_the_cautions(written: dict) -> None:
    doc = ezdxf.readfile(written["paths"]["dxf"])
    text = " ".join(m.plain_text() for m in doc.modelspace().query("MTEXT"))
    for c in CAUTIONS:
        assert c in text.replace("\n", " ")


def test_clean_text() -> None:
    assert clean_text("a\x00b\nc") == "a b c"
    assert len(clean_text("x" * 1000)) == 250


def test_geopackage_against_ogc_standard(written: dict) -> None:
    path = written["paths"]["gpkg"]
    # OGC GeoPackage 1.3: Req 1 header, Req 2 application_id 'GPKG' and user_version 10300
    assert path.read_bytes()[:16] == b"SQLite format 3\x00"
    con = sqlite3.connect(path)
    try:
        assert con.execute("pragma application_id").fetchone()[0] == 0x47504B47
        assert con.execute("pragma user_version").fetchone()[0] == 10300
        assert con.execute("pragma integrity_check").fetchone()[0] == "ok"  # Req 6
        assert con.execute("pragma foreign_key_check").fetchall() == []  # Req 7
        srs = {r[0] for r in con.execute("select srs_id from gpkg_spatial_ref_sys")}
        assert {-1, 0, 4326, 25832} <= srs  # Req 10/11 mandatory rows, plus ours
        contents = dict(con.execute("select table_name, data_type from gpkg_contents"))
        assert contents == {"zones": "features", "points": "features", "scan_extents": "features",
                            "targets": "features", "defect_outlines": "features", "repair_footprints": "features",
                            "runs": "attributes", "layer_styles": "attributes"}
        geo = {r[0]: (r[1], r[2]) for r in con.execute("select table_name, geometry_type_name, srs_id from gpkg_geometry_columns")}
        assert geo["zones"] == ("MULTIPOLYGON", 25832) and geo["points"] == ("POINT", 25832)
        assert geo["scan_extents"] == ("POLYGON", 25832)
        stamp = con.execute("select last_change from gpkg_contents where table_name='zones'").fetchone()[0]
        assert len(stamp) == 24 and stamp[10] == "T" and stamp.endswith("Z")  # Req 15
        blob = con.execute("select geom from zones limit 1").fetchone()[0]
        # Req 19: 'GP', version 0, flags, srs_id
        assert blob[:2] == b"GP" and blob[2] == 0
        little = blob[3] & 1
        assert struct.unpack("<i" if little else ">i", blob[4:8])[0] == 25832
    finally:
        con.close()


def test_geopackage_read_back_with_pyogrio(written: dict) -> None:
    result = written["result"]
    path = written["paths"]["gpkg"]
    zones = pyogrio.read_dataframe(path, layer="zones")
    assert len(zones) == len(result.zones)
    assert zones.crs.to_epsg() == 25832
    assert zones.geometry.is_valid.all()
    needed = {"zone_id", "scan_id", "element", "class", "threshold_db", "area_m2", "perimeter_m", "n_points",
              "ver_max_db", "ver_mean_db", "peak_hz", "confidence", "surveyed"}
    assert needed <= set(zones.columns)
    # the map placement has scale 1: map area equals drawing area (to the rounding of 7-digit coordinates)
    np.testing.assert_allclose(zones.geometry.area.to_numpy(), zones["area_m2"].to_numpy(), rtol=1e-6)
    pts = pyogrio.read_dataframe(path, layer="points")
    assert {"point_id", "scan_id", "ver_db", "peak_hz", "energy", "snr_db", "valid"} <= set(pts.columns)
    assert len(pts) == sum(s.n_points for s in result.scans)
    runs = pyogrio.read_dataframe(path, layer="runs")
    assert len(runs) == len(result.scans) and "settings" in runs.columns
    assert runs["cautions"].str.contains("screening results").all()


def test_quantities_csv_totals_equal_sum_of_rows(written: dict) -> None:
    result = written["result"]
    rows = list(csv.DictReader(written["paths"]["quantities-csv"].open()))
    zone_rows = [r for r in rows if r["row_kind"] == "zone"]
    defect_rows = [r for r in rows if r["row_kind"] == "defect"]
    totals = [r for r in rows if r["row_kind"] == "element_total"]
    assert len(zone_rows) == len(result.zones)
    assert len(defect_rows) == len({z.defect_id for z in result.zones}) > 0
    assert totals
    # each defect once: the element totals, over all classes, count every defect exactly once
    assert sum(int(t["n_defects"]) for t in totals) == len(defect_rows)
    for t in totals:
        parts = [r for r in defect_rows if r["element"] == t["element"] and r["class"] == t["class"]]
        for col in ("affected_area_m2", "footprint_area_m2", "volume_low_m3", "volume_high_m3"):
            assert float(t[col]) == pytest.approx(sum(float(r[col]) for r in parts), abs=1e-3)
        assert int(t["n_defects"]) == len(parts)
        assert float(t["element_share_pct"]) == pytest.approx(100 * float(t["affected_area_m2"]) / float(t["element_area_m2"]), abs=1e-3)
    for d in defect_rows:
        # a defect's class contour areas are those of its zones; its class is the highest it reaches
        mine = [r for r in zone_rows if r["defect_id"] == d["defect_id"]]
        for c in result.site.zones.classes:
            assert float(d[f"contour_{c.name}_m2"]) == pytest.approx(
                sum(float(r["contour_area_m2"]) for r in mine if r["class"] == c.name), abs=2e-4)
        reached = [c.name for c in result.site.zones.classes if any(r["class"] == c.name for r in mine)]
        assert d["class"] == reached[-1]


def test_report_carries_cautions(written: dict) -> None:
    text = written["paths"]["report"].read_text()
    for c in CAUTIONS:
        assert c in text
    for z in written["result"].zones:
        assert z.zone_id in text


def test_dxf_hatches_carry_holes_as_islands(written: dict) -> None:
    # DXF reference, HATCH: 91 = number of boundary paths, 92 path type bits (1 external, 16 outermost)
    result = written["result"]
    doc = ezdxf.readfile(written["paths"]["dxf"])
    for zc in result.site.zones.classes:
        hatches = doc.modelspace().query(f'HATCH[layer=="{layer_names(zc.name)["fill"]}"]')
        zones = sorted((z for z in result.zones if z.class_name == zc.name), key=lambda z: len(z.contour.interiors))
        paths = sorted(len(h.paths) for h in hatches)
        assert paths == [1 + len(z.contour.interiors) for z in zones]
        for h in hatches:
            assert h.paths[0].path_type_flags & 1 and h.paths[0].path_type_flags & 16


def test_geopackage_field_descriptions(written: dict) -> None:
    con = sqlite3.connect(written["paths"]["gpkg"])
    try:
        rows = dict(con.execute("select column_name, description from gpkg_data_columns where table_name='zones'"))
        titles = dict(con.execute("select column_name, title from gpkg_data_columns where table_name='zones'"))
        # GeoPackage standard, schema extension (Req 141): both tables, one gpkg_schema row each
        ext = sorted(con.execute("select table_name, scope from gpkg_extensions where extension_name='gpkg_schema'"))
        enum = [r[0] for r in con.execute("select value from gpkg_data_column_constraints c join gpkg_data_columns d "
                                          "on d.constraint_name = c.constraint_name where d.column_name = 'class' order by c.rowid")]
        assert con.execute("pragma integrity_check").fetchone()[0] == "ok"
    finally:
        con.close()
    assert "order of magnitude" in rows["depth_low_m"] and titles["area_m2"] == "Contour area (m²)"
    assert ext == [("gpkg_data_column_constraints", "read-write"), ("gpkg_data_columns", "read-write")]
    assert enum == [c.name for c in written["result"].site.zones.classes]


def test_gdal_command_line_reads_the_geopackage(written: dict) -> None:
    import shutil
    import subprocess

    if shutil.which("ogrinfo") is None:
        pytest.skip("GDAL command-line tools not installed")
    done = subprocess.run(["ogrinfo", "-so", "-al", str(written["paths"]["gpkg"])], capture_output=True, text=True)
    assert done.returncode == 0 and "zones" in done.stdout


def test_quantities_csv_carries_the_cautions(written: dict) -> None:
    rows = list(csv.DictReader(written["paths"]["quantities-csv"].open()))
    assert [r["note"] for r in rows if r["row_kind"] == "caution"] == list(CAUTIONS)
