"""CSV and CSV.gz catalogues: a header line, then one row per physical line.

Reading rules (docs/csv.md describes them for users):

* The text is cut into blocks of whole lines; each block is cleaned, then parsed by
  ``pyarrow.csv`` with the column types fixed in advance, so chunk ``k`` always holds the same
  rows (resume relies on it).
* Cleaning, per block, cheap checks first and a per-line pass only when one fails:
  bytes that are not valid in the input encoding set their line aside (the raw bytes are kept,
  backslash-escaped); a line whose quotes do not close on that line sets that line aside and
  reading resumes on the next one (RFC 4180, section 2: a quoted field that spans lines is not
  read; its lines are set aside, never joined); empty lines are not rows.
* Types: the columns the job reads as numbers are float64 whatever their text looks like;
  ``column_types`` overrides; every other column takes the widest type its values need over the
  whole file (int64 -> float64 -> string; bool or text -> string), found in a first pass
  (skipped when the first block is the whole file). The pass parses each block as the main
  pass would and keeps the rows on disk (:class:`ParsedBlocks`); the main pass reads them back
  when the types held, so the text is parsed once; else it parses again with the final types.
* A row with the wrong number of fields, or with a cell that cannot become its column's type,
  is set aside with its physical line number (header = line 1), a reason and its raw text.
"""

from __future__ import annotations

import codecs
import gzip
import io
import os
import shutil
import tempfile
import threading
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv

from ..errors import ConfigError, InputError
from .hashing import HashingFile
from .missing import DEFAULT_MISSING_TOKENS
from .readers import Chunk, Source

CSV_BLOCK_BYTES = 8 << 20
SAMPLE_BYTES = 4 << 20
QUOTE = b'"'
TYPE_BY_NAME = {
    "int8": pa.int8(),
    "int16": pa.int16(),
    "int32": pa.int32(),
    "int64": pa.int64(),
    "float32": pa.float32(),
    "float64": pa.float64(),
    "bool": pa.bool_(),
    "string": pa.string(),
}
_INT64_LIMIT = float(2 ** 63)


def _open_binary(path: Path, raw=None):
    """The file's bytes (decompressed for .gz); ``raw``: the file on disk, already open
    (a HashingFile, which the decompressor leaves open)."""
    raw = open(path, "rb") if raw is None else raw
    if path.name.lower().endswith(".gz"):
        return gzip.GzipFile(fileobj=raw, mode="rb")
    return raw


def iter_line_blocks(path: Path, block_bytes: int, where: list | None = None, raw=None
                     ) -> Iterator[bytearray]:
    """Blocks of whole lines (each ends with a newline, except perhaps the last), read into
    a fresh buffer each (one copy from the file; pyarrow reads the buffer without another).

    ``where``: if given, ``where[0]`` is kept at the bytes of the file on disk read so far
    (of the compressed file for .gz), for progress (``Chunk.bytes_read``).
    ``raw``: see :func:`_open_binary` (the reader's HashingFile, for the checksum).
    """
    with _open_binary(path, raw) as fh:
        tail = b""
        while True:
            buf = bytearray(len(tail) + block_bytes)
            buf[: len(tail)] = tail
            n = fh.readinto(memoryview(buf)[len(tail):])
            if where is not None:  # progress: position in the file on disk
                where[0] = getattr(fh, "fileobj", fh).tell()
            if not n:
                if tail:
                    yield bytearray(tail)
                return
            del buf[len(tail) + n:]
            cut = buf.rfind(b"\n")
            if cut < 0:
                tail = bytes(buf)
                block_bytes *= 2
                continue
            tail = bytes(buf[cut + 1:])
            del buf[cut + 1:]
            yield buf


def _first_block(path: Path, size: int) -> tuple[bytes, bool]:
    """The first ``size`` bytes cut after their last newline (the first line whole, however
    long), and whether that is the whole file."""
    with _open_binary(path) as fh:
        data = fh.read(size)
        more = fh.read(1)
        if not more:
            return data, True
        data += more
        while b"\n" not in data:
            piece = fh.read(size)
            if not piece:
                return data, True
            data += piece
        return data[: data.rfind(b"\n") + 1], False


def check_encoding(encoding: str, key: str = "[input].encoding") -> str:
    """The codec's canonical name; refused unless ASCII-compatible (lines are cut on bytes)."""
    try:
        info = codecs.lookup(encoding)
    except LookupError:
        raise ConfigError(f"{key}: {encoding!r} is not a known text encoding") from None
    probe = 'a,"1"\r\n'
    try:
        ok = probe.encode(info.name) == probe.encode("ascii")
    except UnicodeError:
        ok = False
    if not ok:
        raise ConfigError(f"{key}: {encoding!r} is not ASCII-compatible (lines and delimiters "
                          f"must be single ASCII bytes); convert the file to UTF-8 first")
    return info.name


