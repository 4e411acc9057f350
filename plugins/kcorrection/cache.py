"""K-correction tables cached on disk, one file per content hash.

A table depends only on the numbers that go into it: the filter and SED curves (their
wavelengths and values, not their file names), the redshift range, the tolerance, the method,
and the code that computes it. The key is the SHA-256 of all of these, including the source
text of the modules that do the synthetic photometry and the tabulation, so a code change can
never serve a table computed by older code. (The cosmology does not enter a K-correction, so
one table serves every cosmology.)

Location: ``$ANNOTATOR_KTABLE_CACHE`` if set (``off`` disables the cache), else
``$XDG_CACHE_HOME/annotator/ktables``, else ``~/.cache/annotator/ktables``. Size bound:
``$ANNOTATOR_KTABLE_CACHE_MB`` megabytes (default 256); after each write the least recently
used entries are deleted until the folder is under the bound.

Safe under concurrent runs and Dask workers: an entry is written to a unique temporary file in
the cache folder and renamed into place (``os.replace`` is atomic on POSIX), so a reader sees
either no entry or a whole one; two processes building the same table both write the same
bytes. An entry that cannot be read, whose stored key differs, or whose checksum does not
match is ignored and rebuilt. Any failure to write (read-only disk, full disk) only costs the
rebuild next time: the job never fails because of the cache.
"""

from __future__ import annotations

import hashlib
import json
import os
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np

ENV_DIR = "ANNOTATOR_KTABLE_CACHE"
ENV_SIZE_MB = "ANNOTATOR_KTABLE_CACHE_MB"
DEFAULT_SIZE_MB = 256.0
FORMAT = "annotator-ktable-1"
SUFFIX = ".ktable.npz"
_HERE = Path(__file__).resolve().parent
#: Modules whose source text is part of every key.
CODE_FILES = ("synthetic.py", "tables.py", "methods.py", "cache.py")

_code_digest: str | None = None


def cache_dir() -> Path | None:
    """The cache folder, or None when ``$ANNOTATOR_KTABLE_CACHE`` is ``off``."""
    value = os.environ.get(ENV_DIR, "").strip()
    if value.lower() in ("off", "0", "none", "false"):
        return None
    if value:
        return Path(value).expanduser()
    base = os.environ.get("XDG_CACHE_HOME", "").strip()
    root = Path(base) if base else Path.home() / ".cache"
    return root / "annotator" / "ktables"


def size_bound_bytes() -> int:
    raw = os.environ.get(ENV_SIZE_MB, "").strip()
    try:
        mb = float(raw) if raw else DEFAULT_SIZE_MB
    except ValueError:
        mb = DEFAULT_SIZE_MB
    return max(0, int(mb * 1024 * 1024))


def _code_hash() -> str:
    global _code_digest
    if _code_digest is None:
        h = hashlib.sha256()
        for name in CODE_FILES:
            h.update(name.encode())
            h.update((_HERE / name).read_bytes())
        _code_digest = h.hexdigest()
    return _code_digest


def _feed(h, value) -> None:
    """Hash a value canonically: arrays by dtype, shape and bytes; curves by their numbers."""
    if hasattr(value, "wave") and hasattr(value, "value"):
        h.update(b"curve")
        _feed(h, value.wave)
        _feed(h, value.value)
    elif isinstance(value, np.ndarray):
        a = np.ascontiguousarray(value, dtype=np.float64)
        h.update(f"array{a.shape}".encode())
        h.update(a.tobytes())
    elif isinstance(value, dict):
        h.update(b"dict")
        for k in sorted(value):
            h.update(json.dumps(k).encode())
            _feed(h, value[k])
    elif isinstance(value, (list, tuple)):
        h.update(f"list{len(value)}".encode())
        for v in value:
            _feed(h, v)
    elif isinstance(value, float):
        h.update(b"float" + value.hex().encode())
    elif isinstance(value, (str, int, bool)) or value is None:
        h.update(json.dumps(value).encode())
    else:
        raise TypeError(f"cannot hash {type(value).__name__} into a K-table key")


