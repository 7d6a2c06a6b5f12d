"""Default layer styles for a desktop GIS: each GeoPackage layer opens drawn, not in a random colour.

A style is written twice: as a QGIS layer definition (QML: renderer, field
aliases) and as an OGC Styled Layer Descriptor 1.1 (SLD, for other clients).
Both go into the GeoPackage's ``layer_styles`` table, the convention QGIS reads
a layer's default style from (``useAsDefault``).  Colours come from ``palette``,
so a class looks the same here, in the DXF and in the pictures.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence
from xml.sax.saxutils import escape, quoteattr

from overlay.outputs.palette import RGB, hex_of


@dataclass(frozen=True)
class Symbol:
    """One way of drawing: a polygon (fill + outline), a line or a point marker."""

    kind: str  # "fill", "line" or "marker"
    rgb: RGB
    fill_alpha: int = 0  # 0 = no fill (polygons drawn as outlines)
    outline: RGB | None = None
    width_mm: float = 0.5
    dash: str = "solid"  # "solid", "dash", "dot", "dash dot"
    shape: str = "circle"  # markers: "circle", "triangle", "cross"
    size_mm: float = 2.0


@dataclass(frozen=True)
class Category:
    value: object
    label: str
    symbol: Symbol


@dataclass(frozen=True)
class LayerStyle:
    """A layer's default style: one symbol, or one per value of ``attr``; aliases for its fields."""

    name: str
    symbol: Symbol | None = None
    attr: str | None = None  # categorised by this field
    categories: tuple[Category, ...] = ()
    aliases: tuple[tuple[str, str], ...] = ()  # (field, alias)
    fields: tuple[str, ...] = ()  # the layer's fields in order (for the alias index)


_QGIS_DASH = {"solid": "solid", "dash": "dash", "dot": "dot", "dash dot": "dash dot"}
_SLD_DASH = {"solid": None, "dash": "6 3", "dot": "1 3", "dash dot": "6 3 1 3"}


def _rgba(rgb: RGB, alpha: int = 255) -> str:
    return f"{rgb[0]},{rgb[1]},{rgb[2]},{alpha}"


def _options(props: dict[str, str]) -> str:
    """A QGIS symbol layer's properties, as QGIS 3.22 writes them: an Option map and the older props."""
    opts = "".join(f'<Option type="QString" name={quoteattr(k)} value={quoteattr(v)}/>' for k, v in props.items())
    legacy = "".join(f"<prop k={quoteattr(k)} v={quoteattr(v)}/>" for k, v in props.items())
    return f'<Option type="Map">{opts}</Option>{legacy}'


def _qml_symbol(sym: Symbol, name: str) -> str:
    outline = sym.outline or sym.rgb
    if sym.kind == "fill":
        props = {"color": _rgba(sym.rgb, sym.fill_alpha), "style": "solid" if sym.fill_alpha else "no",
                 "outline_color": _rgba(outline), "outline_style": _QGIS_DASH[sym.dash],
                 "outline_width": f"{sym.width_mm:g}", "outline_width_unit": "MM", "joinstyle": "miter"}
        layer, qtype = "SimpleFill", "fill"
    elif sym.kind == "line":
        props = {"line_color": _rgba(sym.rgb), "line_style": _QGIS_DASH[sym.dash], "line_width": f"{sym.width_mm:g}",
                 "line_width_unit": "MM", "capstyle": "flat", "joinstyle": "miter"}
        layer, qtype = "SimpleLine", "line"
    else:
        props = {"name": sym.shape, "color": _rgba(sym.rgb), "outline_color": _rgba(outline),
                 "outline_width": f"{sym.width_mm / 2:g}", "outline_width_unit": "MM", "size": f"{sym.size_mm:g}",
                 "size_unit": "MM"}
        layer, qtype = "SimpleMarker", "marker"
    return (f'<symbol type="{qtype}" name={quoteattr(name)} alpha="1" clip_to_extent="1" force_rhr="0">'
            f'<layer class="{layer}" enabled="1" pass="0" locked="0">{_options(props)}</layer></symbol>')


