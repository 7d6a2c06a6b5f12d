"""One error family for the whole tool, with the CLI's exit codes.

Every error names where the problem is (file, field) and what is wrong, so the
command line can print it as one line.  Each child is also the fitting builtin
so library callers can catch ``ValueError`` / ``OSError`` as usual.
"""

from __future__ import annotations

from pathlib import Path
from typing import Sequence

EXIT_OK = 0
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