def table_key(parts: dict) -> str:
    h = hashlib.sha256(FORMAT.encode())
    h.update(_code_hash().encode())
    _feed(h, parts)
    return h.hexdigest()


def _checksum(values: np.ndarray, n: int, z_max: float, max_error: float) -> str:
    h = hashlib.sha256(np.ascontiguousarray(values).tobytes())
    h.update(f"{n}|{z_max.hex()}|{float(max_error).hex()}".encode())
    return h.hexdigest()


def load(path: Path, key: str):
    """(values, n, z_max, max_error) from an entry, or None if it is missing or not sound."""
    try:
        with np.load(path, allow_pickle=False) as data:
            meta = json.loads(str(data["meta"]))
            values = np.array(data["values"], dtype=np.float64)
        if meta.get("format") != FORMAT or meta.get("key") != key:
            return None
        n, z_max, max_error = int(meta["n"]), float.fromhex(meta["z_max"]), \
            float.fromhex(meta["max_error"])
        if values.ndim != 2 or values.shape[1] != n or \
                meta.get("checksum") != _checksum(values, n, z_max, max_error):
            return None
    except Exception:  # noqa: BLE001 -- any unreadable entry is simply rebuilt
        return None
    try:
        os.utime(path)  # recently used: evicted last
    except OSError:
        pass
    return values, n, z_max, max_error


def store(folder: Path, key: str, values: np.ndarray, n: int, z_max: float,
          max_error: float) -> None:
    """Write an entry atomically (unique temporary file, then rename); never raises."""
    try:
        folder.mkdir(parents=True, exist_ok=True)
        meta = {"format": FORMAT, "key": key, "n": n, "z_max": float(z_max).hex(),
                "max_error": float(max_error).hex(),
                "checksum": _checksum(values, n, float(z_max), max_error)}
        fd, tmp = tempfile.mkstemp(prefix=".tmp-", suffix=SUFFIX, dir=folder)
        try:
            with os.fdopen(fd, "wb") as fh:
                np.savez(fh, values=values, meta=np.array(json.dumps(meta)))
            os.replace(tmp, folder / f"{key}{SUFFIX}")
        except BaseException:
            Path(tmp).unlink(missing_ok=True)
            raise
        evict(folder, size_bound_bytes())
    except Exception:  # noqa: BLE001 -- the cache is an optimisation, never a failure
        return


def evict(folder: Path, bound: int, *, keep_temporaries_s: float = 600.0) -> int:
    """Delete least recently used entries until the folder holds at most ``bound`` bytes;
    also stale temporary files of crashed writers. Returns the number of files deleted."""
    entries = []
    deleted = 0
    now = time.time()
    for p in folder.glob(f"*{SUFFIX}"):
        try:
            st = p.stat()
        except OSError:
            continue
        if p.name.startswith(".tmp-"):
            if now - st.st_mtime > keep_temporaries_s:
                p.unlink(missing_ok=True)
                deleted += 1
            continue
        entries.append((st.st_mtime, st.st_size, p))
    total = sum(size for _, size, _ in entries)
    for _, size, p in sorted(entries, key=lambda e: e[0]):
        if total <= bound:
            break
        try:
            p.unlink()
            deleted += 1
        except OSError:
            pass
        total -= size
    return deleted


def cached_tabulation(parts: dict, build: Callable[[], object], make: Callable) -> object:
    """The table for ``parts``: from the cache when a sound entry exists, else ``build()``
    (then stored). ``make(values, n, z_max, max_error)`` turns an entry back into a table; a
    built table must have ``grid.n``, ``grid.z_max``, ``values`` and ``max_error``."""
    folder = cache_dir()
    if folder is None:
        return build()
    key = table_key(parts)
    path = folder / f"{key}{SUFFIX}"
    hit = load(path, key) if path.exists() else None
    if hit is not None:
        return make(*hit)
    table = build()
    store(folder, key, table.values, table.grid.n, table.grid.z_max, table.max_error)
    return table
