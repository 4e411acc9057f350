"""One writer per output folder: an exclusive OS file lock held for the whole run.

``annotator run`` (either engine, and the service's runs) takes ``fcntl.flock(LOCK_EX)`` on
``DIR/.annotator.lock`` before it looks at the folder and keeps it until it ends. The kernel
drops the lock when the process ends in any way (``kill -9`` included), so a crash never
leaves the folder locked; the file itself stays and is harmless. The holder writes its PID
into the file, so a second run, ``--resume`` or ``--overwrite`` on the same folder is refused
with one line naming it.

``flock`` locks are per open file description: a second open in the same process conflicts
as well, so two runs in one process (the service) exclude each other too. On network
filesystems, ``flock`` is only as good as the filesystem's lock support (NFSv4 and Lustre
with ``flock`` mounts honour it across hosts).
"""

from __future__ import annotations

import os
import time
from contextlib import contextmanager
from pathlib import Path

from ..errors import OutputError

LOCK_FILE = ".annotator.lock"


def _take(fd: int, tries: int = 20) -> None:
    """``LOCK_EX`` without waiting for a holder, but past a momentary probe by
    :func:`lock_holder` (a few retries, 10 ms apart)."""
    import fcntl

    for attempt in range(tries):
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            return
        except BlockingIOError:
            if attempt == tries - 1:
                raise
            time.sleep(0.01)


def lock_holder(folder: Path) -> str | None:
    """The PID (as written by the holder) of a run holding ``folder``'s lock now, else None."""
    import fcntl

    path = Path(folder) / LOCK_FILE
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return None
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
        except BlockingIOError:
            return os.pread(fd, 64, 0).decode("ascii", "replace").strip() or "unknown"
        except OSError:
            return None
        fcntl.flock(fd, fcntl.LOCK_UN)
        return None
    finally:
        os.close(fd)


@contextmanager
def output_lock(folder: Path):
    """Hold the writer lock of ``folder`` (created if absent) for the ``with`` block."""
    import fcntl

    folder = Path(folder)
    if folder.exists() and not folder.is_dir():
        raise OutputError(f"output {folder}: exists and is not a folder")
    try:
        folder.mkdir(parents=True, exist_ok=True)
        fd = os.open(folder / LOCK_FILE, os.O_RDWR | os.O_CREAT, 0o644)
    except OSError as exc:
        raise OutputError(f"output {folder}: cannot create the folder's lock file "
                          f"({exc.strerror or exc})") from exc
    try:
        try:
            _take(fd)
        except BlockingIOError:
            holder = os.pread(fd, 64, 0).decode("ascii", "replace").strip() or "unknown"
            raise OutputError(f"output {folder}: another annotator run (PID {holder}) is "
                              f"writing there; wait for it to end, or choose another --out"
                              ) from None
        except OSError as exc:
            raise OutputError(f"output {folder}: cannot lock it ({exc.strerror or exc}); the "
                              f"filesystem may not support file locks") from exc
        os.ftruncate(fd, 0)
        os.pwrite(fd, f"{os.getpid()}\n".encode(), 0)
        try:
            yield
        finally:
            try:
                os.ftruncate(fd, 0)
            except OSError:
                pass
    finally:
        os.close(fd)  # releases the lock
