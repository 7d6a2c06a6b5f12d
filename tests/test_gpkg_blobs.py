"""GeoPackage geometry blobs as the standard lays them out (OGC 12-128r18 §2.1.3: 'GP', version 0,
flags with byte order in bit 0, envelope code in bits 1-3 and the empty flag in bit 4, srs_id, envelope
minx, maxx, miny, maxy, then ISO WKB), decoded here with struct by hand."""

from __future__ import annotations

import struct

import numpy as np
import shapely

from overlay.assets.gpkg_sql import geometry_blob, geometry_blobs


def test_blob_layout_by_hand() -> None:
    blob = geometry_blob(shapely.box(1, 2, 4, 8), 25832)
    magic, version, flags, srs, x0, x1, y0, y1 = struct.unpack("<2sBBi4d", blob[:40])
    assert (magic, version, flags, srs) == (b"GP", 0, 0b011, 25832)  # little-endian, xy envelope, not empty
    assert (x0, x1, y0, y1) == (1.0, 4.0, 2.0, 8.0)
    assert shapely.from_wkb(blob[40:]).equals(shapely.box(1, 2, 4, 8))
    empty = geometry_blob(shapely.Polygon(), -1)
    assert empty[3] == 0b10001 and len(empty) == 8 + 9  # empty flag, no envelope, an empty polygon's WKB


def test_many_blobs_at_once_are_the_same_blobs() -> None:
    geoms = np.array([shapely.Point(1, 2), shapely.box(0, 0, 3, 4), shapely.MultiPolygon([shapely.box(5, 5, 6, 6)]),
                      shapely.LineString([(0, 0), (2, 1)]), shapely.Polygon(), None], dtype=object)
    blobs = geometry_blobs(geoms, 4326)
    assert blobs[:4] == [geometry_blob(g, 4326) for g in geoms[:4]]
    assert blobs[4:] == [None, None]  # empty and missing: NULL in the table
    assert geometry_blobs(np.array([], dtype=object), 4326) == []
