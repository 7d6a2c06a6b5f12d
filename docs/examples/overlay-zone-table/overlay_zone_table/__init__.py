"""Example exporter plugin: the zones of a run as a Markdown table, cautions first.

It reads the run through ``result.view()`` — the frozen, versioned view a plugin may rely on
(``overlay-result/1``, documented in overlay.view) — not through the tool's working objects.
"""

from __future__ import annotations

from pathlib import Path

SUPPORTED = ("overlay-result/1",)


class ZoneTableExporter:
    name = "zone-table"
    suffix = "-zones.md"
    description = "the zones as a Markdown table (example plugin)"

    def write(self, result, path: Path) -> None:
        run = result.view()
        if run.version not in SUPPORTED:
            raise ValueError(f"zone-table reads {', '.join(SUPPORTED)}, this overlay gives {run.version}")
        lines = [f"# Zones — {run.site}", ""]
        lines += [f"> {c}" for c in run.cautions] + [""]
        lines += ["| zone | element | class | area m² | outline m² | peak Hz | confidence |", "|---|---|---|---|---|---|---|"]
        for z in run.zones:
            lines.append(f"| {z.zone_id} | {z.element} | {z.class_name} | {z.area_m2:.3f} | {z.outline_area_m2:.3f} "
                         f"| {z.peak_hz:.0f} | {z.confidence:.2f} |")
        path.write_text("\n".join(lines) + "\n", encoding="utf-8")
