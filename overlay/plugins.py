"""Loading plugins from an entry-point group: one loop for exporters and importers alike.

A plugin that fails to import, or whose object does not have the shape its
host asks for, is listed as broken with the reason; it never stops the others.
"""

from __future__ import annotations

from dataclasses import dataclass
from importlib.metadata import EntryPoint, entry_points
from typing import Any, Callable, Collection, Iterable


@dataclass(frozen=True)
class Broken:
    """A plugin that could not be used, and why."""

    name: str
    target: str
    problem: str


def plugin_names(group: str, eps: Iterable[EntryPoint] | None = None) -> list[str]:
    """The names registered in ``group``, without loading any plugin."""
    return sorted({ep.name for ep in (entry_points(group=group) if eps is None else eps)})


def load_group(group: str, check: Callable[[Any, str], str | None], eps: Iterable[EntryPoint] | None = None,
               only: Collection[str] | None = None) -> tuple[dict[str, Any], list[Broken]]:
    """Load every plugin of ``group`` (or of ``eps``, for tests), or only those named in ``only`` (a run
    imports the formats it writes, not every installed one); ``check(obj, name)`` says what is wrong or None."""
    found = entry_points(group=group) if eps is None else eps
    if only is not None:
        found = [ep for ep in found if ep.name in only]
    usable: dict[str, Any] = {}
    broken: list[Broken] = []
    for ep in sorted(found, key=lambda e: e.name):
        try:
            obj = ep.load()
            if isinstance(obj, type):
                obj = obj()
        except Exception as exc:  # a plugin's own failure must not stop the tool
            broken.append(Broken(ep.name, ep.value, f"failed to load: {type(exc).__name__}: {exc}"))
            continue
        problem = check(obj, ep.name)
        if problem is None and ep.name in usable:
            problem = "a second plugin with the same name"
        if problem:
            broken.append(Broken(ep.name, ep.value, problem))
            continue
        usable[ep.name] = obj
    return usable, broken
