"""Example exporter plugin: the zones of a run as a Markdown table, cautions first."""

from __future__ import annotations

from pathlib import Path


class ZoneTableExporter:
    name = "zone-table"
    suffix = "-zones.md"
    description = "the zones as a Markdown table (example plugin)"

    def write(self, result, path: Path) -> None:
        lines = [f"# Zones — {result.site.name}", ""]
        lines += [f"> {c}" for c in result.cautions] + [""]
        lines += ["| zone | element | class | area m² | outline m² | peak Hz | confidence |", "|---|---|---|---|---|---|---|"]
        for z in result.zones:
            lines.append(f"| {z.zone_id} | {z.element} | {z.class_name} | {z.area_m2:.3f} | {z.outline_area_m2:.3f} "
                         f"| {z.peak_hz:.0f} | {z.confidence:.2f} |")
        path.write_text("\n".join(lines) + "\n", encoding="utf-8")
