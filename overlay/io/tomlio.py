"""Reading TOML files with errors that name the file and the line."""

from __future__ import annotations

import difflib
import re
import sys
from pathlib import Path
from typing import Any

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised only on 3.10
    import tomli as tomllib

from overlay.errors import OverlayError

__all__ = ["Fields", "load_toml", "tomllib"]

MAX_BYTES = 16 << 20  # 16 MiB: far beyond any real site file (thousands of scans) or manifest


def load_toml(path: Path, error: type[OverlayError]) -> dict[str, Any]:
    """Parse ``path``; a missing file or a syntax error becomes ``error`` naming the file."""
    if not path.exists():
        raise error("file not found", source=path)
    if not path.is_file():
        raise error("not a regular file", source=path)
    if path.stat().st_size > MAX_BYTES:
        raise error(f"is {path.stat().st_size} bytes; a manifest or site file of more than {MAX_BYTES} bytes is not "
                    "one", source=path)
    try:
        with path.open("rb") as fh:
            return tomllib.load(fh)
    except tomllib.TOMLDecodeError as exc:
        raise error(f"not valid TOML ({exc})", source=path) from exc
    except UnicodeDecodeError as exc:
        raise error("not UTF-8 text", source=path) from exc
    except RecursionError as exc:
        raise error("not a usable TOML file (nested too deeply)", source=path) from exc


_HEADER = re.compile(r"^\s*(\[\[?)\s*([^\]]+?)\s*\]\]?\s*(#.*)?$")
_KEY = re.compile(r"^\s*(\"[^\"]*\"|'[^']*'|[A-Za-z0-9_-]+)\s*[.=]")
_PART = re.compile(r"([^.\[\]]+)(?:\[(\d+)\])?")


def toml_line(text: str, dotted: str) -> int | None:
    """The line (1-based) that sets ``dotted`` (``a.b``, ``scans[3].bundle``) in a TOML text, else the
    line of its table, else None: a reader goes to the line, not only the field."""
    want = [(m.group(1), None if m.group(2) is None else int(m.group(2))) for m in _PART.finditer(dotted)]
    if not want:
        return None
    *table, (key, _) = want
    counts: dict[str, int] = {}
    current: list[tuple[str, int | None]] = []
    header_line = None if table else 0
    for n, line in enumerate(text.splitlines(), 1):
        h = _HEADER.match(line)
        if h:
            names = [x.strip().strip("\"'") for x in h.group(2).split(".")]
            if h.group(1) == "[[":
                name = ".".join(names)
                counts[name] = counts.get(name, -1) + 1
                current = [(x, None) for x in names[:-1]] + [(names[-1], counts[name])]
            else:
                current = [(x, None) for x in names]
            if current == table or _same(current, table):
                header_line = n
            continue
        k = _KEY.match(line)
        if k and (current == table or _same(current, table)) and k.group(1).strip("\"'") == key:
            return n
    return header_line or None


def _same(current: list[tuple[str, int | None]], table: list[tuple[str, int | None]]) -> bool:
    """A header matches a wanted table path; an index is compared only where the header has one."""
    return len(current) == len(table) and all(
        a == b and (i is None or j is None or i == j) for (a, i), (b, j) in zip(current, table))


