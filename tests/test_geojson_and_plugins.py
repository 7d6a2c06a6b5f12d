"""GeoJSON against RFC 7946, and the documented third-party exporter example loaded as a plugin."""

from __future__ import annotations

import json
import sys
from importlib.metadata import EntryPoint
from pathlib import Path

import numpy as np
import pytest
import shapely
from shapely.geometry import LinearRing

from overlay.cautions import CAUTIONS
from overlay.exporters import GROUP, load_exporters
from overlay.exporters.geojson import GeoJsonExporter

from .test_frames import transform_xy

EXAMPLE = Path(__file__).resolve().parents[1] / "docs" / "examples" / "overlay-zone-table"


def test_geojson_follows_rfc7946(demo: dict, tmp_path: Path) -> None:
    out = tmp_path / "z.geojson"
    GeoJsonExporter().write(demo["result"], out)
    doc = json.loads(out.read_text())
    assert doc["type"] == "FeatureCollection" and "crs" not in doc  # RFC 7946 §4: no crs member
    assert len(doc["features"]) == len(demo["result"].zones)
    by_id = {z.zone_id: z for z in demo["result"].zones}
    for f in doc["features"]:
        geom = f["geometry"]
        assert geom["type"] == "Polygon"
        rings = geom["coordinates"]
        lon, lat = np.asarray(rings[0]).T
        # §3.1.1: longitude first; the demo lies near 9.2°E 51.5°N (ETRS89 / UTM 32N)
        assert np.all((8 < lon) & (lon < 10)) and np.all((51 < lat) & (lat < 52))
        # §3.1.6: exterior counter-clockwise, holes clockwise
        assert LinearRing(rings[0]).is_ccw
        assert all(not LinearRing(r).is_ccw for r in rings[1:])
        # round trip back into the map frame: within 1 cm of the zone
        z = by_id[f["id"]]
        back = shapely.Polygon(transform_xy(np.asarray(rings[0]), "EPSG:4326", "EPSG:25832"))
        expect = demo["result"].to_map.apply_geometry(z.contour)
        assert back.symmetric_difference(shapely.Polygon(expect.exterior)).area < 0.01 * expect.length
        assert f["properties"]["zone_id"] == z.zone_id and f["properties"]["area_m2"] == pytest.approx(z.area_m2)
    assert doc["overlay"]["cautions"] == list(CAUTIONS)
    assert doc["overlay"]["transformation_accuracy_m"] >= 0


def test_geojson_needs_a_map_frame(demo: dict, tmp_path: Path) -> None:
    import dataclasses

    from overlay.errors import SiteFileError

    bare = dataclasses.replace(demo["result"], to_map=None, crs=None)
    with pytest.raises(SiteFileError, match="needs a \\[map\\] frame"):
        GeoJsonExporter().write(bare, tmp_path / "z.geojson")


def test_documented_third_party_exporter_loads_as_a_plugin(demo: dict, tmp_path: Path, monkeypatch) -> None:
    # the example in docs/examples, registered through a faked entry point (as an installed one would be)
    monkeypatch.syspath_prepend(str(EXAMPLE))
    sys.modules.pop("overlay_zone_table", None)
    usable, broken = load_exporters([EntryPoint("zone-table", "overlay_zone_table:ZoneTableExporter", GROUP)])
    assert broken == [] and list(usable) == ["zone-table"]
    out = tmp_path / "t-zones.md"
    usable["zone-table"].write(demo["result"], out)
    text = out.read_text()
    assert CAUTIONS[0] in text and all(z.zone_id in text for z in demo["result"].zones)
    assert 'zone-table = "overlay_zone_table:ZoneTableExporter"' in (EXAMPLE / "pyproject.toml").read_text()


def test_the_plugin_view_is_frozen_versioned_and_complete(demo: dict) -> None:
    # what a third-party exporter may rely on: the same numbers as the working data, read-only
    import dataclasses as dc

    from overlay.exporters.gpkg import ZONE_KINDS
    from overlay.view import VERSION

    result = demo["result"]
    run = result.view()
    assert run.version == VERSION == "overlay-result/1"
    assert [z.zone_id for z in run.zones] == [z.zone_id for z in result.zones]
    for v, z in zip(run.zones, result.zones):
        assert v.area_m2 == z.area_m2 and v.outline.equals(z.defect) and set(v.record) == set(ZONE_KINDS)
    with pytest.raises(dc.FrozenInstanceError):
        run.zones[0].area_m2 = 0.0  # type: ignore[misc]
    with pytest.raises(TypeError):
        run.zones[0].record["area_m2"] = 0.0  # type: ignore[index]
    assert run.crs_wkt is not None and run.to_map is result.to_map and run.cautions == tuple(result.cautions)
