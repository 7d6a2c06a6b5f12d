"""Exporter plugins, found through the entry-point group ``overlay.exporters``.

The built-in exporters register through the same group as a third-party one
would (see pyproject.toml and DEVELOPERS.md).  An exporter is any object with
``name``, ``suffix``, ``description`` and ``write(result, path)``; a plugin that
fails to import or breaks that shape is listed as broken and never stops the
others.
"""

from __future__ import annotations

from dataclasses import dataclass
from importlib.metadata import EntryPoint, entry_points
from pathlib import Path
from typing import TYPE_CHECKING, Iterable, Protocol, runtime_checkable

if TYPE_CHECKING:
    from ..pipeline import RunResult

GROUP = "overlay.exporters"


@runtime_checkable
class Exporter(Protocol):
    """What an exporter plugin provides."""

    name: str
    suffix: str
    description: str

    def write(self, result: "RunResult", path: Path) -> None:
        """Write the whole run to ``path`` (a temporary file the caller moves into place)."""


@dataclass(frozen=True)
class Broken:
    """A plugin that could not be used, and why."""

    name: str
    target: str
    problem: str


def check_exporter(obj: object) -> str | None:
    """Why ``obj`` is not a usable exporter, or None if it is."""
    for attr in ("name", "suffix", "description"):
        if not isinstance(getattr(obj, attr, None), str):
            return f"has no text attribute {attr!r}"
    if not callable(getattr(obj, "write", None)):
        return "has no callable write(result, path)"
    suffix = getattr(obj, "suffix")
    if not suffix.startswith(".") and not suffix.startswith("-"):
        return f"suffix {suffix!r} must start with '.' or '-'"
    return None


def load_exporters(eps: Iterable[EntryPoint] | None = None) -> tuple[dict[str, Exporter], list[Broken]]:
    """Load every exporter of the group; return the usable ones by name and the broken ones."""
    found = entry_points(group=GROUP) if eps is None else eps
    usable: dict[str, Exporter] = {}
    broken: list[Broken] = []
    for ep in sorted(found, key=lambda e: e.name):
        try:
            obj = ep.load()
            if isinstance(obj, type):
                obj = obj()
        except Exception as exc:  # a plugin's own failure must not stop the tool
            broken.append(Broken(ep.name, ep.value, f"failed to load: {type(exc).__name__}: {exc}"))
            continue
        problem = check_exporter(obj)
        if problem is None and obj.name != ep.name:
            problem = f"registered as {ep.name!r} but calls itself {obj.name!r}"
        if problem is None and ep.name in usable:
            problem = "a second exporter with the same name"
        if problem:
            broken.append(Broken(ep.name, ep.value, problem))
            continue
        usable[ep.name] = obj  # type: ignore[assignment]
    return usable, broken
