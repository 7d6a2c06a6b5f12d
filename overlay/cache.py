"""Per-scan results on disk as data, never as code.

A cache entry is one ``.npz`` file: the arrays of a ``ScanResult`` (geometries as
WKB bytes), a JSON description of the rest, and a SHA-256 digest over both.  It
is read with ``allow_pickle=False`` and rebuilt only into the dataclasses named
in ``KINDS``, so a crafted entry cannot run code; an entry whose digest does not
match, or that cannot be read, is reported and recomputed.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import os
from pathlib import Path
from typing import Any

import numpy as np
import shapely

from overlay.geometry.fits import Fit
from overlay.geometry.registration import TargetResult
from overlay.geometry.transforms import Affine, Projective, Similarity
from overlay.outputs.staging import part_path
from overlay.scan import ScanResult
from overlay.signal.energy import Reference
from overlay.signal.gate import Gate
from overlay.zones.zone import Zone

KINDS: dict[str, type] = {c.__name__: c for c in (ScanResult, Gate, Reference, Fit, Similarity, Affine, Projective,
                                                   TargetResult, Zone)}
META, DIGEST = "__meta__", "__digest__"


class CacheEntryError(ValueError):
    """A cache entry that cannot be trusted (unreadable, altered, or of an unknown shape)."""


def _encode(obj: Any, arrays: dict[str, np.ndarray]) -> Any:
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        name = type(obj).__name__
        if name not in KINDS:
            raise TypeError(f"cannot cache a {name}")
        return {"$": name, **{f.name: _encode(getattr(obj, f.name), arrays) for f in dataclasses.fields(obj)}}
    if isinstance(obj, np.ndarray):
        key = f"a{len(arrays)}"
        text = obj.dtype == object
        arrays[key] = obj.astype(str) if text else obj
        return {"$array": key, "object": text}
    if isinstance(obj, shapely.Geometry):
        key = f"a{len(arrays)}"
        arrays[key] = np.frombuffer(shapely.to_wkb(obj), dtype=np.uint8)
        return {"$wkb": key}
    if isinstance(obj, tuple):
        return {"$tuple": [_encode(v, arrays) for v in obj]}
    if isinstance(obj, list):
        return [_encode(v, arrays) for v in obj]
    if isinstance(obj, dict):
        return {"$dict": [[k, _encode(v, arrays)] for k, v in obj.items()]}
    if isinstance(obj, np.generic):
        return obj.item()
    if obj is None or isinstance(obj, (bool, int, float, str)):
        return obj
    raise TypeError(f"cannot cache a {type(obj).__name__}")


def _decode(doc: Any, arrays: Any) -> Any:
    if isinstance(doc, list):
        return [_decode(v, arrays) for v in doc]
    if not isinstance(doc, dict):
        return doc
    if "$array" in doc:
        arr = arrays[doc["$array"]]
        return arr.astype(object) if doc.get("object") else arr
    if "$wkb" in doc:
        return shapely.from_wkb(arrays[doc["$wkb"]].tobytes())
    if "$tuple" in doc:
        return tuple(_decode(v, arrays) for v in doc["$tuple"])
    if "$dict" in doc:
        return {k: _decode(v, arrays) for k, v in doc["$dict"]}
    kind = KINDS.get(doc.get("$", ""))
    if kind is None:
        raise CacheEntryError(f"unknown record kind {doc.get('$')!r}")
    names = {f.name for f in dataclasses.fields(kind)}
    if set(doc) - {"$"} != names:
        raise CacheEntryError(f"{kind.__name__} record does not have this version's fields")
    return kind(**{k: _decode(v, arrays) for k, v in doc.items() if k != "$"})


def _digest(meta: bytes, arrays: dict[str, np.ndarray]) -> str:
    h = hashlib.sha256(meta)
    for key in sorted(arrays):
        a = np.ascontiguousarray(arrays[key])
        h.update(key.encode() + str(a.dtype).encode() + str(a.shape).encode() + a.tobytes())
    return h.hexdigest()


def save(result: ScanResult, path: Path) -> None:
    """Write one scan's result as a cache entry (atomically: a temporary file, then a rename)."""
    arrays: dict[str, np.ndarray] = {}
    meta = json.dumps(_encode(result, arrays)).encode()
    arrays[META] = np.frombuffer(meta, dtype=np.uint8)
    digest = _digest(meta, {k: v for k, v in arrays.items() if k != META})
    arrays[DIGEST] = np.frombuffer(digest.encode(), dtype=np.uint8)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = part_path(path)
    try:
        with tmp.open("wb") as fh:
            np.savez(fh, **arrays)
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)


def load(path: Path) -> ScanResult:
    """Read a cache entry; ``CacheEntryError`` when it cannot be trusted."""
    try:
        with np.load(path, allow_pickle=False) as z:
            arrays = {k: z[k] for k in z.files}
    except Exception as exc:  # a truncated or foreign file: numpy raises several kinds
        raise CacheEntryError(f"unreadable ({type(exc).__name__}: {exc})") from exc
    try:
        meta = arrays.pop(META).tobytes()
        digest = arrays.pop(DIGEST).tobytes().decode()
    except (KeyError, UnicodeDecodeError) as exc:
        raise CacheEntryError("not a cache entry of this tool") from exc
    if _digest(meta, arrays) != digest:
        raise CacheEntryError("its digest does not match its content (altered or damaged)")
    try:
        result = _decode(json.loads(meta), arrays)
    except (ValueError, TypeError, KeyError) as exc:
        raise CacheEntryError(f"cannot be rebuilt ({exc})") from exc
    if not isinstance(result, ScanResult):
        raise CacheEntryError("does not hold a scan result")
    return result
