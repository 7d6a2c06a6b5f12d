"""The same drawing saved by two processes has the same CLASSES section (DXF reference: the section
lists the application-defined classes; their order carries no meaning, so a fixed one costs nothing)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

SCRIPT = """
import sys, ezdxf
from overlay.outputs.dxf_save import save
doc = ezdxf.new("R2013")
msp = doc.modelspace()
msp.add_line((0, 0), (1, 1))
msp.add_lwpolyline([(0, 0), (1, 0), (1, 1)], close=True)
msp.add_mtext("note")
doc.layouts.new("Sheet 1")
if sys.argv[2] == "ours":
    save(doc, sys.argv[1])
else:
    doc.saveas(sys.argv[1])
"""


def _classes(path: Path) -> str:
    text = path.read_text()
    start = text.index("CLASSES")
    return text[start:text.index("ENDSEC", start)]


def _saved(tmp_path: Path, seed: int, how: str) -> str:
    out = tmp_path / f"{how}-{seed}.dxf"
    subprocess.run([sys.executable, "-c", SCRIPT, str(out), how], check=True, env={"PYTHONHASHSEED": str(seed)})
    return _classes(out)


def test_classes_section_is_the_same_whatever_the_hash_seed(tmp_path: Path) -> None:
    ours = {_saved(tmp_path, seed, "ours") for seed in range(3)}
    assert len(ours) == 1
    assert "LAYOUT" in ours.pop()


def test_plain_saving_varies_with_the_hash_seed(tmp_path: Path) -> None:
    # the control: without the fixed order the section changes between processes (so the test above can fail)
    assert len({_saved(tmp_path, seed, "plain") for seed in range(5)}) > 1
