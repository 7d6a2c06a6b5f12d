"""Saving a drawing so that two runs of the same job differ only where the DXF says they should.

ezdxf adds the CLASSES section's entries while saving, in the order of a set of entity type names,
and a set's order changes with Python's string hashing from one process to the next: the same
drawing came out with its class entries swapped.  The time stamps and GUIDs of the header still
change per run, as the DXF reference intends.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any


def save(doc: Any, path: Path) -> None:
    """Save ``doc`` with its CLASSES entries in a fixed order (by class name)."""
    if doc.dxfversion > "AC1009":  # R12 has no CLASSES section
        doc.classes.add_required_classes(doc.dxfversion)
        doc.classes.classes = dict(sorted(doc.classes.classes.items()))
    doc.saveas(path)
