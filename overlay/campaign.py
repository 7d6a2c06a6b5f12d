"""Campaigns: many scans in one run, in parallel processes or on a Dask cluster, with a cache.

Scans are independent: each is read and processed on its own (``pipeline.scan_entry``); a scan
that fails is reported with its error and the others go on, unless ``strict``.  Results come back
in the order of the site file whatever the worker count, so the mosaic and every id are the same
for any ``jobs`` and for Dask.  A cache keyed by each bundle's bytes and by the settings that shape
a scan's result lets a rerun recompute only the scans that changed.
"""

from __future__ import annotations

import dataclasses
import functools
import hashlib
import json
import os
import time
import warnings
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterable

from overlay import __version__, cache
from overlay.errors import (
    CacheWarning,
    OverlayError,
    ScanFailedError,
    Seen,
    UsageError,
    collected_warnings,
    warn_again,
)
from overlay.job import RunResult, finish_site, now_utc
from overlay.outputs.staging import part_path, remove_stale_parts
from overlay.processes import die_with_parent
from overlay.scan import ScanResult, scan_entry
from overlay.settings import ScanEntry, Site

BUNDLE_FILES = ("scan.toml", "points.csv", "records.npy", "spectra.npy", "frequencies.npy")


@dataclass(frozen=True)
class Failure:
    bundle: Path
    message: str
    exit_code: int
    details: tuple[str, ...] = ()  # the evidence below the one line (a failed fit's residual table)


@dataclass
class CampaignResult:
    result: RunResult | None
    failures: list[Failure] = field(default_factory=list)
    computed: list[str] = field(default_factory=list)
    cached: list[str] = field(default_factory=list)
    seconds: float = 0.0

    @property
    def exit_code(self) -> int:
        return self.failures[0].exit_code if self.failures else 0


def file_digest(path: Path) -> str:
    """Hash of a file's bytes (read in 8 MB blocks)."""
    h = hashlib.blake2b(digest_size=20)
    with path.open("rb") as fh:
        for block in iter(lambda: fh.read(8 << 20), b""):
            h.update(block)
    return h.hexdigest()


def bundle_digest(folder: Path, known: dict[str, list] | None = None) -> str:
    """Hash of the bytes of every file of the bundle.

    ``known`` (path → [size, mtime_ns, digest]) spares re-reading a file whose size and
    modification time are what they were when it was last hashed; it is updated in place.
    """
    h = hashlib.blake2b(digest_size=20)
    for name in BUNDLE_FILES:
        p = folder / name
        if not p.is_file():  # absent, or a pipe/device the bundle reader will refuse: never opened here
            h.update(name.encode() + (b"?" if p.exists() else b"-"))
            continue
        st = p.stat()
        key = str(p.resolve())
        hit = known.get(key) if known is not None else None
        if hit is not None and hit[0] == st.st_size and hit[1] == st.st_mtime_ns:
            digest = hit[2]
        else:
            digest = file_digest(p)
            if known is not None:
                known[key] = [st.st_size, st.st_mtime_ns, digest]
        h.update(name.encode() + digest.encode())
    return h.hexdigest()


@functools.lru_cache(maxsize=1)
def code_digest() -> str:
    """Hash of the tool's own source, so a changed program never reuses results of the old one."""
    h = hashlib.blake2b(digest_size=16)
    for p in sorted(Path(__file__).resolve().parent.rglob("*.py")):
        h.update(p.read_bytes())
    return h.hexdigest()


def settings_digest(site: Site, entry: ScanEntry) -> str:
    """Hash of what, besides the bundle, shapes one scan's result (not outputs, map or merge)."""
    shaping = {
        "version": __version__,
        "code": code_digest(),
        "unit": site.drawing_unit, "registration": repr(site.registration), "energy": repr(site.energy),
        "quality": repr(site.quality), "min_area": site.zones.min_area_m2,
        "classes": [(c.name, c.threshold_db) for c in site.zones.classes], "concrete": repr(site.concrete),
        "repair": repr(site.repair), "control": sorted(site.control_points.items()),
        "entry": repr({k: v for k, v in vars(entry).items() if k != "bundle"}),
    }
    return hashlib.blake2b(json.dumps(shaping, sort_keys=True, default=str).encode(), digest_size=20).hexdigest()


