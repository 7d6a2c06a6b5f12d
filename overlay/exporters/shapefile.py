"""Shapefile exporter, for owners whose systems still need one: the GeoPackage's layers in one zip.

A Shapefile's field names have at most 10 characters, its text at most 254, it
has no time of day and no true/false.  Converting silently would launder names
(``footprint_length_m`` → ``footprin_1``) and cut text; here every field gets a
short name of our own, and ``field_names.csv`` in the zip maps each one back
to the GeoPackage field with its title and what the conversion did (times as
ISO text, true/false as 1/0, text cut at 254 characters and how many values).
"""

from __future__ import annotations

import csv
import io
import tempfile
import warnings
import zipfile
from pathlib import Path
from typing import TYPE_CHECKING

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio

from overlay.cautions import CAUTIONS
from overlay.exporters.gpkg import FIELD_DOCS, layers, to_output_frame

if TYPE_CHECKING:
    from overlay.job import RunResult

MAX_NAME = 10
MAX_TEXT = 254
SHORT = {  # GeoPackage field → Shapefile field (≤ 10 characters), our own abbreviations
    "threshold_db": "thresh_db", "area_low_m2": "area_lo_m2", "area_high_m2": "area_hi_m2", "perimeter_m": "perim_m",
    "outline_area_m2": "outline_m2", "ver_max_db": "vermax_db", "ver_mean_db": "vermean_db", "peak_spread": "pk_spread",
    "depth_low_m": "depth_lo_m", "depth_high_m": "depth_hi_m", "footprint_area_m2": "fp_area_m2",
    "footprint_length_m": "fp_len_m", "footprint_width_m": "fp_wid_m", "volume_low_m3": "vol_lo_m3",
    "volume_high_m3": "vol_hi_m3", "confidence": "conf", "conf_support": "conf_supp", "conf_contrast": "conf_cont",
    "conf_coherence": "conf_coh", "conf_quality": "conf_qual", "station_from_m": "sta_from_m",
    "station_to_m": "sta_to_m", "incidence_deg": "incid_deg", "invalid_reason": "why_invald", "scanner_x": "scan_x",
    "scanner_y": "scan_y", "drawing_x": "draw_x", "drawing_y": "draw_y", "residual_m": "resid_m",
    "leave_one_out_m": "loo_m",
}


def short_names(fields: list[str]) -> dict[str, str]:
    """A unique Shapefile name for every field: the table above, the name itself if short, else a cut
    with a counter — never two fields on one name."""
    out: dict[str, str] = {}
    used: set[str] = set()
    for f in fields:
        name = SHORT.get(f, f)
        if len(name) > MAX_NAME or name.lower() in used:
            stem, k = name[:MAX_NAME - 2], 1
            while (name := f"{stem}_{k}").lower() in used:
                k += 1
        out[f] = name
        used.add(name.lower())
    return out


class ShapefileExporter:
    name = "shapefile"
    suffix = "-shapefiles.zip"
    description = "the GeoPackage's layers as Shapefiles in one zip, with field_names.csv mapping the 10-character names"

    def write(self, result: "RunResult", path: Path) -> None:
        mapping: list[dict[str, object]] = []
        with tempfile.TemporaryDirectory() as tmp, zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED) as zf:
            _, crs = to_output_frame(result)
            for lyr in layers(result):
                layer, gtype = lyr.name, lyr.geometry_type
                frame = gpd.GeoDataFrame({k: _series(v) for k, v in lyr.fields.items()},
                                         geometry=gpd.GeoSeries(lyr.geometry, crs=crs), crs=crs)
                fields = [c for c in frame.columns if c != "geometry"]
                names = short_names(fields)
                out = frame.copy()
                for f in fields:
                    note, out[f] = _convert(out[f])
                    title = FIELD_DOCS.get(layer, {}).get(f, ("", ""))[0]
                    mapping.append({"layer": layer, "shapefile_field": names[f], "geopackage_field": f, "title": title,
                                    "conversion": note})
                out = out.rename(columns=names)
                with warnings.catch_warnings():
                    warnings.filterwarnings("ignore", message="'crs' was not provided")
                    pyogrio.write_dataframe(out, Path(tmp) / f"{layer}.shp", driver="ESRI Shapefile",
                                            geometry_type=gtype, layer_options={"ENCODING": "UTF-8"})
                for part in sorted(Path(tmp).glob(f"{layer}.*")):
                    zf.write(part, part.name)
            buf = io.StringIO()
            w = csv.DictWriter(buf, ["layer", "shapefile_field", "geopackage_field", "title", "conversion"],
                               lineterminator="\n")
            w.writeheader()
            w.writerows(mapping)
            zf.writestr("field_names.csv", buf.getvalue())
            zf.writestr("README.txt", "\n".join([
                f"{result.site.name} {result.site.structure}: screening zones from acoustic scans, run {result.started}, "
                f"overlay {result.tool_version}.",
                "Field names are cut to 10 characters: field_names.csv maps each to the GeoPackage field it stands for.",
                "", *CAUTIONS, ""]))


def _series(values: np.ndarray) -> pd.Series:
    """A layer's column as pandas holds it (times as UTC)."""
    col = pd.Series(values)
    return col.dt.tz_localize("UTC") if values.dtype.kind == "M" else col


def _convert(col: pd.Series) -> tuple[str, pd.Series]:
    """What a Shapefile field can hold, and a note of what changed."""
    if pd.api.types.is_datetime64_any_dtype(col):
        text = col.dt.strftime("%Y-%m-%dT%H:%M:%SZ").fillna("")
        return "UTC time as ISO text (a Shapefile has no time of day)", text
    if pd.api.types.is_bool_dtype(col):
        return "1 = true, 0 = false", col.astype("int32")
    if col.dtype == object:
        text = col.fillna("").astype(str)
        cut = int((text.str.len() > MAX_TEXT).sum())
        return (f"text cut at {MAX_TEXT} characters in {cut} feature(s)" if cut else ""), text.str.slice(0, MAX_TEXT)
    return "", col