def widest(a: pa.DataType, b: pa.DataType) -> pa.DataType:
    """The narrowest of null < int64 < float64 < string that holds both (bool only with
    itself or null)."""
    if a.equals(b) or pa.types.is_null(b):
        return a
    if pa.types.is_null(a):
        return b
    numeric = (pa.int64(), pa.float64())
    if a in numeric and b in numeric:
        return pa.float64()
    return pa.string()


def _normal_type(col: pa.ChunkedArray | pa.Array) -> pa.DataType:
    """pyarrow's inferred type mapped onto our lattice; integers beyond int64 (which pyarrow
    reads as doubles) become string so no digit is lost."""
    typ = col.type
    if pa.types.is_null(typ) or pa.types.is_boolean(typ) or typ == pa.int64():
        return typ
    if pa.types.is_floating(typ):
        if len(col) - col.null_count:
            biggest = pc.max(pc.abs(col)).as_py()
            if biggest is not None and np.isfinite(biggest) and biggest >= _INT64_LIMIT and \
                    pc.all(pc.equal(col, pc.floor(col))).as_py():
                return pa.string()
        return pa.float64()
    return pa.string()


class ParsedBlocks:
    """The rows of a file's blocks as parsed by the first pass, kept in an unlinked temporary
    Arrow IPC file (never in memory) so that the main pass need not parse the text again
    when the types found over the whole file are the ones the blocks were parsed with.

    Per block it keeps (in memory) only its row count, its physical line count, its rows set
    aside and the file position after it (progress). Reading it back yields exactly what
    :meth:`CsvReader.parse_block` returned for each block, in order.
    """

    #: rows set aside held in memory at most; a messier file is parsed again instead
    MAX_REJECTED = 100_000
    #: share of the spill directory's free space (when created) the kept rows may take;
    #: beyond it they are dropped and the main pass parses the text again
    MAX_FREE_SHARE = 0.5

    def __init__(self, schema: pa.Schema, directory: str):
        self.schema = schema
        self.blocks: list[tuple[int, int, list, int]] = []
        self.n_rejected = 0
        #: held while one reader reads the rows back (another reader parses the text)
        self.in_use = threading.Lock()
        self.budget = int(shutil.disk_usage(directory).free * self.MAX_FREE_SHARE)
        self._fh = tempfile.TemporaryFile(prefix="annotator-csv-", dir=directory)
        self._writer = pa.ipc.new_stream(self._fh, schema)

    @classmethod
    def create(cls, schema: pa.Schema) -> ParsedBlocks | None:
        """A new one, or None where rows cannot be kept on disk (no temporary directory, or
        one in memory (tmpfs), where kept rows would grow the memory used with the file;
        ``ANNOTATOR_CSV_SPILL=0`` turns keeping off)."""
        if os.environ.get("ANNOTATOR_CSV_SPILL") == "0":
            return None
        directory = os.environ.get("ANNOTATOR_CSV_SPILL_DIR") or tempfile.gettempdir()
        try:
            if _in_memory_fs(directory):
                return None
            return cls(schema, directory)
        except OSError:
            return None

    def add(self, table: pa.Table, rejected: list, n_lines: int, where: int) -> bool:
        """Keep one block; False (and nothing kept) when it cannot be kept (disk full, too
        many rows set aside): then the caller drops this object."""
        self.n_rejected += len(rejected)
        if self.n_rejected > self.MAX_REJECTED:
            return False
        try:
            if table.num_rows:
                self._writer.write_table(table)
            if self._fh.tell() > self.budget:
                return False  # the disk would fill: parse the text again instead
        except (OSError, pa.ArrowException):
            return False
        self.blocks.append((table.num_rows, n_lines, rejected, where))
        return True

    def finish(self) -> None:
        self._writer.close()
        self._fh.flush()

    def close(self) -> None:
        self._fh.close()

    def __iter__(self) -> Iterator[tuple[pa.Table, list, int, int]]:
        """(table, rows set aside, physical lines, file position after the block)."""
        self._fh.seek(0)
        batches = iter(pa.ipc.open_stream(self._fh))
        for rows, n_lines, rejected, where in self.blocks:
            got: list[pa.RecordBatch] = []
            have = 0
            while have < rows:
                batch = next(batches, None)
                if batch is None:
                    break
                got.append(batch)
                have += batch.num_rows
            if have != rows:  # write_table writes each block's batches whole
                raise InputError(f"the first pass's kept rows end early ({have} of {rows} "
                                 f"rows of a block read back)")
            yield pa.Table.from_batches(got, self.schema), list(rejected), n_lines, where


def _in_memory_fs(directory: str, mounts: str = "/proc/mounts") -> bool:
    """Whether ``directory`` is on a file system held in memory (tmpfs, ramfs), by the
    longest mount point holding it in ``mounts`` (Linux); False where that is unknown."""
    try:
        with open(mounts, encoding="utf-8", errors="replace") as fh:
            table = [line.split()[1:3] for line in fh if len(line.split()) >= 3]
    except OSError:
        return False
    where = os.path.realpath(directory)
    best, kind = "", ""
    for point, fstype in table:
        point = point.replace("\\040", " ")
        inside = where == point or where.startswith(point.rstrip("/") + "/")
        if inside and len(point) >= len(best):
            best, kind = point, fstype
    return kind in ("tmpfs", "ramfs")


