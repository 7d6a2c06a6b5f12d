"""Files written beside their final place and moved in together, reversibly.

Every output goes to a hidden temporary file next to its final path (same
folder, so the move is an atomic rename).  ``publish`` moves them all into
place and keeps what they replace aside, so ``undo`` can put the old files
back — which lets a run decide its files together with a database merge.
Temporary names carry the writer's process id: a run that was killed leaves
``.<name>.<pid>.….part`` files, which the next run removes once that process
is gone.
"""

from __future__ import annotations

import contextlib
import os
import re
import secrets
from pathlib import Path
from typing import Iterable

from overlay.errors import ExporterError, OutputWriteError


def part_path(final: Path, tag: str = "") -> Path:
    """A hidden temporary path beside ``final``: ``.<name>.<pid>.<random>[.tag].part<suffix>``."""
    extra = f".{tag}" if tag else ""
    return final.parent / f".{final.name}.{os.getpid()}.{secrets.token_hex(4)}{extra}.part{final.suffix}"


def pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def glob_escape(text: str) -> str:
    return re.sub(r"([*?\[])", r"[\1]", text)


_PART = re.compile(r"\.(\d+)\.[0-9a-f]{8}(?:\.\w+)?\.part")


def remove_stale_parts(folder: Path, prefix: str = ".") -> list[Path]:
    """Remove temporary files (``part_path``) starting with ``prefix`` whose writing process is gone."""
    gone: list[Path] = []
    if not folder.is_dir():
        return gone
    for p in folder.glob(f"{glob_escape(prefix)}*.part*"):
        m = _PART.search(p.name)
        if m and not pid_alive(int(m.group(1))):
            with contextlib.suppress(OSError):
                p.unlink()
                gone.append(p)
    return gone


class Staged:
    """Temporary paths for a set of final paths; publish, undo, finish or discard them as one."""

    def __init__(self, finals: Iterable[Path]):
        self.temps: dict[Path, Path] = {}
        self._aside: dict[Path, Path | None] = {}  # final → the file it replaced (None: there was none)
        self._made: list[Path] = []  # folders we created
        for final in finals:
            folder = final.parent
            missing = [p for p in [folder, *folder.parents] if not p.exists()]
            try:
                folder.mkdir(parents=True, exist_ok=True)
            except OSError as exc:
                raise OutputWriteError(f"cannot create the output folder ({exc.strerror or exc})", source=folder) from exc
            self._made.extend(reversed(missing))
            remove_stale_parts(folder, f".{final.name}.")
            self.temps[final] = part_path(final)

    def __getitem__(self, final: Path) -> Path:
        return self.temps[final]

    def drop(self, final: Path) -> None:
        """Leave one output out (its temporary file is removed)."""
        tmp = self.temps.pop(final)
        with contextlib.suppress(FileNotFoundError):
            tmp.unlink()

    def publish(self) -> None:
        """Move every temporary file into place; what a final path held is kept aside until ``finish``."""
        for final, tmp in self.temps.items():
            if not tmp.exists():
                raise ExporterError("the exporter wrote nothing", source=final)
        try:
            for final, tmp in self.temps.items():
                old = None
                if final.exists():
                    old = part_path(final, "old")
                    os.replace(final, old)
                self._aside[final] = old
                os.replace(tmp, final)
        except OSError as exc:
            self.undo()
            raise OutputWriteError(f"cannot move the outputs into place ({exc.strerror or exc})",
                                   source=final.parent) from exc

    def undo(self) -> None:
        """Put back what ``publish`` replaced and remove what it added."""
        for final, old in reversed(list(self._aside.items())):
            with contextlib.suppress(OSError):
                if old is not None and old.exists():
                    os.replace(old, final)
                elif old is None:
                    final.unlink()
        self._aside.clear()
        self.discard()

    def finish(self) -> None:
        """The published files stay; the replaced ones go."""
        for old in self._aside.values():
            if old is not None:
                with contextlib.suppress(FileNotFoundError):
                    old.unlink()
        self._aside.clear()

    def discard(self) -> None:
        """Remove every temporary file and every folder we created that is left empty."""
        by_folder: dict[Path, list[str]] = {}
        for tmp in self.temps.values():
            by_folder.setdefault(tmp.parent, []).append(tmp.name)
        for folder, names in by_folder.items():
            # each folder listed once (a campaign's pictures are a thousand temporary files): the temporary
            # files and what a writer library keeps beside one while it writes (SQLite's -journal, -wal)
            with contextlib.suppress(FileNotFoundError):
                for p in [p for p in folder.iterdir() if p.name.startswith(tuple(names))]:
                    with contextlib.suppress(FileNotFoundError):
                        p.unlink()
        for folder in reversed(self._made):
            with contextlib.suppress(OSError):
                folder.rmdir()
