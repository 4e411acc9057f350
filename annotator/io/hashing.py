"""The SHA-256 of an input file, computed from the bytes its reader reads (issue 17).

The manifest records the plain SHA-256 (FIPS 180-4) of every input file, so that
``sha256sum`` verifies it. A :class:`HashingFile` is the reader's file: it keeps a SHA-256 and
the offset it has hashed up to, and so hashes the file while the reader reads it, instead of
a second read of the whole file.

* A read that starts at that offset advances the hash from the same buffer.
* A read that starts beyond it first reads and hashes the gap (bytes the reader skips, e.g.
  the rows a resumed run does not read again, or a Parquet file's magic number), so every
  byte is still read in order, once.
* A read behind it is served without hashing (those bytes are in the digest already).
* :meth:`HashingFile.sha256` reads and hashes whatever the reader left unread (the end of
  the file, a Parquet footer, chunks a resumed run skipped at the end), also after
  :meth:`close`, so the digest is always that of the whole file; then the file is closed.

``bytes_read`` counts every byte read from the file through the wrapper (the tests check it
is the file's size: nothing is read twice).

The hashing itself runs in a thread of its own, fed in file order (``hashlib`` releases the
interpreter lock while it hashes): the reader's thread reads and decodes while another core
hashes what it read, as the previous separate second read did, without reading the file
again. At most :data:`QUEUED` buffers wait to be hashed (the reader then waits); a buffer the
caller owns (``readinto``) is copied first. ``sha256()`` and ``close()`` wait for the thread.
"""

from __future__ import annotations

import hashlib
import io
import os
import queue
import threading
from pathlib import Path

#: bytes per read when the wrapper reads by itself (gaps and the end of the file)
BLOCK = 8 << 20
#: buffers at most waiting for the hashing thread
QUEUED = 2


