"""One palette for every output: the DXF layers, the pictures and the GIS styles show a class the same way.

Class colours follow the Okabe–Ito set (readable with the common colour-vision
deficiencies), ordered cool to hot with the class level; each class also has
its own line pattern, so nothing relies on colour alone (black-and-white print,
a monochrome plotter).  A site file may set a class's colour as an ACI number
(``[dxf] colours``); the same colour then shows in the pictures and the GIS.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Sequence

if TYPE_CHECKING:
    from overlay.settings import Site

RGB = tuple[int, int, int]

CLASS_RGB: tuple[RGB, ...] = ((0x00, 0x72, 0xB2), (0xE6, 0x9F, 0x00), (0xD5, 0x5E, 0x00), (0xCC, 0x79, 0xA7),
                              (0x00, 0x9E, 0x73))
CLASS_DASH = ("-", "--", "-.", ":", "-")  # matplotlib line styles, in class order
DEFECT_RGB: RGB = (0x5E, 0x3C, 0x99)  # estimated defect outline: dark violet, dashed
REPAIR_RGB: RGB = (0x00, 0x9E, 0x73)  # repair footprint: bluish green, heavy
EXTENT_RGB: RGB = (0x66, 0x66, 0x66)  # scan extent: grey, dotted
TARGET_RGB: RGB = (0x00, 0x00, 0x00)  # control targets: black


@dataclass(frozen=True)
class ClassStyle:
    name: str
    rgb: RGB
    aci: int
    dash: str

    @property
    def hex(self) -> str:
        return "#%02x%02x%02x" % self.rgb


def nearest_aci(rgb: RGB) -> int:
    """The AutoCAD Color Index (1–255, DXF standard palette) closest to ``rgb``."""
    from ezdxf.colors import aci2rgb

    best, dist = 7, float("inf")
    for i in range(1, 256):
        c = aci2rgb(i)
        d = (c.r - rgb[0]) ** 2 + (c.g - rgb[1]) ** 2 + (c.b - rgb[2]) ** 2
        if d < dist:
            best, dist = i, d
    return best


def class_styles(names: Sequence[str], aci_overrides: dict[str, int] | None = None) -> dict[str, ClassStyle]:
    """Each class's colour (RGB and its ACI) and line pattern, in class order."""
    chosen = aci_overrides or {}
    out = {}
    for i, name in enumerate(names):
        if name in chosen:
            from ezdxf.colors import aci2rgb

            c = aci2rgb(chosen[name])
            rgb, aci = (c.r, c.g, c.b), chosen[name]
        else:
            rgb = CLASS_RGB[i % len(CLASS_RGB)]
            aci = nearest_aci(rgb)
        out[name] = ClassStyle(name, rgb, aci, CLASS_DASH[i % len(CLASS_DASH)])
    return out


def for_site(site: "Site") -> dict[str, ClassStyle]:
    """The class styles of a site: its classes in order, with its [dxf] colour choices."""
    return class_styles([c.name for c in site.zones.classes], dict(site.dxf.colours))


def hex_of(rgb: RGB) -> str:
    return "#%02x%02x%02x" % rgb