# The first pass's parsed blocks of the last file typed in this process, for the reader of
# the main pass (the engines open their own reader): one file's at most, so the temporary
# disk space is bounded by one input (a dropped one is freed once no reader reads it: the
# temporary file closes with its last reference).
_PARSED: dict = {}


def _keep_parsed(key, parsed: ParsedBlocks | None) -> None:
    _PARSED.clear()
    if parsed is not None:
        _PARSED[key] = parsed


class CsvReader:
    """CSV / CSV.gz with a header line; see the module docstring for what is set aside.

    :param numeric: columns the job reads as numbers (float64 unless ``column_types`` says
        otherwise). The plan passes them; without them every column is typed by its values.
    :param missing_tokens: cell texts that mean "no value" (in every column).
    """

    def __init__(self, source: Source, *, delimiter: str = ",", column_types: dict | None = None,
                 encoding: str = "utf-8", missing_tokens=DEFAULT_MISSING_TOKENS,
                 numeric=(), block_bytes: int | None = None, sample_bytes: int | None = None):
        # module constants read at call time, so tests can make blocks small
        block_bytes = block_bytes or CSV_BLOCK_BYTES
        sample_bytes = sample_bytes or SAMPLE_BYTES
        self.source = source
        self.delimiter = delimiter
        self.block_bytes = block_bytes
        self.encoding = check_encoding(encoding)
        self.utf8 = self.encoding == "utf-8"
        self.missing_tokens = list(missing_tokens)
        self.column_types = dict(column_types or {})
        self._delim_b = delimiter.encode()
        self._hashing: HashingFile | None = None  # set by chunks()
        try:
            first, whole = _first_block(source.path, sample_bytes)
        except (OSError, EOFError, gzip.BadGzipFile) as exc:
            raise InputError(f"input {source.path}: cannot read: {exc}") from exc
        if not first.strip():
            raise InputError(f"input {source.path}: empty file (a header line is needed)")
        header, newline, body = first.partition(b"\n")
        self.header = header.rstrip(b"\r")
        if self.utf8 and self.header.startswith(codecs.BOM_UTF8):
            self.header = self.header[len(codecs.BOM_UTF8):]  # a byte-order mark is no name
        try:
            text = self.header.decode(self.encoding)
        except UnicodeDecodeError as exc:
            raise InputError(f"input {source.path}: line 1 (the header): bytes not valid in "
                             f"{self.encoding} at byte {exc.start + 1}; set [input].encoding"
                             ) from None
        try:
            names = pacsv.read_csv(
                io.BytesIO(text.encode() + b"\n"),
                parse_options=pacsv.ParseOptions(delimiter=delimiter),
            ).column_names
        except pa.ArrowInvalid as exc:
            raise InputError(f"input {source.path}: unreadable header line: {exc}") from exc
        seen: set[str] = set()
        for name in names:
            if name in seen:
                raise InputError(f"input {source.path}: the header repeats the column name "
                                 f"{name!r}")
            seen.add(name)
        self.names = names
        unknown = set(self.column_types) - set(names)
        if unknown:
            raise InputError(
                f"input {source.path}: [input].column_types names column "
                f"{sorted(unknown)[0]!r}, which is not in the header"
            )
        # Whether the first block is the whole file: then its types are the whole file's.
        self._sample_is_whole = whole
        self._sample_body = body if newline else b""
        self._sample_lines = max(self._sample_body.count(b"\n"), 1)
        self._sample_len = len(first)
        self._records = 0
        sample_types, _ = self._infer(self._sample_body, 2, names)
        #: data rows (records) of the whole file, when a pass has counted them
        self.exact_rows = self._records if self._sample_is_whole else None
        self.sample_types = sample_types
        self.schema = self._schema(set(numeric), sample_types)

    # -- types ------------------------------------------------------------------------
    def _schema(self, numeric: set[str], inferred: dict[str, pa.DataType],
                final: bool = False) -> pa.Schema:
        fields = []
        for name in self.names:
            if name in self.column_types:
                typ = TYPE_BY_NAME[self.column_types[name]]
            elif name in numeric:
                typ = pa.float64()
            else:
                typ = inferred.get(name, pa.null())
                if pa.types.is_null(typ):
                    # No value seen. In the first block: numbers are the likelier use (an
                    # empty error column an annotator may read); in the whole file, when no
                    # annotator reads it as a number: text, which holds anything.
                    typ = pa.string() if final else pa.float64()
            fields.append(pa.field(name, typ))
        return pa.schema(fields)

    def _infer(self, body, first_line: int, columns: list[str],
               known: dict | None = None) -> tuple[dict, int]:
        """Types of ``columns`` in one block, and the block's physical line count; counts its
        records in ``self._records``. With ``known`` types, the block is first read with them
        (cheap); pyarrow's inference runs only when a value does not fit."""
        clean, numbers, rejected, n_lines = self._clean(body, first_line)
        self._records += len(rejected) + len(numbers)
        if not columns:
            return {}, n_lines
        if not clean:
            return {n: pa.null() for n in columns}, n_lines
        read = pacsv.ReadOptions(column_names=self.names, block_size=len(clean) + 1,
                                 use_threads=False)
        parse = pacsv.ParseOptions(delimiter=self.delimiter, invalid_row_handler=lambda r: "skip")
        if known:
            fixed = {n: t for n, t in known.items() if not pa.types.is_null(t)}
            try:
                table = pacsv.read_csv(
                    pa.BufferReader(pa.py_buffer(clean)), read_options=read, parse_options=parse,
                    convert_options=pacsv.ConvertOptions(
                        include_columns=columns, column_types=fixed,
                        null_values=self.missing_tokens, strings_can_be_null=True,
                        quoted_strings_can_be_null=True))
                return {n: (known[n] if n in fixed else _normal_type(table.column(n)))
                        for n in columns}, n_lines
            except pa.ArrowInvalid:
                pass  # some value needs a wider type: infer this block
        table = pacsv.read_csv(
            pa.BufferReader(pa.py_buffer(clean)), read_options=read, parse_options=parse,
            convert_options=pacsv.ConvertOptions(
                include_columns=columns, null_values=self.missing_tokens,
                strings_can_be_null=True, quoted_strings_can_be_null=True),
        )
        return {n: _normal_type(table.column(n)) for n in columns}, n_lines

    def resolve_types(self, numeric) -> pa.Schema:
        """The schema for a job that reads ``numeric`` as numbers: those float64, the rest
        typed over the whole file: one pass over the file when a column's type is not yet
        certain (text is certain). No pass when the first block is the whole file or
        ``column_types`` fixes every other column.

        The pass parses each block in full with the types found so far, as the main pass
        would, and keeps the rows (:class:`ParsedBlocks`, on disk) for the main pass, which
        then reads them instead of the text. Where a value does not fit (a type widens) or a
        block needs the careful path, the kept rows are dropped and the rest of the pass
        only types the uncertain columns (pyarrow's inference for that block); the main pass
        then parses the file again with the final types."""
        numeric = set(numeric)
        rest = [n for n in self.names if n not in numeric and n not in self.column_types]
        inferred = {n: self.sample_types[n] for n in rest}
        open_ = [n for n in rest if not pa.types.is_string(inferred[n])]
        if not self._sample_is_whole and open_:
            line = 2
            self._records = 0
            guess = self._schema(numeric, inferred, final=True)
            parsed = ParsedBlocks.create(guess)
            where = [0]
            try:
                for block in self._body_blocks(where):
                    if parsed is not None:
                        got = self._parse_guessed(block, line, guess, open_, inferred)
                        if got is not None:  # the block fits the types found so far
                            line += got[2]
                            if not parsed.add(*got, where[0]):
                                parsed.close()  # cannot keep it: parse again later
                                parsed = None
                            continue
                        parsed.close()
                        parsed = None
                    got, n_lines = self._infer(block, line, open_,
                                               known={n: inferred[n] for n in open_})
                    line += n_lines
                    for n in open_:
                        inferred[n] = widest(inferred[n], got[n])
                    open_ = [n for n in open_ if not pa.types.is_string(inferred[n])]
                    if not open_:
                        break
                else:
                    self.exact_rows = self._records
            except (OSError, EOFError, gzip.BadGzipFile, pa.ArrowException) as exc:
                if parsed is not None:
                    parsed.close()
                raise InputError(f"input {self.source.path}: unreadable near line {line}: "
                                 f"{exc}") from exc
            if parsed is not None:
                parsed.finish()
            _keep_parsed(self._parsed_key(), parsed)
        self.schema = self._schema(numeric, inferred, final=True)
        return self.schema

    def _parse_guessed(self, block, line: int, guess: pa.Schema, open_: list[str],
                       inferred: dict) -> tuple[pa.Table, list[dict], int] | None:
        """The block parsed as the main pass would with the types ``guess``, when it shows
        that no uncertain column (``open_``) widens; None when it does not show it (a value
        does not fit, a column with no value so far has one, quotes need the careful path):
        the caller types that block as before and drops the kept rows."""
        clean, numbers, rejected, n_lines = self._clean(block, line, quick=True)
        if clean:
            table, invalid, cast_failed = self._read_typed(clean, guess)
            clean, numbers, rejected, n_lines = self._numbered_again(
                block, line, (clean, numbers, rejected, n_lines), table.num_rows + len(invalid))
            if cast_failed or table.num_rows + len(invalid) != len(numbers):
                return None
            for n in open_:
                if pa.types.is_null(inferred[n]) and \
                        table.column(n).null_count != table.num_rows:
                    return None  # values where the first block had none: infer them
        self._records += len(rejected) + len(numbers)  # counted as _infer counts them
        if clean:
            table, rejected = self._finish(table, invalid, numbers, guess, False, rejected)
        else:
            table = guess.empty_table()
        return table, rejected, n_lines

    def _parsed_key(self) -> tuple:
        st = os.stat(self.source.path)
        return (str(Path(self.source.path).resolve()), st.st_size, st.st_mtime_ns,
                self.delimiter, self.encoding, tuple(self.missing_tokens), self.block_bytes,
                tuple(sorted(self.column_types.items())))

    def _kept_blocks(self, target: pa.Schema) -> ParsedBlocks | None:
        """The first pass's rows of this file, if it was typed in this process and they
        were parsed with ``target``'s types."""
        if not _PARSED:
            return None
        try:
            parsed = _PARSED.get(self._parsed_key())
        except OSError:
            return None
        return parsed if parsed is not None and parsed.schema.equals(target) else None

    def holds_numbers(self, column: str) -> bool:
        """Whether the first block's ``column`` is empty or holds at least one number."""
        typ = self.sample_types.get(column, pa.null())
        if not pa.types.is_string(typ):
            return True
        clean, _, _, _ = self._clean(self._sample_body, 2)
        table = pacsv.read_csv(
            pa.BufferReader(pa.py_buffer(clean)),
            read_options=pacsv.ReadOptions(column_names=self.names, block_size=len(clean) + 1),
            parse_options=pacsv.ParseOptions(delimiter=self.delimiter,
                                              invalid_row_handler=lambda r: "skip"),
            convert_options=pacsv.ConvertOptions(
                include_columns=[column], column_types={column: pa.string()},
                null_values=self.missing_tokens, strings_can_be_null=True))
        values = table.column(column).drop_null().slice(0, 1000).combine_chunks()
        return len(values) == 0 or len(_failing_cells(values, pa.float64())) < len(values)

    def estimate_rows(self) -> int | None:
        if self.source.path.name.lower().endswith(".gz") and not self._sample_is_whole:
            return None
        if self._sample_is_whole:
            return self._sample_body.count(b"\n") + \
                (1 if self._sample_body and not self._sample_body.endswith(b"\n") else 0)
        per_line = max(self._sample_len / (self._sample_lines + 1), 1.0)
        return int(self.source.size_bytes / per_line)

    # -- cleaning -----------------------------------------------------------------------
    def _reject(self, line: int, reason: str, raw: bytes) -> dict:
        return {"source": str(self.source.path), "row": int(line),
                "reason": f"line {line}: {reason}",
                "raw": raw.rstrip(b"\r").decode(self.encoding, errors="backslashreplace")
                if self.utf8 else _decode_lenient(raw.rstrip(b"\r"), self.encoding)}

    def _clean(self, block, first_line: int, quick: bool = False
               ) -> tuple[bytes, np.ndarray, list[dict], int]:
        """UTF-8 text of the block's readable lines, their physical line numbers, the lines
        set aside, and the block's count of physical lines. Cheap whole-block checks first;
        the per-line pass only for a block that fails one.

        ``quick``: for a block without quotes, number its lines as if none were empty (no
        search for line ends); the caller asks again without ``quick`` when the rows parsed
        are fewer than those numbers (pyarrow skips empty lines), and gets the same text."""
        if not block:
            return b"", np.zeros(0, dtype=np.int64), [], 0
        arr = np.frombuffer(block, dtype=np.uint8)
        decoded_ok = True
        if not block.isascii():
            try:
                text = block.decode(self.encoding)
                if not self.utf8:
                    block = text.encode("utf-8")
                    arr = np.frombuffer(block, dtype=np.uint8)
            except UnicodeDecodeError:
                decoded_ok = False
        if quick and decoded_ok and block.find(QUOTE) < 0:
            n_lines = int(np.count_nonzero(arr == 10)) + (0 if block.endswith(b"\n") else 1)
            return block, first_line + np.arange(n_lines, dtype=np.int64), [], n_lines
        ends = np.flatnonzero(arr == 10)
        n_lines = len(ends) + (0 if len(ends) and ends[-1] == len(arr) - 1 else 1)
        odd_quotes = False
        if decoded_ok and block.find(QUOTE) >= 0:
            odd_quotes = bool(_odd_quote_lines(arr, ends).any())
        # empty lines ("" or a lone "\r") are not rows: then their numbers must be skipped
        bounds = np.concatenate((np.array([-1], dtype=np.int64), ends,
                                 np.array([len(arr)] if n_lines > len(ends) else [],
                                          dtype=np.int64)))
        lengths = np.diff(bounds) - 1
        stops = bounds[1:]
        blank = (lengths == 0) | ((lengths == 1) & (arr[np.maximum(stops - 1, 0)] == 13))
        if decoded_ok and not odd_quotes:
            # pyarrow skips empty lines itself: only their numbers need leaving out
            numbers = first_line + (np.flatnonzero(~blank) if blank.any()
                                    else np.arange(n_lines, dtype=np.int64))
            return block, numbers, [], n_lines
        clean, numbers, rejected = self._clean_lines(block, first_line, decoded_ok)
        return clean, numbers, rejected, n_lines

    def _numbered_again(self, block, first_line: int, cleaned: tuple, rows: int) -> tuple:
        """``cleaned`` from ``_clean(..., quick=True)``, or, when pyarrow read fewer ``rows``
        than it numbered and the quick numbering was the one used (no quote, nothing set
        aside), the block cleaned with its empty lines found: the same text, exact numbers."""
        _, numbers, rejected, _ = cleaned
        if rows == len(numbers) or rejected or block.find(QUOTE) >= 0:
            return cleaned
        return self._clean(block, first_line)

    def _clean_lines(self, block: bytes, first_line: int, decoded_ok: bool,
                     state_machine: bool = False):
        """The per-line pass: only for blocks that failed a cheap check."""
        lines = block.split(b"\n")
        if lines and lines[-1] == b"":
            lines.pop()
        keep: list[bytes] = []
        numbers: list[int] = []
        rejected: list[dict] = []
        for offset, line in enumerate(lines):
            number = first_line + offset
            bare = line.rstrip(b"\r")
            if not bare:
                continue  # an empty line is not a row
            if not decoded_ok and not line.isascii():
                try:
                    text = line.decode(self.encoding)
                except UnicodeDecodeError as exc:
                    rejected.append(self._reject(
                        number, f"bytes not valid in {self.encoding} at byte {exc.start + 1} of "
                        f"the line (raw bytes kept escaped; set [input].encoding if the file "
                        f"is in another encoding)", line))
                    continue
                if not self.utf8:
                    line = text.encode("utf-8")
            if QUOTE in line:
                unclosed = (line.count(QUOTE) % 2 == 1) or \
                    (state_machine and _opens_unclosed_quote(bare, self._delim_b))
                if unclosed:
                    rejected.append(self._reject(
                        number, "a quoted field is not closed on this line (a field may not "
                        "span lines; RFC 4180 section 2)", line))
                    continue
            keep.append(line)
            numbers.append(number)
        text = b"\n".join(keep) + (b"\n" if keep else b"")
        return text, np.asarray(numbers, dtype=np.int64), rejected

    # -- parsing ------------------------------------------------------------------------
    def _read(self, clean, types: dict, invalid: list):
        def on_invalid(row):
            invalid.append((row.number, row.text))
            return "skip"

        return pacsv.read_csv(
            pa.BufferReader(pa.py_buffer(clean)),
            read_options=pacsv.ReadOptions(column_names=self.names, use_threads=False,
                                           block_size=len(clean) + 1),
            parse_options=pacsv.ParseOptions(delimiter=self.delimiter,
                                              invalid_row_handler=on_invalid),
            convert_options=pacsv.ConvertOptions(
                column_types=types, null_values=self.missing_tokens, strings_can_be_null=True,
                quoted_strings_can_be_null=True),
        )

    def parse_block(self, block, first_line: int, target: pa.Schema
                    ) -> tuple[pa.Table, list[dict], int]:
        """Parse one block of whole lines that starts at physical line ``first_line``;
        returns the rows read, the rows set aside and the block's count of physical lines.

        A column whose target type is a list (another input, Parquet, has it so) is read as
        text and converted by :func:`text_to_list` (``;``-separated numbers)."""
        if not any(_is_list(f.type) for f in target):
            return self._parse_block(block, first_line, target)
        table, rejected, n_lines = self._parse_block(block, first_line, _lists_as_text(target))
        for i, f in enumerate(target):
            if _is_list(f.type):
                table = table.set_column(i, f.name, text_to_list(table.column(f.name), f.type))
        return table, rejected, n_lines

    def _parse_block(self, block, first_line: int, target: pa.Schema
                     ) -> tuple[pa.Table, list[dict], int]:
        clean, numbers, rejected, n_lines = self._clean(block, first_line, quick=True)
        if not clean:
            return target.empty_table(), rejected, n_lines
        table, invalid, cast_failed = self._read_typed(clean, target)
        clean, numbers, rejected, n_lines = self._numbered_again(
            block, first_line, (clean, numbers, rejected, n_lines), table.num_rows + len(invalid))
        if table.num_rows + len(invalid) != len(numbers):
            # A quote opened in the middle of a field swallowed later lines: find the lines
            # that leave a quote open with the exact rules, and read again without them.
            clean, numbers, rejected = self._clean_lines(block, first_line, False,
                                                         state_machine=True)
            if not clean:
                return target.empty_table(), rejected, n_lines
            table, invalid, cast_failed = self._read_typed(clean, target)
            if table.num_rows + len(invalid) != len(numbers):
                raise InputError(f"input {self.source.path}: lines {first_line} to "
                                 f"{first_line + n_lines - 1}: rows cannot be told apart "
                                 f"(unbalanced quotes)")
        table, rejected = self._finish(table, invalid, numbers, target, cast_failed, rejected)
        return table, rejected, n_lines

    def _read_typed(self, clean: bytes, target: pa.Schema):
        """(table, invalid rows, whether a cell failed its type: then all columns are text)."""
        invalid: list = []
        try:
            return self._read(clean, {f.name: f.type for f in target}, invalid), invalid, False
        except pa.ArrowInvalid:
            invalid = []
            return self._read(clean, {n: pa.string() for n in self.names}, invalid), \
                invalid, True

    def _finish(self, table, invalid, numbers, target, cast_failed, rejected):
        if invalid:
            bad_idx = np.asarray([num - 1 for num, _ in invalid], dtype=np.int64)
            for (num, text), idx in zip(invalid, bad_idx):
                n_fields = text.count(self.delimiter) + 1 if isinstance(text, str) else None
                line = int(numbers[idx])
                rejected.append({
                    "source": str(self.source.path), "row": line,
                    "reason": f"wrong number of fields: {n_fields}, expected "
                              f"{len(self.names)}",
                    "raw": text if isinstance(text, str) else str(text),
                })
            keep = np.ones(len(numbers), dtype=bool)
            keep[bad_idx] = False
            row_lines = numbers[keep]
        else:
            row_lines = numbers
        if cast_failed:
            strings = table
            table, bad = self._cast_with_rejects(strings, target)
            for i, why in bad:
                line = int(row_lines[i])
                raw = self.delimiter.join(
                    "" if v is None else str(v) for v in _row_values(strings, i))
                rejected.append({"source": str(self.source.path), "row": line,
                                 "reason": why, "raw": raw})
        rejected.sort(key=lambda r: r["row"])
        return table, rejected

    def _cast_with_rejects(self, table: pa.Table, target: pa.Schema):
        """Cast string columns to the target types; rows that fail are removed and reported.
        Bad cells are found with pyarrow's own conversion, in pieces, so what is accepted here
        is exactly what the fast path accepts."""
        bad_reason: dict[int, str] = {}
        for f in target:
            if pa.types.is_string(f.type):
                continue
            col = table.column(f.name).combine_chunks()
            for i in _failing_cells(col, f.type):
                bad_reason.setdefault(int(i), _why(f, col[int(i)].as_py()))
        keep = np.ones(table.num_rows, dtype=bool)
        keep[list(bad_reason)] = False
        kept = table.filter(pa.array(keep))
        try:
            kept = kept.cast(target)
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError) as exc:
            raise InputError(f"input {self.source.path}: cannot convert columns: {exc}") from exc
        return kept, sorted(bad_reason.items())

    def _body_blocks(self, where: list | None = None, raw=None) -> Iterator[bytearray]:
        """The blocks after the header line (which may lack a newline); the first data line
        is physical line 2. ``where``, ``raw``: see :func:`iter_line_blocks`."""
        first = True
        for block in iter_line_blocks(self.source.path, self.block_bytes, where, raw):
            if first:
                first = False
                cut = block.find(b"\n")
                block = bytearray() if cut < 0 else block[cut + 1:]
            if block:
                yield block

    def _parsed_blocks(self, target: pa.Schema, where: list, raw=None
                       ) -> Iterator[tuple[pa.Table, list[dict], int]]:
        """Each block's (rows, rows set aside, physical lines), in order: the first pass's
        kept rows when they have ``target``'s types, else the text parsed now."""
        kept = self._kept_blocks(target)
        if kept is not None and kept.in_use.acquire(blocking=False):
            try:
                for table, rejected, n_lines, at in kept:
                    where[0] = at
                    yield table, rejected, n_lines
            finally:
                kept.in_use.release()
            for key, value in list(_PARSED.items()):  # read in full: free its disk space
                if value is kept:
                    del _PARSED[key]
            return
        line = 2
        for block in self._body_blocks(where, raw):
            table, rejected, n_lines = self.parse_block(block, line, target)
            line += n_lines
            yield table, rejected, n_lines

    def chunks(self, chunk_rows: int, start_chunk: int = 0, target: pa.Schema | None = None
               ) -> Iterator[Chunk]:
        target = target or self.schema
        if target.names != self.names:
            raise InputError(
                f"input {self.source.path}: header {self.names} does not match the first "
                f"input's columns {target.names}"
            )
        index = 0
        pending: list[pa.Table] = []
        pending_rows = 0
        pending_rejected: list[dict] = []
        line = 2
        # Progress (issue 16): file bytes read so far and before this block, so that a chunk
        # ending inside a block gets its share of it (Chunk.bytes_read).
        where, before = [0], 0
        try:
            # the checksum in the same pass (issue 17): blocks parsed now are read through
            # it; with the first pass's kept rows, sha256() reads the file's bytes at the end
            self._hashing = HashingFile(self.source.path)
            for table, rejected, n_lines in self._parsed_blocks(target, where, self._hashing):
                line += n_lines
                per_row = (where[0] - before) / max(n_lines, 1)  # progress
                before = where[0]
                pending.append(table)
                pending_rows += table.num_rows
                pending_rejected.extend(rejected)
                while pending_rows >= chunk_rows:
                    whole = pa.concat_tables(pending)
                    head, rest = whole.slice(0, chunk_rows), whole.slice(chunk_rows)
                    if index >= start_chunk:
                        yield Chunk(self.source, index, head.combine_chunks(), pending_rejected,
                                    bytes_read=int(where[0] - rest.num_rows * per_row))
                    pending_rejected = []
                    index += 1
                    pending = [rest] if rest.num_rows else []  # copied once, with its chunk
                    pending_rows = rest.num_rows
        except InputError:
            raise
        except (OSError, EOFError, gzip.BadGzipFile, pa.ArrowException) as exc:
            raise InputError(f"input {self.source.path}: unreadable near line {line}: {exc}") \
                from exc
        if (pending_rows or pending_rejected) and index >= start_chunk:
            whole = pa.concat_tables(pending) if pending else target.empty_table()
            yield Chunk(self.source, index, whole.combine_chunks(), pending_rejected,
                        bytes_read=self.source.size_bytes)


    def sha256(self) -> str:
        """The SHA-256 of the file as on disk (compressed for .gz), hashed while the chunks
        read it; a resumed run reads the chunks it skips too (to find their lines), so only
        what follows the last line read is read here."""
        if self._hashing is None:  # no chunk was asked for
            self._hashing = HashingFile(self.source.path)
        return self._hashing.sha256()


