"""Exporter registry with faked entry points: built-ins found, broken plugins reported, never fatal."""

from __future__ import annotations

from importlib.metadata import EntryPoint
from pathlib import Path

from overlay.exporters import GROUP, load_exporters


class GoodExporter:
    name = "good"
    suffix = ".good.txt"
    description = "a test exporter"

    def write(self, result: object, path: Path) -> None:
        path.write_text("ok")


class NoWrite:
    name = "nowrite"
    suffix = ".x"
    description = "lacks write"


class WrongName(GoodExporter):
    name = "other"


def _ep(name: str, target: str) -> EntryPoint:
    return EntryPoint(name, target, GROUP)


def test_builtin_exporters_register_through_the_group() -> None:
    usable, broken = load_exporters()
    assert {"dxf", "gpkg", "quantities-csv", "geojson"} <= set(usable)
    assert broken == []


def test_broken_plugins_are_listed_and_the_good_one_still_loads() -> None:
    eps = [
        _ep("good", "tests.test_registry:GoodExporter"),
        _ep("missing", "tests.no_such_module:Thing"),
        _ep("nowrite", "tests.test_registry:NoWrite"),
        _ep("wrongname", "tests.test_registry:WrongName"),
    ]
    usable, broken = load_exporters(eps)
    assert list(usable) == ["good"]
    problems = {b.name: b.problem for b in broken}
    assert "failed to load: ModuleNotFoundError" in problems["missing"]
    assert "write" in problems["nowrite"]
    assert "calls itself 'other'" in problems["wrongname"]


class GoodImporter:
    name = "good-in"
    description = "a test importer"

    def read(self, paths, options):
        raise NotImplementedError


def test_importers_register_the_same_way_and_broken_ones_are_reported() -> None:
    from overlay.importers import GROUP as IGROUP
    from overlay.importers import load_importers

    usable, broken = load_importers()
    assert {"uff", "point-table", "ver-matrix"} <= set(usable) and broken == []
    usable, broken = load_importers([EntryPoint("good-in", "tests.test_registry:GoodImporter", IGROUP),
                                     EntryPoint("bad-in", "tests.test_registry:NoWrite", IGROUP),
                                     EntryPoint("gone", "tests.nowhere:X", IGROUP)])
    assert list(usable) == ["good-in"]
    assert {b.name for b in broken} == {"bad-in", "gone"}