def _work(entry: ScanEntry, site: Site, progress: Callable[[int], None] | None = None, single_thread: bool = False
          ) -> tuple[ScanResult | None, Failure | None, list[Seen]]:
    """One scan in a worker: its result or its failure, and the warnings it raised."""
    if single_thread:
        _one_thread()
    with collected_warnings() as seen:
        try:
            result, failure = scan_entry(entry, site, progress), None
        except OverlayError as exc:
            if exc.source is None:  # a stage that does not know the file: name the bundle
                exc = type(exc)(exc.problem, source=entry.bundle, field=exc.field, details=exc.details)
            result, failure = None, Failure(entry.bundle, exc.line(), exc.exit_code, exc.details)
        except Exception as exc:  # a bug in one scan must not lose the others
            result, failure = None, Failure(entry.bundle, f"unexpected {type(exc).__name__}: {exc}", 1)
    return result, failure, seen


INDEX = "digests.json"


def _load_index(cache_dir: Path | None) -> dict[str, list]:
    if cache_dir is None or not (cache_dir / INDEX).is_file():
        return {}
    try:
        return json.loads((cache_dir / INDEX).read_text())
    except (OSError, ValueError):
        return {}  # a damaged index only costs re-hashing


def _save_index(cache_dir: Path | None, known: dict[str, list]) -> None:
    if cache_dir is None or not cache_dir.is_dir():  # no result was cached: leave no trace
        return
    tmp = part_path(cache_dir / INDEX)
    tmp.write_text(json.dumps(known))
    os.replace(tmp, cache_dir / INDEX)


def _one_thread() -> None:
    """Workers share the cores already: one spectra thread each."""
    from overlay.signal import spectra

    spectra.DEFAULT_THREADS = 1


_SITE: list[Site] = []  # the site a pool worker was started with (sent once per worker, not with every scan)


def _pool_worker(site: Site | None = None) -> None:
    """A process-pool worker: the site it will work for, one spectra thread, and it ends with its parent."""
    _SITE[:] = [site] if site is not None else []
    _one_thread()
    die_with_parent()


def _work_here(entry: ScanEntry) -> tuple[ScanResult | None, Failure | None, list[Seen]]:
    """One scan in a pool worker, for the site the worker was started with."""
    return _work(entry, _SITE[0])


def _map_local(entries: list[ScanEntry], site: Site, jobs: int, progress: Callable[[int], None] | None
               ) -> Iterable[tuple[Any, ...]]:
    if jobs <= 1:
        return (_work(e, site, progress) for e in entries)
    # each task carries its own entry only: the site (without its list of scans, which grows with the
    # campaign) goes to each worker once, so a task costs the same in a campaign of 50 or 12,800 scans
    pool = ProcessPoolExecutor(max_workers=jobs, initializer=_pool_worker,
                               initargs=(dataclasses.replace(site, scans=()),))
    futures = [pool.submit(_work_here, e) for e in entries]

    def results() -> Iterable[tuple[Any, ...]]:
        try:
            for f in futures:
                yield f.result()
        finally:
            pool.shutdown(wait=True, cancel_futures=True)
    return results()


def _map_dask(entries: list[ScanEntry], site: Site, address: str) -> Iterable[tuple[Any, ...]]:
    try:
        from dask.distributed import Client
    except ImportError as exc:
        raise UsageError("running on a Dask scheduler needs the optional extra: pip install 'overlay[dask]'") from exc
    try:
        client = Client(address, timeout="10s")
    except (OSError, TimeoutError) as exc:
        raise OverlayError(f"cannot reach the Dask scheduler at {address} ({exc})", field="--dask") from exc
    with client:
        shared = client.scatter(dataclasses.replace(site, scans=()), broadcast=True)  # sent once, not with every task
        futures = client.map(_work, entries, site=shared, single_thread=True, pure=False)
        yield from client.gather(futures)


