"""``overlay exporters``: list the installed exporter plugins, broken ones included."""

from __future__ import annotations

import argparse


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("exporters", help="list the installed output formats (exporter plugins)")
    p.set_defaults(func=execute)


def execute(args: argparse.Namespace) -> int:
    from overlay.exporters import load_exporters

    usable, broken = load_exporters()
    for name, e in sorted(usable.items()):
        print(f"{name:<16} {e.suffix:<18} {e.description}")
    for b in broken:
        print(f"{b.name:<16} BROKEN ({b.target}): {b.problem}")
    return 0
