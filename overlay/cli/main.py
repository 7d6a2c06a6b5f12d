"""Entry point: parse, dispatch to a command module, turn errors into one line and an exit code.

Exit codes (README, "Exit codes"): 0 done, 1 unexpected, 2 usage, 3 bad input,
4 registration or CRS check failed, 5 output conflict.
"""

from __future__ import annotations

import argparse
import signal
import sys
import threading
import traceback
import warnings
from typing import Sequence

from overlay import __version__
from overlay.cli import calibrate, demo, describe, exporters, importing, run
from overlay.errors import EXIT_UNEXPECTED, EXIT_USAGE, OverlayError, OverlayWarning

COMMANDS = (run, calibrate, demo, describe, importing, exporters)

EPILOG = """exit codes: 0 done, 1 unexpected error, 2 usage, 3 bad input (bundle, site file, records),
4 registration or CRS check failed, 5 output conflict (would overwrite or clash)"""


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="overlay",
        description="Screening zones from acoustic laser-vibrometer scans of concrete, placed on as-built drawings "
        "(DXF), priced as quantities (CSV) and merged into GIS asset layers (GeoPackage).",
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"overlay {__version__}")
    parser.add_argument("-v", "--verbose", action="store_true", help="show the full traceback on errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for mod in COMMANDS:
        mod.add_parser(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return EXIT_USAGE
    shown = warnings.showwarning
    warnings.showwarning = _show_warning
    main_thread = threading.current_thread() is threading.main_thread()
    previous = signal.signal(signal.SIGTERM, _terminated) if main_thread else None
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("default", OverlayWarning)
            return int(args.func(args) or 0)
    except OverlayError as exc:
        if args.verbose:
            traceback.print_exc()
        print(f"overlay: error: {exc.line()}", file=sys.stderr)
        for line in exc.details:  # the evidence (a failed fit's residual table), indented below the line
            print(f"    {line}", file=sys.stderr)
        return exc.exit_code
    except (KeyboardInterrupt, Terminated):
        print("overlay: interrupted; outputs and the owner's files are as they were before the run", file=sys.stderr)
        return EXIT_UNEXPECTED
    except Exception as exc:  # the one place that catches everything, to print one line
        if args.verbose:
            traceback.print_exc()
        print(f"overlay: unexpected error: {type(exc).__name__}: {exc} (run with -v for the traceback)", file=sys.stderr)
        return EXIT_UNEXPECTED
    finally:
        warnings.showwarning = shown
        if main_thread:
            signal.signal(signal.SIGTERM, previous)


class Terminated(BaseException):
    """SIGTERM as an exception, so every temporary file and open transaction is cleaned up on the way out."""


def _terminated(signum: int, frame: object) -> None:
    raise Terminated(signum)


def _show_warning(message: Warning | str, category: type[Warning], *args: object, **kwargs: object) -> None:
    """Warnings as one plain line on stderr, without the source line Python would add."""
    print(f"overlay: warning: {message}", file=sys.stderr)


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