def _decode_lenient(raw: bytes, encoding: str) -> str:
    try:
        return raw.decode(encoding)
    except UnicodeDecodeError:
        return raw.decode(encoding, errors="backslashreplace")


def _odd_quote_lines(arr: np.ndarray, ends: np.ndarray) -> np.ndarray:
    """Per line of the block: whether it holds an odd number of quote characters."""
    quotes = np.cumsum(arr == QUOTE[0], dtype=np.int64)
    if not len(ends) or ends[-1] != len(arr) - 1:
        ends = np.append(ends, len(arr) - 1)
    at_end = quotes[ends]
    per_line = np.diff(at_end, prepend=0)
    return (per_line % 2) == 1


def _opens_unclosed_quote(line: bytes, delim: bytes) -> bool:
    """RFC 4180 quoting, exactly: does this line end inside a quoted field? A quote opens a
    field only at its start; inside, ``""`` is a quote and ``"`` closes."""
    in_quotes = False
    at_start = True
    i, n = 0, len(line)
    d = delim[0]
    q = QUOTE[0]
    while i < n:
        c = line[i]
        if in_quotes:
            if c == q:
                if i + 1 < n and line[i + 1] == q:
                    i += 2
                    continue
                in_quotes = False
            i += 1
            continue
        if c == q and at_start:
            in_quotes = True
            at_start = False
        elif c == d:
            at_start = True
        else:
            at_start = False
        i += 1
    return in_quotes