class Fields:
    """Typed access to one TOML table, each failure naming file and dotted field.

    Keeps track of the keys it was asked for, so the caller can refuse the
    unknown ones: a misspelt key would otherwise fall back to a default and
    change a number without a word.
    """

    def __init__(self, table: Any, prefix: str, source: Path, error: type[OverlayError]):
        if not isinstance(table, dict):
            raise error("must be a table", source=source, field=prefix or None)
        self.table = table
        self.prefix = prefix
        self.source = source
        self.error = error
        self.seen: set[str] = set()

    def name(self, key: str) -> str:
        return f"{self.prefix}.{key}" if self.prefix else key

    def fail(self, key: str, problem: str) -> OverlayError:
        """The error for ``key``; when the key is missing but a similar unknown one is present, say so."""
        if key not in self.table:
            near = difflib.get_close_matches(key, self.unknown(), n=1, cutoff=0.6)
            if near:
                problem += f" (the file has {self.name(near[0])!r}: misspelt?)"
        return self.error(problem, source=self.source, field=self.where(key))

    def where(self, key: str) -> str:
        """``line N, dotted.key`` where the line is known (the source read again: errors only)."""
        try:
            text = self.source.read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError, AttributeError):
            return self.name(key)
        n = toml_line(text, self.name(key))
        return f"line {n}, {self.name(key)}" if n else self.name(key)

    def has(self, key: str) -> bool:
        self.seen.add(key)
        return key in self.table

    def raw(self, key: str, default: Any = None) -> Any:
        self.seen.add(key)
        return self.table.get(key, default)

    def string(self, key: str, default: str | None = None, *, required: bool = False) -> str | None:
        value = self.raw(key)
        if value is None:
            if required:
                raise self.fail(key, "is required")
            return default
        if not isinstance(value, str):
            raise self.fail(key, f"must be text, got {value!r}")
        return value

    def choice(self, key: str, choices: tuple[str, ...], default: str | None = None) -> str:
        value = self.string(key, default, required=default is None)
        assert value is not None
        if value not in choices:
            raise self.fail(key, f"must be one of {', '.join(repr(c) for c in choices)}, got {value!r}")
        return value

    def number(
        self,
        key: str,
        default: float | None = None,
        *,
        required: bool = False,
        positive: bool = False,
        minimum: float | None = None,
        maximum: float | None = None,
    ) -> float | None:
        value = self.raw(key)
        if value is None:
            if required:
                raise self.fail(key, "is required")
            return default
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise self.fail(key, f"must be a number, got {value!r}")
        value = float(value)
        if value != value or value in (float("inf"), float("-inf")):
            raise self.fail(key, f"must be finite, got {value!r}")
        if positive and value <= 0:
            raise self.fail(key, f"must be positive, got {value:g}")
        if minimum is not None and value < minimum:
            raise self.fail(key, f"must be at least {minimum:g}, got {value:g}")
        if maximum is not None and value > maximum:
            raise self.fail(key, f"must be at most {maximum:g}, got {value:g}")
        return value

    def pair(self, key: str, *, required: bool = False) -> tuple[float, float] | None:
        value = self.raw(key)
        if value is None:
            if required:
                raise self.fail(key, "is required")
            return None
        if (
            not isinstance(value, list)
            or len(value) != 2
            or any(isinstance(v, bool) or not isinstance(v, (int, float)) for v in value)
        ):
            raise self.fail(key, f"must be a pair of numbers [a, b], got {value!r}")
        a, b = float(value[0]), float(value[1])
        if not all(v == v and abs(v) != float("inf") for v in (a, b)):
            raise self.fail(key, f"must be finite, got {value!r}")
        return a, b

    def table_of(self, key: str) -> "Fields | None":
        value = self.raw(key)
        if value is None:
            return None
        return Fields(value, self.name(key), self.source, self.error)

    def unknown(self) -> list[str]:
        """Keys present but never asked for."""
        return [k for k in self.table if k not in self.seen]

    def reject_unknown(self, renamed: dict[str, str] | None = None) -> None:
        """Refuse a key nobody asked for, naming it and the nearest known key ("did you mean …")."""
        extra = self.unknown()
        if not extra:
            return
        key = extra[0]
        if renamed and key in renamed:
            raise self.fail(key, f"is no longer read: use {renamed[key]}")
        near = difflib.get_close_matches(key, sorted(self.seen), n=1, cutoff=0.6)
        hint = f"; did you mean {near[0]!r}?" if near else f"; known here: {', '.join(sorted(self.seen)) or 'none'}"
        more = f" ({len(extra) - 1} more unknown: {', '.join(extra[1:4])})" if len(extra) > 1 else ""
        raise self.fail(key, f"unknown field{hint}{more}")
