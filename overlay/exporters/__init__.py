"""Exporter plugins, found through the entry-point group ``overlay.exporters``.

The built-in exporters register through the same group as a third-party one
would (see pyproject.toml and DEVELOPERS.md).  An exporter is any object with
``name``, ``suffix``, ``description`` and ``write(result, path)``; a plugin that
fails to import or breaks that shape is listed as broken and never stops the
others.
"""

from __future__ import annotations

from importlib.metadata import EntryPoint
from pathlib import Path
from typing import TYPE_CHECKING, Collection, Iterable, Protocol, runtime_checkable

from overlay.plugins import Broken, load_group

if TYPE_CHECKING:
    from overlay.job import RunResult

__all__ = ["GROUP", "Broken", "Exporter", "check_exporter", "load_exporters"]

GROUP = "overlay.exporters"


@runtime_checkable
class Exporter(Protocol):
    """What an exporter plugin provides."""

    name: str
    suffix: str
    description: str

    def write(self, result: "RunResult", path: Path) -> None:
        """Write the whole run to ``path`` (a temporary file the caller moves into place)."""


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


def _check(obj: object, name: str) -> str | None:
    problem = check_exporter(obj)
    if problem is None and getattr(obj, "name") != name:
        problem = f"registered as {name!r} but calls itself {getattr(obj, 'name')!r}"
    return problem


def load_exporters(eps: Iterable[EntryPoint] | None = None, only: Collection[str] | None = None
                   ) -> tuple[dict[str, Exporter], list[Broken]]:
    """Load every exporter of the group (or those named in ``only``); the usable ones by name and the broken ones."""
    return load_group(GROUP, _check, eps, only)