def _failing_cells(col: pa.Array, typ: pa.DataType, piece: int = 512) -> list[int]:
    """Indexes of the cells pyarrow cannot convert to ``typ`` (bisected in pieces)."""
    bad: list[int] = []
    stack = [(0, len(col))]
    while stack:
        start, stop = stack.pop()
        part = col.slice(start, stop - start)
        try:
            pc.cast(part, typ)
            continue
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            pass
        if stop - start <= piece:
            for i in range(start, stop):
                try:
                    pc.cast(col.slice(i, 1), typ)
                except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
                    bad.append(i)
            continue
        mid = (start + stop) // 2
        stack.extend([(mid, stop), (start, mid)])
    return sorted(bad)


def _why(field: pa.Field, text) -> str:
    if pa.types.is_integer(field.type):
        try:
            float(text)
            return f"column {field.name!r}: a number that is not a whole {field.type} " \
                   f"(a fraction, or beyond its range)"
        except (TypeError, ValueError):
            pass
    # the value itself is in the raw text; a fixed reason groups well in SQL
    return f"column {field.name!r}: text where a {field.type} belongs"


LIST_SEPARATOR = ";"


def _is_list(typ: pa.DataType) -> bool:
    return pa.types.is_list(typ) or pa.types.is_large_list(typ) or \
        pa.types.is_fixed_size_list(typ)