def run_campaign(
    site: Site,
    *,
    jobs: int = 1,
    dask_address: str | None = None,
    cache_dir: Path | None = None,
    strict: bool = False,
    on_done: Callable[[str, str], None] | None = None,
    progress: Callable[[int], None] | None = None,
) -> CampaignResult:
    """Process every scan of the site; failures are collected (or raised at once with ``strict``)."""
    t0 = time.perf_counter()
    started = now_utc()
    if site.elements is not None and site.elements.database is not None:
        from overlay.assets.postgis import check_register

        check_register(site.elements)  # an unreachable register is found before the scans, not after
    out = CampaignResult(None)
    caught: list[Seen] = []
    known = _load_index(cache_dir)
    if cache_dir is not None:
        remove_stale_parts(cache_dir, ".")
    results, keys = _cached(site, cache_dir, known, out, on_done)
    todo = [k for k in range(len(site.scans)) if k not in results]
    entries = [site.scans[k] for k in todo]
    if jobs < 1:
        raise UsageError(f"jobs (parallel processes) must be at least 1, got {jobs}")
    stream = _map_dask(entries, site, dask_address) if dask_address else _map_local(entries, site, jobs, progress)
    for k, (result, failure, seen) in zip(todo, stream):
        caught.extend(seen)
        if failure is not None:
            if strict:
                raise ScanFailedError(failure.message, failure.exit_code, failure.details)
            out.failures.append(failure)
            if on_done is not None:
                on_done(site.scans[k].bundle.name, "failed")
            continue
        results[k] = result
        out.computed.append(result.scan_id)
        if k in keys:
            _store(result, keys[k])
        if on_done is not None:
            on_done(result.scan_id, "done")
    _save_index(cache_dir, known)
    warn_again(caught)
    ordered = [results[k] for k in sorted(results)]
    if ordered:
        out.result = finish_site(site, ordered, started, caught)
    out.seconds = time.perf_counter() - t0
    return out


def _cached(site: Site, cache_dir: Path | None, known: dict[str, list], out: CampaignResult,
            on_done: Callable[[str, str], None] | None) -> tuple[dict[int, ScanResult], dict[int, Path]]:
    """The scans whose result is in the cache (by bundle and settings digest), and every scan's cache path."""
    results: dict[int, ScanResult] = {}
    keys: dict[int, Path] = {}
    if cache_dir is None:
        return results, keys
    for k, entry in enumerate(site.scans):
        if not entry.bundle.is_dir():
            continue
        path = cache_dir / f"{bundle_digest(entry.bundle, known)}-{settings_digest(site, entry)}.npz"
        keys[k] = path
        if not path.is_file():
            continue
        try:
            results[k] = cache.load(path)
        except cache.CacheEntryError as exc:
            warnings.warn(f"{path}: cache entry {exc}; computing the scan again", CacheWarning, stacklevel=3)
            path.unlink(missing_ok=True)
        else:
            out.cached.append(results[k].scan_id)
            if on_done is not None:
                on_done(results[k].scan_id, "cached")
    return results, keys


def _store(result: ScanResult, path: Path) -> None:
    try:
        cache.save(result, path)
    except OSError as exc:  # a cache that cannot be written changes no number
        warnings.warn(f"{path.parent}: cannot write the cache ({exc.strerror or exc}); going on without",
                      CacheWarning, stacklevel=3)


def summary(c: CampaignResult) -> str:
    """The closing summary: scans computed, cached, failed; zones and area per class; time; the failures."""
    lines = [f"scans: {len(c.computed)} computed, {len(c.cached)} from the cache, {len(c.failures)} failed "
             f"({c.seconds:.1f} s)"]
    if c.result is not None:
        from overlay.quantities import defect_rows

        rows = defect_rows(c.result.zones, c.result.site.zones.classes, c.result.site.repair.basis)
        lines.append(f"defects, each once at the highest class it reaches (affected area on the {c.result.site.repair.basis}):")
        for zc in reversed(c.result.site.zones.classes):
            mine = [float(r["affected_area_m2"] or 0.0) for r in rows if r["class"] == zc.name]
            lines.append(f"  {zc.name:<10} {len(mine):4d} defect(s) {sum(mine):9.4f} m2")
    if c.failures:
        lines.append("failed scans:")
        width = max(len(str(f.bundle)) for f in c.failures)
        for f in c.failures:
            lines.append(f"  {str(f.bundle):<{width}}  exit {f.exit_code}  {f.message}")
    return "\n".join(lines)