class HashingFile(io.RawIOBase):
    """A read-only binary file that hashes what is read through it (see the module)."""

    def __init__(self, path: str | os.PathLike):
        super().__init__()
        self.path = Path(path)
        self.name = str(path)
        self._fh = open(self.path, "rb", buffering=0)
        self._sha = hashlib.sha256()
        self._hashed = 0  # bytes [0, _hashed) are in the digest
        self._pos = 0  # the position the next read starts at
        self._os_pos = 0  # where the operating system's file position is
        self._digest: str | None = None
        self._lock = threading.Lock()  # pyarrow may read from its own threads
        self._held: tuple[int, int, memoryview] | None = None  # see hold()
        self._queue: queue.Queue | None = None  # to the hashing thread, while it runs
        self._hasher: threading.Thread | None = None
        self._finishing = False  # sha256() runs: hash in the caller's thread
        self.bytes_read = 0

    # -- io.RawIOBase ---------------------------------------------------------------
    def readable(self) -> bool:
        return True

    def seekable(self) -> bool:
        return True

    def tell(self) -> int:
        return self._pos

    def seek(self, offset: int, whence: int = io.SEEK_SET) -> int:
        if whence == io.SEEK_SET:
            pos = offset
        elif whence == io.SEEK_CUR:
            pos = self._pos + offset
        elif whence == io.SEEK_END:
            pos = os.fstat(self._fh.fileno()).st_size + offset
        else:
            raise ValueError(f"invalid whence {whence}")
        if pos < 0:
            raise OSError(f"{self.path}: negative seek position {pos}")
        self._pos = pos
        return pos

    def readinto(self, buffer) -> int:
        view = memoryview(buffer).cast("B")
        with self._lock:
            if self._pos > self._hashed:
                self._hash_up_to(self._pos)
            n = self._read_into(self._pos, view)
            self._advance(self._pos, view[:n], owned=False)  # the caller may reuse it
            self._pos += n
            return n

    def read(self, size: int = -1) -> bytes:
        if size is None or size < 0:
            return self.readall()
        held = self._held
        if held is not None and held[0] <= self._pos and self._pos + size <= held[1]:
            start = self._pos - held[0]
            self._pos += size
            return held[2][start:start + size]  # no copy: pyarrow takes any buffer
        buf = bytearray(size)
        n = self.readinto(buf)
        del buf[n:]
        return bytes(buf) if n < 4096 else buf  # pyarrow takes any bytes-like object

    def readall(self) -> bytes:
        parts = []
        while piece := self.read(BLOCK):
            parts.append(piece)
        return b"".join(parts)

    def close(self) -> None:
        self._stop_hasher()
        if not self.closed:
            self._fh.close()
        super().close()

    def hold(self, start: int, end: int) -> None:
        """Read ``[start, end)`` now, in one read (hashed in order, gap first), and serve
        reads that fall inside it from memory until :meth:`release`: e.g. a Parquet row
        group, whose column chunks pyarrow's threads then read in any order, with no byte
        read twice. Memory: that range."""
        with self._lock:
            if start > self._hashed:
                self._hash_up_to(start)
            buf = memoryview(bytearray(max(end - start, 0)))
            n = self._read_into(start, buf)
            self._advance(start, buf[:n])
            self._held = (start, start + n, buf[:n])

    def release(self) -> None:
        """Forget the range :meth:`hold` read."""
        self._held = None

    # -- the digest -----------------------------------------------------------------
    def sha256(self) -> str:
        """The hex SHA-256 of the whole file: what was not read yet is read and hashed now
        (the file is opened again if the reader closed it), and the file is closed."""
        with self._lock:
            self._finishing = True
            self._stop_hasher()  # what it was given is in the digest; the rest is hashed here
            if self._digest is None:
                if self._fh.closed:
                    self._fh = open(self.path, "rb", buffering=0)
                    self._os_pos = 0
                try:
                    self._hash_up_to(None)
                finally:
                    self._fh.close()
                self._digest = self._sha.hexdigest()
        self.close()
        return self._digest

    # -- internals (called with the lock held) --------------------------------------
    def _read_into(self, pos: int, view: memoryview) -> int:
        if pos != self._os_pos:
            self._fh.seek(pos)
        done = 0
        while done < len(view):  # a raw read may return less than asked
            n = self._fh.readinto(view[done:])
            if not n:
                break
            done += n
        self._os_pos = pos + done
        self.bytes_read += done
        return done

    def _advance(self, pos: int, data: memoryview, owned: bool = True) -> None:
        """Hash the part of ``data`` (read at ``pos <= _hashed``) beyond ``_hashed``: in the
        hashing thread while the file is open (a copy unless ``owned``: no one writes into
        ``data`` afterwards), else here."""
        end = pos + len(data)
        if end > self._hashed:
            new = data[self._hashed - pos:]
            if self._finishing:
                self._sha.update(new)  # sha256(): the rest, in this thread
            else:
                if self._hasher is None:
                    self._queue = queue.Queue(maxsize=QUEUED)
                    self._hasher = threading.Thread(target=_hash_from, args=(self._sha,
                                                                             self._queue),
                                                    name="annotator-input-hash", daemon=True)
                    self._hasher.start()
                self._queue.put(new if owned else bytes(new))
            self._hashed = end

    def _stop_hasher(self) -> None:
        """Wait until the hashing thread has hashed all it was given, and end it."""
        if self._hasher is not None:
            self._queue.put(None)
            self._hasher.join()
            self._hasher = self._queue = None

    def _hash_up_to(self, until: int | None) -> None:
        """Read and hash ``[_hashed, until)`` (to the end of the file for ``None``)."""
        while until is None or self._hashed < until:
            want = BLOCK if until is None else min(BLOCK, until - self._hashed)
            buf = memoryview(bytearray(want))  # a new one each time: the thread may hash it
            n = self._read_into(self._hashed, buf)
            if not n:
                return
            self._advance(self._hashed, buf[:n])


def _hash_from(sha, pending: queue.Queue) -> None:
    """The hashing thread: ``sha.update`` with each buffer in turn, until ``None``."""
    while (data := pending.get()) is not None:
        sha.update(data)
