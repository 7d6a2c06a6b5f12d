"""The processes a run starts besides its own: campaign workers, and the second writing process.

Both are forked or spawned from a process that may be killed; both must then end too, and neither
may run the parent's SIGTERM clean-up (that belongs to the parent's temporary files).  The second
writing process exists because a campaign's formats are independent: while this process draws
the DXF (the slowest, ~11 s at 800 scans) and makes the reports and pictures, the GeoPackage and
the tables are written beside it (3-5 s more, no longer waited for).  It is forked, so it starts
with the run's result in memory — nothing is pickled — and sends back only what went wrong and
what it warned.
"""

from __future__ import annotations

import contextlib
import ctypes
import multiprocessing
import os
import signal
import sys
import threading
import time
import warnings
from typing import Any, Callable

from overlay.errors import ExporterError


def die_with_parent() -> None:
    """A worker whose parent is killed (even by SIGKILL) ends too instead of running on alone.

    On Linux the kernel sends the signal (prctl PR_SET_PDEATHSIG); elsewhere a watcher thread
    notices the parent is gone.
    """
    parent = os.getppid()
    signal.signal(signal.SIGTERM, signal.SIG_DFL)  # not the parent's clean-up handler: just end
    if sys.platform.startswith("linux"):
        with contextlib.suppress(OSError, AttributeError):
            ctypes.CDLL(None, use_errno=True).prctl(1, signal.SIGTERM, 0, 0, 0)  # PR_SET_PDEATHSIG = 1
        if os.getppid() != parent:  # the parent went before the call took effect
            os._exit(1)
        return

    def watch() -> None:
        while os.getppid() == parent:
            time.sleep(1.0)
        os._exit(1)

    threading.Thread(target=watch, daemon=True).start()


def can_fork() -> bool:
    """Whether work can go to a forked process: fork exists here and no other thread runs (a thread
    holding a lock at the fork would leave the child stuck on it)."""
    return "fork" in multiprocessing.get_all_start_methods() and threading.active_count() == 1


class Beside:
    """``work`` run in a forked process while the caller goes on; ``wait`` brings back its outcome."""

    def __init__(self, work: Callable[[], None]) -> None:
        ctx = multiprocessing.get_context("fork")
        self._answer, send = ctx.Pipe(duplex=False)
        self._process = ctx.Process(target=_run, args=(work, send), daemon=True, name="overlay-writer")
        self._process.start()
        send.close()

    def wait(self) -> None:
        """Until the work is done: its warnings are warned here, its error (if any) raised here."""
        try:
            error, said = self._answer.recv()
        except EOFError:
            error, said = ExporterError("the second writing process ended without an answer "
                                        f"(exit code {self._process.exitcode})"), []
        finally:
            self._process.join()
            self._answer.close()
        for category, message in said:
            warnings.warn(message, category, stacklevel=2)
        if error is not None:
            raise error

    def stop(self) -> None:
        """End the work at once (the caller failed or was interrupted); its files are the caller's to remove."""
        if self._process.is_alive():
            self._process.kill()
        self._process.join()
        self._answer.close()


def _run(work: Callable[[], None], send: Any) -> None:
    die_with_parent()
    error: BaseException | None = None
    with warnings.catch_warnings(record=True) as caught:
        try:
            work()
        except BaseException as exc:  # everything goes back to the parent, which decides
            error = exc
    said = [(w.category, str(w.message)) for w in caught]
    try:
        send.send((error, said))
    except Exception:  # an error that does not pickle: its words still do
        send.send((ExporterError(f"{type(error).__name__}: {error}"), said))
    send.close()