def _lists_as_text(schema: pa.Schema) -> pa.Schema:
    return pa.schema([pa.field(f.name, pa.string()) if _is_list(f.type) else f for f in schema])


def text_to_list(col, typ: pa.DataType) -> pa.Array:
    """A CSV field holding a ``;``-separated list of numbers, as the list type ``typ`` that
    another input (Parquet) has for the column. An empty field is null; an element that is
    not a number becomes a null element (the annotator that reads the list flags the row)."""
    import pandas as pd

    if isinstance(col, pa.ChunkedArray):
        col = col.combine_chunks()
    value_type = typ.value_type
    parts = pc.split_pattern(pc.utf8_trim_whitespace(col), LIST_SEPARATOR)
    flat = pc.utf8_trim_whitespace(parts.flatten())
    try:
        values = pc.cast(flat, value_type)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        strings = pd.Series(flat.to_numpy(zero_copy_only=False), dtype=object)
        values = pa.array(pd.to_numeric(strings, errors="coerce"), from_pandas=True)
        values = pc.cast(values, value_type)
    out = pa.ListArray.from_arrays(parts.offsets, values, mask=col.is_null())
    return out.cast(typ) if out.type != typ else out


def _row_values(table: pa.Table, i: int) -> list:
    return [table.column(j)[i].as_py() for j in range(table.num_columns)]
