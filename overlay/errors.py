"""One error family for the whole tool, with the CLI's exit codes.

Every error names where the problem is (file, field) and what is wrong, so the
command line can print it as one line.  Each child is also the fitting builtin
so library callers can catch ``ValueError`` / ``OSError`` as usual.
"""

from __future__ import annotations

import contextlib
import warnings
from pathlib import Path
from typing import Iterator, Sequence

EXIT_UNEXPECTED = 1
EXIT_USAGE = 2
EXIT_BAD_INPUT = 3
EXIT_REGISTRATION = 4
EXIT_OUTPUT_CONFLICT = 5


class OverlayError(Exception):
    """Root of every error the tool raises on purpose."""

    exit_code = EXIT_UNEXPECTED

    def __init__(self, problem: str, *, source: str | Path | None = None, field: str | None = None,
                 details: Sequence[str] = ()):
        self.problem = problem
        self.source = None if source is None else str(source)
        self.field = field
        self.details = tuple(details)  # the evidence behind the line (a fit's residual table), printed below it
        super().__init__(self.line())

    def line(self) -> str:
        """The one-line form: ``file: field: what is wrong``."""
        parts = [p for p in (self.source, self.field) if p]
        return ": ".join(parts + [self.problem])


class UsageError(OverlayError, ValueError):
    """The command was called wrongly (bad option combination, missing argument)."""

    exit_code = EXIT_USAGE


class BundleError(OverlayError, ValueError):
    """A scan bundle breaks the ``scan-bundle/1`` contract."""

    exit_code = EXIT_BAD_INPUT


class SiteFileError(OverlayError, ValueError):
    """The site file is malformed or refers to something that is not there."""

    exit_code = EXIT_BAD_INPUT


class SignalError(OverlayError, ValueError):
    """The records cannot give energies: empty gate, no valid point, zero reference."""

    exit_code = EXIT_BAD_INPUT


class RegistrationError(OverlayError, ValueError):
    """A frame fit failed or its residuals exceed the tolerance."""

    exit_code = EXIT_REGISTRATION


class CRSCheckError(OverlayError, ValueError):
    """The map CRS is unknown, not projected, not metric or does not cover the site."""

    exit_code = EXIT_REGISTRATION


class OutputConflictError(OverlayError, FileExistsError):
    """Writing would overwrite or clash with something that is already there."""

    exit_code = EXIT_OUTPUT_CONFLICT


class OutputWriteError(OverlayError, OSError):
    """An output cannot be written: the folder is read-only, a file, or the disk is full."""

    exit_code = EXIT_OUTPUT_CONFLICT


class ExporterError(OverlayError, RuntimeError):
    """An exporter plugin is broken or failed while writing."""

    exit_code = EXIT_UNEXPECTED


class OverlayWarning(UserWarning):
    """Root of the tool's warnings (data kept, but the user should know)."""


class BundleWarning(OverlayWarning):
    """Something in a bundle was ignored or assumed (unknown field, invalid point)."""


class RegistrationWarning(OverlayWarning):
    """A fit or CRS check passed only with a caveat (override, outside area of use)."""


class OutputWarning(OverlayWarning):
    """An optional output was left out (a PDF that could not be printed); the rest is written."""


class CacheWarning(OverlayWarning):
    """A cache entry could not be trusted; the scan is computed again (no number changes)."""


Seen = tuple[type[Warning], str]  # a warning kept: its category and message (they pickle, from workers too)


@contextlib.contextmanager
def collected_warnings() -> Iterator[list[Seen]]:
    """Collect the warnings raised inside (every one, not once per place) for the run to report them;
    the list is filled when the block ends."""
    found: list[Seen] = []
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        yield found
    found.extend((w.category, str(w.message)) for w in seen)


def warn_again(seen: Sequence[Seen]) -> None:
    """Raise collected warnings again where the caller can see them, in the tool's warning family."""
    for category, message in seen:
        warnings.warn(message, category if issubclass(category, OverlayWarning) else OverlayWarning, stacklevel=3)


class ScanFailedError(OverlayError):
    """A scan of a campaign failed (``--strict`` stops there): its own error's line and exit code."""

    def __init__(self, message: str, exit_code: int, details: Sequence[str] = ()):
        super().__init__(message, details=details)
        self.exit_code = exit_code