def qml(style: LayerStyle) -> str:
    """The style as a QGIS layer definition (renderer and field aliases)."""
    if style.attr is not None:
        cats = "".join(f'<category render="true" value={quoteattr(str(c.value))} symbol="{i}" label={quoteattr(c.label)}/>'
                       for i, c in enumerate(style.categories))
        syms = "".join(_qml_symbol(c.symbol, str(i)) for i, c in enumerate(style.categories))
        renderer = (f'<renderer-v2 type="categorizedSymbol" attr={quoteattr(style.attr)} forceraster="0" '
                    f'symbollevels="0" enableorderby="0"><categories>{cats}</categories><symbols>{syms}</symbols>'
                    "</renderer-v2>")
    else:
        assert style.symbol is not None
        renderer = (f'<renderer-v2 type="singleSymbol" forceraster="0" symbollevels="0" enableorderby="0">'
                    f"<symbols>{_qml_symbol(style.symbol, '0')}</symbols></renderer-v2>")
    index = {f: i for i, f in enumerate(style.fields)}
    aliases = "".join(f'<alias field={quoteattr(f)} index="{index.get(f, 0)}" name={quoteattr(a)}/>'
                      for f, a in style.aliases)
    return ("<!DOCTYPE qgis PUBLIC 'http://mrcc.com/qgis.dtd' 'SYSTEM'>\n"
            f'<qgis version="3.22.0" styleCategories="Symbology|Fields">{renderer}<aliases>{aliases}</aliases></qgis>\n')


def _sld_symbolizer(sym: Symbol) -> str:
    outline = hex_of(sym.outline or sym.rgb)
    dash = _SLD_DASH[sym.dash]
    stroke = (f'<se:Stroke><se:SvgParameter name="stroke">{outline}</se:SvgParameter>'
              f'<se:SvgParameter name="stroke-width">{sym.width_mm * 3.78:.2f}</se:SvgParameter>'
              + (f'<se:SvgParameter name="stroke-dasharray">{dash}</se:SvgParameter>' if dash else "") + "</se:Stroke>")
    if sym.kind == "fill":
        fill = (f'<se:Fill><se:SvgParameter name="fill">{hex_of(sym.rgb)}</se:SvgParameter>'
                f'<se:SvgParameter name="fill-opacity">{sym.fill_alpha / 255:.2f}</se:SvgParameter></se:Fill>'
                if sym.fill_alpha else "")
        return f"<se:PolygonSymbolizer>{fill}{stroke}</se:PolygonSymbolizer>"
    if sym.kind == "line":
        return f"<se:LineSymbolizer>{stroke}</se:LineSymbolizer>"
    mark = {"circle": "circle", "triangle": "triangle", "cross": "x"}[sym.shape]
    return (f"<se:PointSymbolizer><se:Graphic><se:Mark><se:WellKnownName>{mark}</se:WellKnownName>"
            f'<se:Fill><se:SvgParameter name="fill">{hex_of(sym.rgb)}</se:SvgParameter></se:Fill>{stroke}</se:Mark>'
            f"<se:Size>{sym.size_mm * 3.78:.1f}</se:Size></se:Graphic></se:PointSymbolizer>")


def sld(style: LayerStyle, layer: str) -> str:
    """The style as an OGC Styled Layer Descriptor 1.1 (Symbology Encoding 1.1)."""
    if style.attr is not None:
        rules = "".join(
            f"<se:Rule><se:Name>{escape(c.label)}</se:Name><ogc:Filter><ogc:PropertyIsEqualTo>"
            f"<ogc:PropertyName>{escape(style.attr)}</ogc:PropertyName><ogc:Literal>{escape(str(c.value))}</ogc:Literal>"
            f"</ogc:PropertyIsEqualTo></ogc:Filter>{_sld_symbolizer(c.symbol)}</se:Rule>" for c in style.categories)
    else:
        assert style.symbol is not None
        rules = f"<se:Rule><se:Name>{escape(style.name)}</se:Name>{_sld_symbolizer(style.symbol)}</se:Rule>"
    return ('<?xml version="1.0" encoding="UTF-8"?>\n'
            '<StyledLayerDescriptor xmlns="http://www.opengis.net/sld" xmlns:ogc="http://www.opengis.net/ogc" '
            'xmlns:se="http://www.opengis.net/se" version="1.1.0">'
            f"<NamedLayer><se:Name>{escape(layer)}</se:Name><UserStyle><se:Name>{escape(style.name)}</se:Name>"
            f"<se:FeatureTypeStyle>{rules}</se:FeatureTypeStyle></UserStyle></NamedLayer></StyledLayerDescriptor>\n")


def class_categories(classes: Sequence[tuple[str, float, RGB]], fill_alpha: int = 110) -> tuple[Category, ...]:
    """One polygon category per class: its colour filled half through, its outline solid."""
    return tuple(Category(name, f"{name} (>= {level:g} dB)", Symbol("fill", rgb, fill_alpha, rgb, 0.6))
                 for name, level, rgb in classes)
