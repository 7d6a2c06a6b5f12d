"""Helpers shared by the GeoPackage and PostGIS merge tests: a result cut to some scans, and a merge
run in a child process that reports how it ended."""

from __future__ import annotations

import dataclasses
import multiprocessing
import os
import random
import time

from overlay.assets.merge import merge_findings
from overlay.errors import OutputConflictError


def subset(result, scans: set[str]):
    """The result as if only ``scans`` had been run."""
    zones = [z for z in result.zones if set(z.scan_id.split(";")) <= scans]
    ids = {z.zone_id for z in zones}
    return dataclasses.replace(result, scans=[s for s in result.scans if s.scan_id in scans], mosaic=zones,
                               asset_pieces=[p for p in result.asset_pieces if p["zone_id"] in ids])


def merge_child(result, wait_s: float, conn) -> None:
    """Merge in a forked child; send ("ok", rows added), ("refused", exit code) or ("error", repr)."""
    try:
        s = merge_findings(result, wait_s=wait_s)
        conn.send(("ok", s.added))
    except OutputConflictError as exc:
        conn.send(("refused", exc.exit_code))
    except BaseException as exc:  # pragma: no cover - reported to the parent
        conn.send(("error", repr(exc)))
    finally:
        conn.close()
        os._exit(0)


def race(results, wait_s: float, rng: random.Random) -> list[tuple[str, object]]:
    """Merge each result in its own forked process, started 0–50 ms apart; how each ended, in order."""
    fork = multiprocessing.get_context("fork")
    pipes, procs = [], []
    for r in results:
        parent, child = fork.Pipe()
        p = fork.Process(target=merge_child, args=(r, wait_s, child))
        p.start()
        pipes.append(parent)
        procs.append(p)
        time.sleep(rng.uniform(0.0, 0.05))
    outcome = [pp.recv() for pp in pipes]
    for p in procs:
        p.join(30)
    return outcome
