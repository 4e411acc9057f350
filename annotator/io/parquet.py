"""Parquet input: bounded-memory streaming, exact chunks, verified pages.

* ``ParquetFile.iter_batches`` one row group at a time (bounded memory), re-cut to exactly
  ``chunk_rows`` rows, so chunk ``k`` always holds rows ``[k * n, (k + 1) * n)``.
* **Page checksums** (the optional CRC-32 of each page, Apache Parquet format, ``PageHeader.crc``)
  are verified where the writer stored them (``page_checksum_verification``). A row group whose
  pages fail the check, or cannot be decoded at all, refuses the file: one line naming the file
  and the rows of that row group (1-based), so no value of a damaged page is ever written.
  The run stops there (exit 2); parts already committed stay, and ``--resume`` carries on once
  the file is replaced by a good copy. A file written without page checksums cannot be checked
  this way (annotator's own outputs always carry them).
* A file whose schema repeats a column name is refused, naming the file and the column.
* **Checksum in the same pass** (issue 17): the footer is read on its own, and pyarrow reads
  the row groups through a :class:`~annotator.io.hashing.HashingFile`, which hashes the bytes
  as they go by; :meth:`ParquetReader.sha256` adds what was not read (the footer, and on
  ``--resume`` nothing else: skipped row groups are hashed when the first read passes them).
  Each row group's bytes are read in one read (``HashingFile.hold``) and pyarrow's threads
  decode its column chunks from that copy, in any order, so no byte is read twice; memory:
  one row group's compressed bytes.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterator

import pyarrow as pa
import pyarrow.parquet as pq

from ..errors import InputError
from .hashing import HashingFile

PARQUET_SUFFIXES = (".parquet", ".pq", ".parq")


class ParquetReader:
    """Chunks of one Parquet file.

    :param checksum: hash the file while reading it (:meth:`sha256`); ``False`` for a reader
        of one chunk in the middle of the file (a Dask worker), which would otherwise read
        everything before its chunk to hash it.
    """

    def __init__(self, source, *, checksum: bool = True):
        self.source = source
        self._hashing = metadata = None
        try:
            if checksum:
                # The footer first, read on its own: through the hashing file it would be a
                # read far beyond what is hashed, which would hash the whole file at once.
                metadata = pq.read_metadata(source.path)
                self._hashing = HashingFile(source.path)
            # pre_buffer=True (pyarrow's default) keeps every row group read so far in memory
            # while iter_batches runs: memory would grow with the file (measured: ~20 MB per
            # 250k-row chunk). Without it, memory stays flat.
            where = source.path if self._hashing is None else self._hashing
            self._file = pq.ParquetFile(where, metadata=metadata, pre_buffer=False,
                                        page_checksum_verification=True)
            self.schema = self._file.schema_arrow
        except Exception as exc:
            if self._hashing is not None:
                self._hashing.close()
            raise InputError(f"input {source.path}: not a readable Parquet file: {exc}") from exc
        repeated = [name for name, n in Counter(self.schema.names).items() if n > 1]
        if repeated:
            raise InputError(f"input {source.path}: column name {repeated[0]!r} appears "
                             f"{self.schema.names.count(repeated[0])} times; rename all but one")

    def estimate_rows(self) -> int:
        return self._file.metadata.num_rows

    def sha256(self) -> str:
        """The SHA-256 of the whole file (what the chunks did not read is read now)."""
        if self._hashing is None:
            raise ValueError("a reader opened with checksum=False has no checksum")
        return self._hashing.sha256()

    def _batches(self, start_row: int, batch_rows: int) -> Iterator[pa.RecordBatch]:
        """Batches of rows from ``start_row`` on, one row group at a time."""
        meta = self._file.metadata
        seen = 0
        for g in range(meta.num_row_groups):
            n = meta.row_group(g).num_rows
            if seen + n <= start_row:
                seen += n
                continue
            skip = max(start_row - seen, 0)
            try:
                if self._hashing is not None:
                    # the row group's bytes in one read, hashed in order: pyarrow's threads
                    # read its column chunks in any order, so they read from this copy
                    self._hashing.hold(*_byte_range(meta.row_group(g)))
                for batch in self._file.iter_batches(batch_size=batch_rows, row_groups=[g]):
                    if skip >= batch.num_rows:
                        skip -= batch.num_rows
                        continue
                    if skip:
                        batch = batch.slice(skip)
                        skip = 0
                    yield batch
            except Exception as exc:  # a checksum mismatch or an undecodable page
                why = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
                raise InputError(
                    f"input {self.source.path}: unreadable Parquet data in rows {seen + 1} to "
                    f"{seen + n} (row group {g}: {why}); the file is refused, replace it with a "
                    f"good copy and rerun with --resume") from exc
            finally:
                if self._hashing is not None:
                    self._hashing.release()
            seen += n

    def chunks(self, chunk_rows: int, start_chunk: int = 0, target: pa.Schema | None = None
               ) -> Iterator:
        from .readers import Chunk

        index = start_chunk
        pending: list[pa.RecordBatch] = []
        filled = 0
        for batch in self._batches(start_chunk * chunk_rows, chunk_rows):
            while batch.num_rows:
                take = min(chunk_rows - filled, batch.num_rows)
                pending.append(batch.slice(0, take))
                batch = batch.slice(take)
                filled += take
                if filled == chunk_rows:
                    table = pa.Table.from_batches(pending, schema=self.schema)
                    yield Chunk(self.source, index, self._conform(table, target))
                    index += 1
                    pending, filled = [], 0
        if filled:
            table = pa.Table.from_batches(pending, schema=self.schema)
            yield Chunk(self.source, index, self._conform(table, target))

    def _conform(self, table: pa.Table, target: pa.Schema | None) -> pa.Table:
        table = table.combine_chunks()
        if target is None or table.schema.equals(target, check_metadata=False):
            return table
        try:
            return table.select(target.names).cast(target)
        except Exception as exc:
            raise InputError(
                f"input {self.source.path}: columns do not match the first input's types "
                f"({exc})"
            ) from exc


def _byte_range(row_group) -> tuple[int, int]:
    """Where a row group's column chunks lie in the file: [first byte, end)."""
    start, end = None, 0
    for i in range(row_group.num_columns):
        col = row_group.column(i)
        first = col.data_page_offset
        if col.has_dictionary_page and col.dictionary_page_offset:  # some writers leave 0
            first = min(first, col.dictionary_page_offset)
        start = first if start is None else min(start, first)
        end = max(end, first + col.total_compressed_size)
    return start or 0, end
