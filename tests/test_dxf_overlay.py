"""Drawing onto the owner's as-built DXF: nothing of theirs changes, reruns replace only our content,
clashes and unknown units are refused (DXF reference: $INSUNITS 4 = mm, 6 = m)."""

from __future__ import annotations

import dataclasses
from collections import Counter
from pathlib import Path

import ezdxf
import pytest

from overlay.errors import OutputConflictError, SiteFileError
from overlay.exporters.dxf import APPID, DxfExporter, layer_names
from overlay.settings import DxfStyle


def _snapshot(path: Path) -> dict:
    doc = ezdxf.readfile(path)
    ours = {layer.dxf.name for layer in doc.layers if layer.has_xdata(APPID)}
    msp = [e for e in doc.modelspace() if e.dxf.layer not in ours and not e.has_xdata(APPID)]
    our_sheets = {lo.block_record_name for lo in doc.layouts if lo.name.startswith("OVL ")}
    return {
        "handles": sorted(e.dxf.handle for e in msp),
        "per_layer": Counter(e.dxf.layer for e in msp),
        "layers": sorted(layer.dxf.name for layer in doc.layers if layer.dxf.name not in ours),
        "blocks": sorted(b.name for b in doc.blocks if not b.name.startswith("OVL") and b.name not in our_sheets),
        "layouts": sorted(lo.name for lo in doc.layouts if not lo.name.startswith("OVL ")),
        "header": {k: str(doc.header[k]) for k in ("$INSUNITS", "$ACADVER", "$MEASUREMENT", "$LTSCALE") if k in doc.header},
        "ours": Counter(e.dxf.layer for e in doc.modelspace() if e.dxf.layer in ours),
    }


def _with_style(result, **style):
    site = dataclasses.replace(result.site, dxf=DxfStyle(**style))
    return dataclasses.replace(result, site=site)


def test_overlay_keeps_every_owner_entity_and_reruns_replace_only_ours(demo: dict, tmp_path: Path) -> None:
    base = demo["root"] / "site" / "as-built.dxf"
    base_bytes = base.read_bytes()
    before = _snapshot(base)
    first = tmp_path / "first.dxf"
    DxfExporter().write(_with_style(demo["result"], base=base), first)
    a = _snapshot(first)
    for key in ("handles", "per_layer", "layers", "blocks", "layouts", "header"):
        assert a[key] == before[key], key
    assert base.read_bytes() == base_bytes  # the owner's file is never touched
    assert a["ours"][layer_names("watch")["outline"]] > 0
    # a second run onto the first output: our content replaced, not doubled; theirs unchanged
    second = tmp_path / "second.dxf"
    DxfExporter().write(_with_style(demo["result"], base=first), second)
    b = _snapshot(second)
    for key in ("handles", "per_layer", "layers", "blocks", "layouts", "header"):
        assert b[key] == before[key], key
    assert b["ours"] == a["ours"]
    assert not ezdxf.readfile(second).audit().has_errors


def test_layer_name_clash_is_refused_unless_prefixed(demo: dict, tmp_path: Path) -> None:
    base = tmp_path / "owner.dxf"
    doc = ezdxf.readfile(demo["root"] / "site" / "as-built.dxf")
    doc.layers.add("OVL-WATCH-OUTLINE")  # the owner happens to use one of our names
    doc.saveas(base)
    with pytest.raises(OutputConflictError, match="already has layer\\(s\\) OVL-WATCH-OUTLINE") as info:
        DxfExporter().write(_with_style(demo["result"], base=base), tmp_path / "out.dxf")
    assert info.value.exit_code == 5 and not (tmp_path / "out.dxf").exists()
    DxfExporter().write(_with_style(demo["result"], base=base, prefix="INSP"), tmp_path / "out.dxf")
    assert ezdxf.readfile(tmp_path / "out.dxf").layers.has_entry("INSP-WATCH-OUTLINE")


def test_millimetre_base_is_converted(demo: dict, tmp_path: Path) -> None:
    # an owner drawing in mm ($INSUNITS 4): our metre geometry is scaled by 1000, areas stay m²
    base = tmp_path / "mm.dxf"
    doc = ezdxf.new("R2013")
    doc.header["$INSUNITS"] = 4
    doc.saveas(base)
    out = tmp_path / "out.dxf"
    DxfExporter().write(_with_style(demo["result"], base=base), out)
    z = demo["result"].zones[0]
    got = ezdxf.readfile(out)
    assert got.header["$INSUNITS"] == 4
    for pl in got.modelspace().query("LWPOLYLINE"):
        if pl.has_xdata(APPID):
            fields = dict(t.value.split("=", 1) for t in pl.get_xdata(APPID) if "=" in t.value)
            if fields.get("zone_id") == z.zone_id:
                x0 = min(p[0] for p in pl.get_points())
                assert x0 == pytest.approx(z.contour.bounds[0] * 1000, rel=1e-9)
                assert float(fields["area_m2"]) == pytest.approx(z.area_m2, rel=1e-5)
                break
    else:
        pytest.fail("zone outline not found")


def test_unitless_base_is_refused_unless_its_unit_is_given(demo: dict, tmp_path: Path) -> None:
    base = tmp_path / "nounit.dxf"
    doc = ezdxf.new("R2013")
    doc.header["$INSUNITS"] = 0
    doc.saveas(base)
    with pytest.raises(SiteFileError, match="unitless") as info:
        DxfExporter().write(_with_style(demo["result"], base=base), tmp_path / "out.dxf")
    assert info.value.exit_code == 3
    DxfExporter().write(_with_style(demo["result"], base=base, base_unit="m"), tmp_path / "out.dxf")
