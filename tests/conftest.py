"""Shared fixtures: synthetic bundles and site files, and the demo site generated once per session."""

from __future__ import annotations

import json
import textwrap
from pathlib import Path

import numpy as np
import pytest

from overlay.demo import generate
from overlay.io.site import read_site
from overlay.job import run_site


@pytest.fixture(autouse=True)
def _fresh_tables() -> None:
    """Each test computes the plate tables it uses: a cached value left by an earlier test (or by the
    mutation run's first pass) would let a test pass without running the code it checks."""
    from overlay.zones import outline, plate

    for cached in (outline.clamped_lambda2_eq, outline._table, plate.clamped_lambda, plate.simply_supported_lambda):
        cached.cache_clear()


def write_bundle(
    folder: Path,
    *,
    n_rows: int = 6,
    n_cols: int = 8,
    spacing: float = 0.1,
    payload: str = "records",
    records: np.ndarray | None = None,
    manifest_extra: str = "",
    points_header: str = "id,row,col,x,y,valid",
    ver: np.ndarray | None = None,
    targets: bool = True,
    fs: float = 25600.0,
    n_samples: int = 1024,
    scan_id: str = "S-T1",
) -> Path:
    """A small valid bundle on a regular grid; keyword arguments bend it for the bad cases."""
    folder.mkdir(parents=True, exist_ok=True)
    rr, cc = np.mgrid[0:n_rows, 0:n_cols]
    n = rr.size
    lines = [points_header]
    for k, (r, c) in enumerate(zip(rr.ravel(), cc.ravel())):
        row = {"id": f"P{k}", "row": r, "col": c, "x": c * spacing, "y": r * spacing, "valid": 1}
        if ver is not None:
            row["ver_db"] = f"{ver[k]:.4f}"
        lines.append(",".join(str(row.get(h, "")) for h in points_header.split(",")))
    (folder / "points.csv").write_text("\n".join(lines) + "\n")
    body = f'format = "scan-bundle/1"\n\n[scan]\nid = "{scan_id}"\nelement = "EL-1"\n\n[coordinates]\nkind = "surface"\nunit = "m"\n\n'
    if payload == "records":
        rng = np.random.default_rng(1)
        if records is None:
            records = rng.normal(0, 1e-3, (n, n_samples)).astype(np.float32)
        np.save(folder / "records.npy", records)
        body += f'[records]\nsample_rate_hz = {fs}\nvelocity_unit = "m/s"\ntrigger_s = 0.0\ngate_s = [0.0, {n_samples / fs}]\n\n'
        body += "[band]\nhz = [400.0, 8000.0]\n\n"
    elif payload == "spectra":
        f = np.linspace(0, 10000, 501)
        np.save(folder / "frequencies.npy", f)
        np.save(folder / "spectra.npy", np.full((n, len(f)), 1e-9))
        body += '[spectra]\nvelocity_unit = "m/s"\n\n[band]\nhz = [400.0, 8000.0]\n\n'
    if targets:
        w, h = (n_cols - 1) * spacing, (n_rows - 1) * spacing
        for name, (x, y) in {"A": (0, 0), "B": (w, 0), "C": (w, h), "D": (0, h)}.items():
            body += f'[[targets]]\nname = "{name}"\nscanner = [{x}, {y}]\ndrawing = [{x + 10.0}, {y + 20.0}]\n\n'
    body += manifest_extra
    (folder / "scan.toml").write_text(body)
    return folder


def write_site(folder: Path, bundles: list[str], extra: str = "", classes: str = "") -> Path:
    text = textwrap.dedent(
        """\
        format = "overlay-site/1"

        [site]
        name = "Test site"
        structure = "T-1"
        drawing_unit = "m"

        [registration]
        tolerance_m = 0.01
        """
    )
    text += classes
    for b in bundles:
        text += f'\n[[scans]]\nbundle = "{b}"\n'
    text += extra
    path = folder / "site.toml"
    path.write_text(text)
    return path


@pytest.fixture
def bundle(tmp_path: Path) -> Path:
    return write_bundle(tmp_path / "S-T1")


@pytest.fixture(scope="session")
def demo(tmp_path_factory: pytest.TempPathFactory) -> dict:
    """The demo site generated and processed once: site path, truth and run result."""
    root = tmp_path_factory.mktemp("demo")
    site_path = generate(root / "site")
    truth = json.loads((root / "site" / "truth.json").read_text())
    result = run_site(read_site(site_path))
    return {"root": root, "site_path": site_path, "truth": truth, "result": result}
